"""Tests of tripletkit.report.plots: PNG files that hold a drawing, one run or several, and the sweep's plots."""

import copy

import pytest

from _support import check_image
from tripletkit._errors import TripletkitError
from tripletkit.report.plots import plot_loss_curves, plot_metric_vs_margin, plot_roc_det, plot_score_histogram

def test_overlay_of_several_runs(tmp_path, report):
    other = copy.deepcopy(report["verification"])  # a verification part is accepted as well
    other["roc"]["tpr"] = [0.8 * v for v in other["roc"]["tpr"]]
    other["det"]["fnmr"] = [1 - 0.8 * (1 - v) for v in other["det"]["fnmr"]]
    empty = {"verification": {"roc": None, "reason": "no genuine pairs"}}
    path = plot_roc_det([("margin 0.1", report), ("margin 0.2", other), ("margin 0.4", empty)], tmp_path / "o.png",
                        title="three runs")
    check_image(path)
    with pytest.raises(TripletkitError, match="at least one"):
        plot_roc_det([], tmp_path / "none.png")


def test_single_run_and_histogram(tmp_path, report):
    check_image(plot_roc_det([(None, report)], tmp_path / "roc.png"))
    check_image(plot_score_histogram(report, tmp_path / "hist.png"))


def test_a_degenerate_report_has_no_histogram(tmp_path, degenerate_report):
    with pytest.raises(TripletkitError, match="no score histogram"):
        plot_score_histogram(degenerate_report, tmp_path / "h.png")


def _sweep_rows(report, margins=(0.05, 0.2)):
    """Rows of a sweep result built from one report (test data only)."""
    ver = report["verification"]
    fnmr = {k: {"fnmr": v["fnmr"], "ci": v.get("ci")} for k, v in ver["fnmr_at_fmr"].items()}
    epochs = [{"epoch": e, "loss": 0.1 / e, "loss_after": 0.08 / e, "triplets": 900 - 100 * e} for e in (1, 2, 3)]
    return [{"margin": m, "primary": {"value": ver["eer"] * (1 + m), "ci": [ver["eer"] * 0.8, ver["eer"] * 1.3]},
             "metrics": {"eer": ver["eer"], "fnmr_at_fmr": fnmr}, "epochs": epochs} for m in margins]


def test_sweep_plots(tmp_path, report):
    rows = _sweep_rows(report)
    comparison = {"best": {"margin": 0.05, "value": rows[0]["primary"]["value"]}, "confidence": 0.95}
    check_image(plot_metric_vs_margin(rows, comparison, "EER", tmp_path / "metric.png"))
    check_image(plot_loss_curves(rows, tmp_path / "loss.png"))
    # a run whose values are all null still draws (nothing to label on the right)
    for row in rows:
        row["primary"] = {"value": None, "ci": None}
        row["metrics"] = {"eer": None, "fnmr_at_fmr": {"0.01": {"fnmr": None, "ci": None}}}
    plot_metric_vs_margin(rows, {"best": None, "confidence": 0.9}, "EER", tmp_path / "empty.png")
    assert (tmp_path / "empty.png").read_bytes()[:4] == b"\x89PNG"
