"""Report folders: the JSON, Markdown and PNG files of a score report and of a margin sweep.

:func:`write_report` writes ``report.json``, ``report.md``, ``roc_det.png`` and
``score_histogram.png`` from the report dict of :func:`tripletkit.evaluate.score`;
:func:`write_sweep_report` writes ``sweep.json``, ``sweep.md`` and the sweep's plots from the
result of :func:`tripletkit.sweeps.sweep`. Both write into a folder that the caller provides (the
temporary folder of :func:`tripletkit._io.atomic_path`, so nothing half-written is ever left
behind). JSON files hold plain JSON values only: a number that cannot be computed is ``null``
with a ``reason`` beside it, never NaN. The Markdown is :mod:`tripletkit.report.markdown`, the
figures :mod:`tripletkit.report.plots`, and every number is spelt by :mod:`tripletkit.report.format`.
"""

from __future__ import annotations

import json
from pathlib import Path

from .._errors import TripletkitError
from .._io import jsonable
from .format import compact, metric_label, verification_part
from .markdown import CAUTION, render_markdown, render_sweep_markdown
from .plots import plot_loss_curves, plot_metric_vs_margin, plot_roc_det, plot_score_histogram

__all__ = ["CAUTION", "write_report", "write_sweep_report", "render_markdown", "render_sweep_markdown",
           "plot_roc_det", "plot_score_histogram"]


def _require_folder(folder):
    folder = Path(folder)
    if not folder.is_dir():
        raise TripletkitError(f"report folder {str(folder)!r} does not exist; create it first")
    return folder


def write_report(report, folder, *, plots=True):
    """Write ``report.json``, ``report.md`` and (optionally) PNG plots into an existing folder.

    Parameters
    ----------
    report : dict
        A report dict of :func:`tripletkit.evaluate.score`.
    folder : str or Path
        An existing folder (normally the temporary folder of an atomic output).
    plots : bool, default True
        Draw the PNG plots. Plots are skipped (with the reason in ``report.md``) when the
        verification part has no curves, e.g. a table with a single identity.

    Returns
    -------
    dict
        The report as written: a shallow copy of ``report`` whose ``plots`` key lists the PNG
        files (``[{"file": ..., "title": ...}]``, names relative to ``folder``).
    """
    folder = _require_folder(folder)
    report = dict(report)
    drawn = []
    ver = verification_part(report)
    if plots and ver.get("roc"):
        plot_roc_det([(None, report)], folder / "roc_det.png")
        drawn.append({"file": "roc_det.png", "title": "ROC and DET curves"})
    if plots and ver.get("score_histogram"):
        plot_score_histogram(report, folder / "score_histogram.png")
        drawn.append({"file": "score_histogram.png", "title": "genuine and impostor scores"})
    report["plots"] = drawn
    text = json.dumps(jsonable(report), indent=2, allow_nan=False)
    (folder / "report.json").write_text(text + "\n", encoding="utf-8")
    (folder / "report.md").write_text(render_markdown(report, plots_requested=plots), encoding="utf-8")
    return report


def write_sweep_report(result, folder, *, reports, mined_regimes=()):
    """Write ``sweep.json``, ``sweep.md`` and the sweep's PNG plots into an existing folder.

    Parameters
    ----------
    result : dict
        The result of a margin sweep (:func:`tripletkit.sweeps.sweep`), every value a plain JSON
        value; its ``plots`` key is filled in here.
    folder : str or Path
        An existing folder (normally the temporary folder of an atomic output).
    reports : list of dict
        The evaluation report of each run, in the order of ``result["runs"]`` (their ROC and DET
        curves are overlaid).
    mined_regimes : sequence of str, default ()
        The regimes that each epoch of a fit-head sweep mined (named in ``sweep.md``).

    Returns
    -------
    dict
        The result as written: a shallow copy of ``result`` whose ``plots`` key lists the PNG files
        (``metric_vs_margin.png``, ``roc_det.png`` and, in fit-head mode, ``loss.png``).
    """
    folder = _require_folder(folder)
    result = dict(result)
    rows = result["runs"]
    label = metric_label(result["primary"])
    plot_metric_vs_margin(rows, result["comparison"], label, folder / "metric_vs_margin.png")
    drawn = [{"file": "metric_vs_margin.png", "title": "metric vs margin"}]
    plot_roc_det([(f"margin {compact(row['margin'])}", report) for row, report in zip(rows, reports)],
                 folder / "roc_det.png",
                 title=f"ROC and DET of every run (markers: FMR targets and EER; ranked by {label})")
    drawn.append({"file": "roc_det.png", "title": "ROC and DET of all runs"})
    if result["mode"] == "fit-head":
        plot_loss_curves(rows, folder / "loss.png")
        drawn.append({"file": "loss.png", "title": "loss curves"})
    result["plots"] = drawn
    (folder / "sweep.json").write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
    (folder / "sweep.md").write_text(render_sweep_markdown(result, mined_regimes=mined_regimes), encoding="utf-8")
    return result
