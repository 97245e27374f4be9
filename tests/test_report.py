"""report.py: JSON without NaN, the Markdown summary, PNG plots, the caution kept in sync with the README."""

import copy
import json
import re
import struct
from pathlib import Path

import numpy as np
import pytest

from tripletkit._errors import TripletkitError
from tripletkit.config import EvaluationConfig
from tripletkit.evaluate import score
from tripletkit.report import CAUTION, plot_roc_det, plot_score_histogram, render_markdown, write_report

ROOT = Path(__file__).resolve().parents[1]
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def report():
    """The report of a small seeded table with two subgroups (test data only)."""
    rng = np.random.default_rng(20261201)
    labels = np.repeat(np.arange(10), 6)
    emb = (rng.normal(size=(10, 8))[labels] + 0.7 * rng.normal(size=(60, 8))).astype(np.float32)
    groups = np.where(labels < 5, "east", "west").astype(object)
    return score((np.arange(60), labels, emb, groups), config=EvaluationConfig(bootstrap=20, fmr=(0.001, 0.01, 0.05)),
                 quiet=True)


def _png_size(path):
    """Width and height from the IHDR chunk, after checking the PNG signature."""
    data = Path(path).read_bytes()
    assert data[:8] == PNG_SIGNATURE, f"{path} is not a PNG"
    assert data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def _check_image(path, min_width=700, min_height=300):
    width, height = _png_size(path)
    assert width >= min_width and height >= min_height
    import matplotlib.image

    pixels = matplotlib.image.imread(str(path))
    assert pixels.shape[:2] == (height, width)
    # something was drawn: many distinct colours, not a blank canvas
    flat = (pixels[..., :3] * 255).astype(np.uint8).reshape(-1, 3)
    assert len(np.unique(flat, axis=0)) > 20


def test_write_report_outputs(tmp_path, report):
    written = write_report(report, tmp_path)
    names = sorted(p.name for p in tmp_path.iterdir())
    assert names == ["report.json", "report.md", "roc_det.png", "score_histogram.png"]
    assert [p["file"] for p in written["plots"]] == ["roc_det.png", "score_histogram.png"]
    assert report["plots"] == []  # the caller's dict is not changed
    data = json.loads((tmp_path / "report.json").read_text())
    assert list(data) == list(written)
    assert data["verification"]["fnmr_at_fmr"]["0.01"]["fnmr"] == report["verification"]["fnmr_at_fmr"]["0.01"]["fnmr"]
    for name in ("roc_det.png", "score_histogram.png"):
        _check_image(tmp_path / name)
    md = (tmp_path / "report.md").read_text()
    assert "![ROC and DET curves](roc_det.png)" in md and "(score_histogram.png)" in md


def test_json_has_no_nan(tmp_path, report):
    bad = copy.deepcopy(report)
    bad["verification"]["auc"] = float("nan")
    bad["health"]["effective_dimension"] = np.float64("inf")
    write_report(bad, tmp_path, plots=False)
    text = (tmp_path / "report.json").read_text()
    assert "NaN" not in text and "Infinity" not in text
    data = json.loads(text)
    assert data["verification"]["auc"] is None and data["health"]["effective_dimension"] is None


def test_markdown_has_the_fnmr_table_groups_and_caution(report):
    md = render_markdown(report)
    assert "| FMR target | FNMR | 95% interval | threshold (cosine) | note |" in md
    e = report["verification"]["fnmr_at_fmr"]["0.01"]
    lo, hi = e["ci"]
    row = f"| 1% (1 in 100) | {100 * e['fnmr']:.2f}% | {100 * lo:.2f}% – {100 * hi:.2f}% | {e['threshold']:.4f} |"
    assert row in md
    # 0.001 needs 3,000 impostor pairs; this table has 1,620: not resolvable, with the reason
    assert re.search(r"\| 0\.1% \(1 in 1,000\) \| n/a \| n/a \| n/a \| .*rule of 3", md)
    assert "## Subgroups" in md and "| east |" in md and "| west |" in md
    assert "## Retrieval" in md and "Recall@1" in md and "MAP@R" in md
    assert "## Clustering" in md and "purity" in md
    assert "## Embedding health" in md and "look collapsed" not in md
    assert md.rstrip().endswith(CAUTION)
    assert f"EER | {100 * report['verification']['eer']:.2f}%" in md


def test_markdown_flags_collapse_and_missing_parts(report):
    bad = copy.deepcopy(report)
    bad["health"]["collapsed"] = True
    bad["clustering"] = None
    del bad["verification"]["groups"]
    md = render_markdown(bad)
    assert "**The embeddings look collapsed**" in md
    assert "Not run (clustering = false)." in md
    assert "## Subgroups" not in md
    # a bare dict still renders (every section says what is missing)
    assert "## Caution" in render_markdown({})


def test_degenerate_report_draws_no_plots(tmp_path):
    with pytest.warns(Warning):
        rep = score((np.arange(4), np.zeros(4, np.int64), np.eye(4, dtype=np.float32)), quiet=True,
                    config=EvaluationConfig(bootstrap=0))
    written = write_report(rep, tmp_path)
    assert written["plots"] == [] and not list(tmp_path.glob("*.png"))
    assert "Not drawn: no impostor pairs" in (tmp_path / "report.md").read_text()
    with pytest.raises(TripletkitError, match="no score histogram"):
        plot_score_histogram(rep, tmp_path / "h.png")


def test_plots_false(tmp_path, report):
    write_report(report, tmp_path, plots=False)
    assert not list(tmp_path.glob("*.png"))
    assert "Not drawn (plots = false)." in (tmp_path / "report.md").read_text()


def test_write_report_needs_an_existing_folder(tmp_path, report):
    with pytest.raises(TripletkitError, match="does not exist; create it first"):
        write_report(report, tmp_path / "missing")


def test_overlay_of_several_runs(tmp_path, report):
    other = copy.deepcopy(report["verification"])  # a verification part is accepted as well
    other["roc"]["tpr"] = [0.8 * v for v in other["roc"]["tpr"]]
    other["det"]["fnmr"] = [1 - 0.8 * (1 - v) for v in other["det"]["fnmr"]]
    empty = {"verification": {"roc": None, "reason": "no genuine pairs"}}
    path = plot_roc_det([("margin 0.1", report), ("margin 0.2", other), ("margin 0.4", empty)], tmp_path / "o.png",
                        title="three runs")
    _check_image(path)
    with pytest.raises(TripletkitError, match="at least one"):
        plot_roc_det([], tmp_path / "none.png")


def test_caution_matches_the_readme():
    readme = (ROOT / "README.md").read_text()
    section = readme.split("## Caution", 1)[1].split("\n## ", 1)[0]
    section = " ".join(section.split("\n", 1)[1].split())  # drop the heading, join the lines
    assert CAUTION in section
    for phrase in ("population", "capture conditions", "subgroup", "local law"):
        assert phrase in CAUTION
