"""Tests of tripletkit.report (the package): the writing of report folders, JSON without NaN."""

import copy
import json

import numpy as np
import pytest

from _support import check_image
from tripletkit._errors import TripletkitError
from tripletkit.report import write_report


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
        check_image(tmp_path / name)
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


def test_plots_false(tmp_path, report):
    write_report(report, tmp_path, plots=False)
    assert not list(tmp_path.glob("*.png"))
    assert "Not drawn (plots = false)." in (tmp_path / "report.md").read_text()


def test_write_report_needs_an_existing_folder(tmp_path, report):
    with pytest.raises(TripletkitError, match="does not exist; create it first"):
        write_report(report, tmp_path / "missing")


def test_degenerate_report_draws_no_plots(tmp_path, degenerate_report):
    written = write_report(degenerate_report, tmp_path)
    assert written["plots"] == [] and not list(tmp_path.glob("*.png"))
    assert "Not drawn: no impostor pairs" in (tmp_path / "report.md").read_text()
