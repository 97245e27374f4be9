"""Tests of tripletkit.report.markdown: the score report's tables, groups and caution, the caution kept in
sync with the README, and the sweep report.
"""

import copy
import re
from pathlib import Path

from tripletkit.report import CAUTION, render_markdown, render_sweep_markdown

ROOT = Path(__file__).resolve().parents[2]


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


def test_caution_matches_the_readme():
    readme = (ROOT / "README.md").read_text()
    section = readme.split("## Caution", 1)[1].split("\n## ", 1)[0]
    section = " ".join(section.split("\n", 1)[1].split())  # drop the heading, join the lines
    assert CAUTION in section
    for phrase in ("population", "capture conditions", "subgroup", "local law"):
        assert phrase in CAUTION


def _sweep_result(report, primary="eer"):
    """A sweep result of two runs built from one report (test data only)."""
    ver = report["verification"]
    fnmr = {k: {"fnmr": v["fnmr"], "ci": v.get("ci"), "threshold": v.get("threshold")}
            for k, v in ver["fnmr_at_fmr"].items()}
    metrics = {"eer": ver["eer"], "auc": ver["auc"], "fnmr_at_fmr": fnmr, "recall_at_1": 0.9798, "map_at_r": 0.7931,
               "purity": 0.845, "nmi": 0.9352}
    mining = {"active_fraction": 1.0, "regimes": {"hard": 5917, "semi-hard": 6366, "easy": 0}}
    runs = [{"margin": m, "report": f"runs/margin-{m!r}/report.md", "metrics": metrics, "mining": mining if m < 0.1
             else None, "primary": {"metric": primary, "value": ver["eer"], "ci": [0.031, 0.0438]}}
            for m in (0.05, 0.2)]
    comparison = {"difference": 0.00023810001, "ci": [-0.0028619, 0.0029364], "confidence": 0.95,
                  "replicates_used": 1000, "seed": 0,
                  "verdict": "margin 0.05 has the lower EER, but the difference is not larger than the noise"}
    return {"mode": "checkpoints", "primary": primary, "runs": runs, "comparison": comparison, "plots": [],
            "notes": ["a note"], "heldout": {"rows": 1290, "identities": 100, "genuine_pairs": 8223,
                                            "impostor_pairs": 823182}}


def test_sweep_markdown(report):
    md = render_sweep_markdown(_sweep_result(report))
    assert md.startswith("# Margin sweep\n")
    assert ("Held-out set: 1,290 rows, 100 identities, 8,223 genuine and 823,182 impostor pairs." in md)
    assert "Margin 0.05 has the lower EER, but the difference is not larger than the noise." in md
    assert "Paired difference (runner-up minus best) 0.0002381, 95% interval [-0.002862, 0.002936]" in md
    assert "from 1,000 resamples" in md
    assert "| margin | EER (95% CI) | FNMR@0.001 | FNMR@0.01 | FNMR@0.05 | AUC |" in md
    eer = report["verification"]["eer"]
    assert f"| [0.05](runs/margin-0.05/report.md) | {100 * eer:.2f}% (3.10% – 4.38%) |" in md
    assert "| 0.8450 | 0.9352 | 1.000 | 5,917 / 6,366 / 0 |" in md and "| n/a | n/a |" in md
    assert "## Notes\n\n- a note" in md and md.rstrip().endswith(CAUTION)
    ranked = render_sweep_markdown(_sweep_result(report, "fnmr@0.01"))
    assert "| margin | FNMR at FMR = 0.01 (95% CI) | EER |" in ranked


def test_both_reports_spell_a_rate_alike(report):
    # the issue: one report wrote 2.00% and the other 2.00 %; one formatter now spells both
    eer = f"{100 * report['verification']['eer']:.2f}%"
    assert f"| EER | {eer} at threshold" in render_markdown(report)
    assert f"| {eer} (3.10% – 4.38%) |" in render_sweep_markdown(_sweep_result(report))
    assert " %" not in render_sweep_markdown(_sweep_result(report))
