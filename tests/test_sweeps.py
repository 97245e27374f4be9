"""Tests of tripletkit.sweeps: both modes end to end, outputs, progress, determinism and every config
error. The paired comparison itself is tested in tests/metrics/test_paired.py.
"""

import importlib
import json

import numpy as np
import pytest

from _support import identity_clusters
from tripletkit._errors import TripletkitError
from tripletkit.metrics import paired
from tripletkit.sweeps import sweep
from tripletkit.tables.embeddings import write_table


# -- synthetic data (invented, seeded) ---------------------------------------------------------
@pytest.fixture
def feature_tables(tmp_path, rng):
    """Small train / held-out feature tables: identity clusters under a shared nuisance direction."""
    d = 12
    shared = rng.normal(size=(1, d))
    paths = {}
    for name, ids, first in (("train", 14, 0), ("heldout", 10, 100)):
        labels, X, _ = identity_clusters(rng, ids, 8, d, 0.3, first_label=first)
        X = X + 2.0 * rng.normal(size=(labels.size, 1)) * shared
        p = tmp_path / f"{name}.parquet"
        write_table(p, np.arange(labels.size) + 1000 * first, [f"seal-{v}" for v in labels], X)
        paths[name] = p
    return paths


@pytest.fixture
def checkpoint_tables(tmp_path, rng):
    """Held-out embeddings of two checkpoints of the same photos: 'good' (tight) and 'poor' (noisy)."""
    labels, good, centres = identity_clusters(rng, 40, 6, 16, 0.35)
    poor = centres[labels] + 0.9 * rng.normal(size=good.shape)
    ids = [f"photo-{i:04d}" for i in range(labels.size)]
    names = [f"seal-{v}" for v in labels]
    out = {}
    for name, X in (("good", good), ("poor", poor)):
        out[name] = tmp_path / f"{name}.parquet"
        write_table(out[name], ids, names, X)
    # the same photos in another row order: a checkpoint dump need not keep the order
    perm = rng.permutation(labels.size)
    out["good_shuffled"] = tmp_path / "good_shuffled.parquet"
    write_table(out["good_shuffled"], np.asarray(ids)[perm], np.asarray(names)[perm], good[perm])
    return out


def _write_config(tmp_path, text, name="sweep.toml"):
    p = tmp_path / name
    p.write_text(text)
    return p


FIT_HEAD = """
[sweep]
margins = [0.3, 0.1]
mode = "fit-head"
primary = "fnmr@0.01"
bootstrap = 30
[data]
train = "train.parquet"
heldout = "heldout.parquet"
[head]
dim = 4
epochs = 2
batch_triplets = 64
[evaluation]
fmr = [0.01, 0.1]
bootstrap = 20
plots = false
"""

CHECKPOINTS = """
[sweep]
mode = "checkpoints"
primary = "eer"
bootstrap = 50
[[sweep.runs]]
margin = 0.2
heldout = "{a}"
[[sweep.runs]]
margin = 0.1
heldout = "{b}"
[evaluation]
fmr = [0.01, 0.1]
bootstrap = 20
plots = false
clustering = false
"""


# -- end to end --------------------------------------------------------------------------------
def _strip_times(x):
    if isinstance(x, dict):
        return {k: _strip_times(v) for k, v in x.items() if k not in ("seconds", "out")}
    if isinstance(x, list):
        return [_strip_times(v) for v in x]
    return x


def test_fit_head_sweep_writes_everything_and_is_deterministic(tmp_path, feature_tables, capsys):
    cfg = _write_config(tmp_path, FIT_HEAD)
    out = tmp_path / "sweep-out"
    result = sweep(cfg, out)
    assert result["out"] == str(out)
    on_disk = json.loads((out / "sweep.json").read_text())
    assert on_disk == {k: v for k, v in result.items() if k != "out"}
    assert result["mode"] == "fit-head" and result["margins"] == [0.1, 0.3]
    for row in result["runs"]:
        folder = out / "runs" / f"margin-{row['margin']!r}"
        assert (folder / "report.json").is_file() and (folder / "report.md").is_file()
        assert (folder / "head.npz").is_file()
        m = row["metrics"]
        assert set(m) == {"eer", "auc", "fnmr_at_fmr", "recall_at_1", "map_at_r", "purity", "nmi"}
        assert set(m["fnmr_at_fmr"]) == {"0.01", "0.1"} and "ci" in m["fnmr_at_fmr"]["0.01"]
        assert all(m[k] is not None for k in ("eer", "auc", "recall_at_1", "map_at_r", "purity", "nmi"))
        report = json.loads((folder / "report.json").read_text())
        assert m["eer"] == report["verification"]["eer"]
        assert len(row["loss_curve"]) == 2 and len(row["epochs"]) == 2
        assert set(row["mining"]) >= {"active_fraction", "regimes", "triplets"}
        assert set(row["mining"]["regimes"]) == {"easy", "semi-hard", "hard"}
        assert row["primary"]["metric"] == "fnmr@0.01"
        # the ranking value is the report's own FNMR at that FMR (same counts, same definition)
        assert row["primary"]["value"] == pytest.approx(m["fnmr_at_fmr"]["0.01"]["fnmr"], abs=1e-9)
    comp = result["comparison"]
    assert comp["best"]["margin"] in (0.1, 0.3) and comp["runner_up"]["margin"] in (0.1, 0.3)
    assert comp["difference"] >= 0 and len(comp["ci"]) == 2 and comp["verdict"]
    for p in ("metric_vs_margin.png", "roc_det.png", "loss.png"):
        assert (out / p).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    md = (out / "sweep.md").read_text()
    assert "## Verdict" in md and "runs/margin-0.1/report.md" in md and "Caution" in md
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".sweep-out")]  # no temp leftovers
    err = capsys.readouterr().err
    assert "run 1/2: margin 0.1" in err and "run 2/2: margin 0.3" in err and "epoch 2/2" in err
    # the same config again, quietly: the same numbers and the same head weights, byte for byte
    again = sweep(cfg, tmp_path / "again", quiet=True)
    assert capsys.readouterr().err == ""
    assert _strip_times(again) == _strip_times(result)
    for row in result["runs"]:
        name = f"runs/margin-{row['margin']!r}/head.npz"
        assert (out / name).read_bytes() == (tmp_path / "again" / name).read_bytes()


def test_checkpoints_identical_runs_exactly_zero(tmp_path, checkpoint_tables):
    # The same photos embedded identically (one file in another row order): difference exactly 0.
    text = CHECKPOINTS.format(a=checkpoint_tables["good"], b=checkpoint_tables["good_shuffled"])
    result = sweep(_write_config(tmp_path, text), tmp_path / "out", quiet=True)
    c = result["comparison"]
    assert c["difference"] == 0.0 and c["ci"] == [0.0, 0.0] and c["larger_than_noise"] is False
    assert "not larger than the noise" in c["verdict"]
    assert result["runs"][0]["mining"] is None
    assert not (tmp_path / "out" / "loss.png").exists()


def test_checkpoints_clearly_better_run(tmp_path, checkpoint_tables, feature_tables):
    text = CHECKPOINTS.format(a=checkpoint_tables["poor"], b=checkpoint_tables["good"])
    # mining statistics from a training dump at each margin
    text = text.replace('heldout = "%s"\n' % checkpoint_tables["good"],
                        'heldout = "%s"\ntrain = "train.parquet"\n' % checkpoint_tables["good"])
    result = sweep(_write_config(tmp_path, text), tmp_path / "out", quiet=True)
    c = result["comparison"]
    assert c["best"]["margin"] == 0.1 and c["runner_up"]["margin"] == 0.2
    assert c["larger_than_noise"] is True and "not larger" not in c["verdict"]
    rows = {r["margin"]: r for r in result["runs"]}
    assert rows[0.1]["mining"]["triplets"] > 0 and rows[0.2]["mining"] is None
    assert rows[0.1]["train"].endswith("train.parquet")


def test_force_and_existing_output(tmp_path, checkpoint_tables):
    text = CHECKPOINTS.format(a=checkpoint_tables["good"], b=checkpoint_tables["poor"])
    cfg = _write_config(tmp_path, text)
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("old")
    with pytest.raises(TripletkitError, match="already exists; pass force=True"):
        sweep(cfg, out, quiet=True)
    assert (out / "keep.txt").read_text() == "old"
    sweep(cfg, out, force=True, quiet=True)
    assert (out / "sweep.json").is_file() and not (out / "keep.txt").exists()


def test_command_line(tmp_path, checkpoint_tables, capsys):
    from tripletkit.cli import main

    cfg = _write_config(tmp_path, CHECKPOINTS.format(a=checkpoint_tables["good"], b=checkpoint_tables["poor"]))
    assert main(["sweep", str(cfg), "--out", str(tmp_path / "out"), "--quiet", "--json"]) == 0
    printed = json.loads(capsys.readouterr().out)
    assert printed["comparison"]["best"]["margin"] == 0.2 and printed["out"] == str(tmp_path / "out")
    bad = _write_config(tmp_path, CHECKPOINTS.replace('primary = "eer"', 'primary = "fnmr@0.5"'), "bad.toml")
    assert main(["sweep", str(bad), "--out", str(tmp_path / "out2")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and err.count("\n") == 1 and "not among [evaluation] fmr" in err
    assert not (tmp_path / "out2").exists()


def test_failure_mid_sweep_leaves_nothing(tmp_path, checkpoint_tables, monkeypatch):
    sw = importlib.import_module("tripletkit.sweeps")  # the module; tripletkit.sweeps is the verb

    def boom(*args, **kwargs):
        raise KeyboardInterrupt
    monkeypatch.setattr(sw, "_evaluate", boom)
    text = CHECKPOINTS.format(a=checkpoint_tables["good"], b=checkpoint_tables["poor"])
    with pytest.raises(KeyboardInterrupt):
        sweep(_write_config(tmp_path, text), tmp_path / "out", quiet=True)
    assert not (tmp_path / "out").exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".out")]


# -- config errors: one line, no output --------------------------------------------------------
CONFIG_ERRORS = [
    (FIT_HEAD.replace("epochs = 2", "epochz = 2"), r"\[head\]: unknown key 'epochz'"),
    (FIT_HEAD.replace("margins = [0.3, 0.1]", "margins = [0.3, 0.0]"), r"margins\[1\] must be > 0.0"),
    (FIT_HEAD.replace("margins = [0.3, 0.1]", "margins = [0.3, -0.1]"), r"margins\[1\] must be > 0.0"),
    (FIT_HEAD.replace('train = "train.parquet"', 'train = "nope.parquet"'),
     r"\[data\] train: table '.*nope.parquet' does not exist"),
    (FIT_HEAD.replace('heldout = "heldout.parquet"', ""), r"fit-head mode needs \[data\] heldout"),
    (FIT_HEAD.replace("margins = [0.3, 0.1]", ""), r"fit-head mode needs \[sweep\] margins"),
    (FIT_HEAD.replace('primary = "fnmr@0.01"', 'primary = "fnmr@0.001"'),
     r"FNMR at FMR 0.001, which is not among \[evaluation\] fmr \(0.01, 0.1\)"),
    (FIT_HEAD.replace('primary = "fnmr@0.01"', 'primary = "recall"'), r"expected 'eer' or 'fnmr@<fmr>'"),
    (FIT_HEAD.replace('mode = "fit-head"', 'mode = "checkpoint"'), r"mode must be one of fit-head, checkpoints"),
    (FIT_HEAD + '[[sweep.runs]]\nmargin = 0.1\nheldout = "heldout.parquet"\n',
     r"\[\[sweep.runs\]\] belongs to checkpoints mode"),
    (FIT_HEAD.replace('mode = "fit-head"', 'mode = "checkpoints"'), r"checkpoints mode needs one \[\[sweep.runs\]\]"),
    ('[sweep]\nmode = "checkpoints"\nprimary = "eer"\n[[sweep.runs]]\nmargin = 0.1\nheldout = "missing.parquet"\n',
     r"runs\[0\].heldout: table '.*missing.parquet' does not exist"),
    ('[sweep]\nmode = "checkpoints"\nprimary = "eer"\n[[sweep.runs]]\nmargin = 0\nheldout = "heldout.parquet"\n',
     r"runs\[0\]\.margin must be > 0.0"),
    ('[sweep]\nmode = "checkpoints"\nprimary = "eer"\n[[sweep.runs]]\nheldout = "heldout.parquet"\n',
     r"runs\[0\]: key 'margin' is required"),
    ('[sweep]\nmode = "checkpoints"\nprimary = "eer"\n[[sweep.runs]]\nmargin = 0.1\nheldout = "heldout.parquet"\n'
     '[[sweep.runs]]\nmargin = 0.1\nheldout = "train.parquet"\n', r"two \[\[sweep.runs\]\] have margin 0.1"),
    ('[sweep]\nmode = "checkpoints"\nprimary = "eer"\nmargins = [0.1, 0.2]\n[[sweep.runs]]\nmargin = 0.1\n'
     'heldout = "heldout.parquet"\n', r"\[sweep\] margins \[0.1, 0.2\] differ from the margins of \[\[sweep.runs\]\]"),
    ('[sweep]\nmode = "checkpoints"\nprimary = "eer"\n[[sweep.runs]]\nmargin = 0.1\nheldout = "heldout.parquet"\n'
     '[[sweep.runs]]\nmargin = 0.2\nheldout = "train.parquet"\n',
     r"held-out table of margin 0.2 .* has other rows than that of margin 0.1"),
    ('[sweep]\nmode = "checkpoints"\nprimary = "eer"\n[[sweep.runs]]\nmargin = 0.1\nheldout = "heldout.parquet"\n'
     '[data]\ntrain = "train.parquet"\n', r"\[data\] belongs to fit-head mode"),
    (FIT_HEAD + 'pairs = "pairs.parquet"\n', r"\[evaluation\] pairs: a sweep compares runs on all pairs"),
    ("[sweep\nmargins = [0.1]\n", r"is not valid TOML"),
]


@pytest.mark.parametrize("text, match", CONFIG_ERRORS)
def test_config_errors_one_line_no_output(tmp_path, feature_tables, text, match):
    cfg = _write_config(tmp_path, text)
    out = tmp_path / "out"
    with pytest.raises(TripletkitError, match=match) as info:
        sweep(cfg, out, quiet=True)
    assert "\n" not in str(info.value)
    assert not out.exists() and not [p for p in tmp_path.iterdir() if p.name.startswith(".out")]


def test_held_out_set_too_large_for_the_paired_comparison(tmp_path, feature_tables, monkeypatch):
    monkeypatch.setattr(paired, "MAX_PAIRS", 1000)  # the held-out table has 80 rows, 3160 pairs
    with pytest.raises(TripletkitError, match=r"80 held-out rows make 3160 pairs; .* at most 1000"):
        sweep(_write_config(tmp_path, FIT_HEAD), tmp_path / "out", quiet=True)
    assert not (tmp_path / "out").exists()


def test_missing_config_file(tmp_path):
    with pytest.raises(TripletkitError, match="does not exist"):
        sweep(tmp_path / "none.toml", tmp_path / "out")
    assert not (tmp_path / "out").exists()


def test_demo_config_parses_and_names_existing_tables():
    from pathlib import Path

    from tripletkit.config import load_config

    path = Path(__file__).resolve().parents[1] / "configs" / "sweep.toml"
    cfg = load_config(path)
    assert cfg.sweep.mode == "fit-head" and all(m > 0 for m in cfg.sweep.margins)
    assert Path(cfg.data.train).is_file() and Path(cfg.data.heldout).is_file()
    # every key of the file carries a comment line above it
    lines = path.read_text().splitlines()
    for i, line in enumerate(lines):
        if "=" in line and not line.lstrip().startswith("#"):
            assert lines[i - 1].lstrip().startswith("#"), f"key without a comment: {line!r}"
