"""Every figure of the reports: ROC and DET curves, score histograms, and the sweep's metric and loss plots.

Plots are drawn on matplotlib ``Figure`` objects with the Agg canvas, all set up by one function
(:func:`figure`) in one plain style and palette. pyplot is never imported, so writing a report
neither changes the backend of a user's interactive session nor leaves figures open in pyplot's
global registry. The plot functions take report dicts (or their ``verification`` part), so that a
margin sweep overlays several runs with the same functions that draw one.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .._errors import TripletkitError
from .format import compact, level, number, percent, sorted_targets, verification_part

__all__ = ["figure", "plot_roc_det", "plot_score_histogram", "plot_metric_vs_margin", "plot_loss_curves"]

# Our plain palette: dark blue, brick red, green, purple, orange, slate, teal, grey.
COLOURS = ("#1f4e79", "#b03a2e", "#1e8449", "#6c3483", "#ca6f1e", "#34495e", "#138d75", "#7f8c8d")
_GENUINE = "#ca6f1e"
_IMPOSTOR = "#1f4e79"
# One marker per FMR target, in ascending order of the target; the EER gets an open square.
_TARGET_MARKERS = ("o", "^", "D", "v", "P", "X", "h")
_DPI = 110


def figure(width, height, ncols=1):
    """A figure of ``ncols`` axes side by side in the reports' style, on the Agg canvas."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=_DPI)
    FigureCanvasAgg(fig)
    axes = [fig.add_subplot(1, ncols, i + 1) for i in range(ncols)]
    for ax in axes:
        ax.grid(True, which="major", color="0.88", linewidth=0.6)
        ax.set_axisbelow(True)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
        ax.tick_params(labelsize=8)
    return fig, axes


def _operating_points(ver):
    """[(target key, FMR reached or the target, FNMR)] of the resolvable targets, ascending."""
    ops = ver.get("fnmr_at_fmr") or {}
    out = []
    for key in sorted_targets(ops):
        e = ops[key] or {}
        if e.get("fnmr") is not None:
            out.append((key, float(e.get("fmr", float(key))), float(e["fnmr"])))
    return out


def _mark_operating_points(ax_roc, ax_det, ver, colour, marker_of, annotate):
    """Mark each resolvable FMR target (its marker shape) and the EER (an open square) of one run."""
    for key, fmr, fnmr in _operating_points(ver):
        x = max(fmr, 1e-12)
        ax_roc.plot([x], [100 * (1 - fnmr)], marker=marker_of[key], color=colour, markersize=6, linestyle="none")
        if fnmr > 0:
            ax_det.plot([x], [100 * fnmr], marker=marker_of[key], color=colour, markersize=6, linestyle="none")
        if annotate:
            text = f"FMR {compact(key)}: FNMR {percent(fnmr, 1)}"
            ax_roc.annotate(text, (x, 100 * (1 - fnmr)), xytext=(6, -12), textcoords="offset points",
                            fontsize=7.5, color="0.2")
            # the DET's log FNMR axis packs high-FNMR points closely: there the marker legend
            # names them, and the numbers are on the ROC
    eer = ver.get("eer")
    if eer is not None:
        ax_roc.plot([max(eer, 1e-12)], [100 * (1 - eer)], marker="s", markerfacecolor="white",
                    color=colour, markersize=6, linestyle="none")
        if eer > 0:
            ax_det.plot([eer], [100 * eer], marker="s", markerfacecolor="white", color=colour,
                        markersize=6, linestyle="none")
        if annotate:
            text = f"EER {percent(eer, 1)}"
            ax_roc.annotate(text, (max(eer, 1e-12), 100 * (1 - eer)), xytext=(6, -12),
                            textcoords="offset points", fontsize=7.5, color="0.2")
            if eer > 0:
                ax_det.annotate(text, (eer, 100 * eer), xytext=(6, 4), textcoords="offset points",
                                fontsize=7.5, color="0.2")


def plot_roc_det(curves, path, *, title=None):
    """ROC and DET curves of one or several runs, side by side, with the operating points marked.

    Parameters
    ----------
    curves : list of (label, report)
        ``report`` is a report dict of :func:`tripletkit.evaluate.score` or its ``verification``
        part; ``label`` names the run in the legend (``None`` for a single run). Runs without
        curves (degenerate input) are listed in the legend as such.
    path : str or Path
        PNG file to write.
    title : str, optional
        Figure title.

    Notes
    -----
    Left: ROC, FMR (log scale) against the true match rate 1 - FNMR. Right: DET, FMR against
    FNMR, both on log scales (points with a zero rate cannot be drawn there and are left out).
    Each resolvable FMR target is a filled marker (one shape per target) at the target's
    operating point; the EER is an open square, on the DET's FMR = FNMR diagonal. With one run
    the ROC labels every point with its numbers.

    Returns
    -------
    Path
    """
    if not curves:
        raise TripletkitError("plot_roc_det needs at least one (label, report) curve")
    fig, (ax_roc, ax_det) = figure(11.0, 4.6, ncols=2)
    single = len(curves) == 1
    all_keys = sorted({k for _, r in curves for k in (verification_part(r).get("fnmr_at_fmr") or {})}, key=float)
    marker_of = {k: _TARGET_MARKERS[i % len(_TARGET_MARKERS)] for i, k in enumerate(all_keys)}
    lo_fmr = 1.0
    for i, (label, report) in enumerate(curves):
        ver = verification_part(report)
        colour = COLOURS[i % len(COLOURS)]
        name = label if label is not None else "ROC"
        if not ver.get("roc"):
            ax_roc.plot([], [], color=colour, label=f"{label or 'run'}: no curve ({ver.get('reason', 'n/a')})")
            continue
        fpr = [float(v) for v in ver["roc"]["fpr"]]
        tpr = [float(v) for v in ver["roc"]["tpr"]]
        det_fmr = [float(v) for v in ver["det"]["fmr"]]
        det_fnmr = [float(v) for v in ver["det"]["fnmr"]]
        pos = [(x, y) for x, y in zip(fpr, tpr) if x > 0]
        if pos:
            lo_fmr = min(lo_fmr, pos[0][0])
            ax_roc.plot([p[0] for p in pos], [100 * p[1] for p in pos], color=colour, linewidth=1.3,
                        label=name if label is not None else None)
        pos = [(x, y) for x, y in zip(det_fmr, det_fnmr) if x > 0 and y > 0]
        if pos:
            ax_det.plot([p[0] for p in pos], [100 * p[1] for p in pos], color=colour, linewidth=1.3,
                        label=name if label is not None else None)
        _mark_operating_points(ax_roc, ax_det, ver, colour, marker_of, annotate=single)
    # legend entries for the marker shapes, in neutral grey
    for key in all_keys:
        ax_det.plot([], [], marker=marker_of[key], color="0.35", linestyle="none", label=f"at FMR {compact(key)}")
    ax_det.plot([], [], marker="s", markerfacecolor="white", color="0.35", linestyle="none", label="EER")
    lo = max(lo_fmr / 2.0, 1e-9)
    for ax in (ax_roc, ax_det):
        ax.set_xscale("log")
        ax.set_xlim(lo, 1.0)
        ax.set_xlabel("false match rate FMR (share of impostor pairs accepted, log scale)", fontsize=8.5)
    ax_det.plot([lo, 1.0], [100 * lo, 100.0], color="0.6", linestyle=":", linewidth=0.9, label="FMR = FNMR")
    ax_roc.set_ylabel("true match rate 1 − FNMR (%)", fontsize=8.5)
    ax_roc.set_ylim(0, 100.5)
    ax_roc.set_title("ROC", fontsize=9.5)
    ax_det.set_yscale("log")
    ax_det.set_ylabel("false non-match rate FNMR (%, log scale)", fontsize=8.5)
    ax_det.set_title("DET", fontsize=9.5)
    if any(lbl is not None for lbl, _ in curves) or not all(verification_part(r).get("roc") for _, r in curves):
        ax_roc.legend(frameon=False, fontsize=7.5, loc="lower right")
    ax_det.legend(frameon=False, fontsize=7.5, loc="lower left")
    if title:
        fig.suptitle(title, fontsize=10)
    return _save(fig, path)


def plot_score_histogram(report, path, *, title=None):
    """Genuine and impostor score distributions, with the threshold of each FMR target.

    Parameters
    ----------
    report : dict
        A report dict or its ``verification`` part, with ``score_histogram`` (bin ``edges`` over
        the cosine range and the ``genuine`` and ``impostor`` pair count in each bin; the pairs
        themselves are never needed).
    path : str or Path
        PNG file to write.
    title : str, optional
        Figure title.

    Notes
    -----
    Each class is shown as its share of pairs per bin, since impostor pairs outnumber genuine
    ones by far. Left: linear scale; right: log scale, where the impostor tail that sets the
    low-FMR thresholds is visible.

    Returns
    -------
    Path
    """
    ver = verification_part(report)
    hist = ver.get("score_histogram")
    if not hist:
        raise TripletkitError("the report has no score histogram (no genuine or no impostor pairs); nothing to plot")
    edges = np.asarray(hist["edges"], dtype=np.float64)
    gen = np.asarray(hist["genuine"], dtype=np.float64)
    imp = np.asarray(hist["impostor"], dtype=np.float64)
    width = float(np.median(np.diff(edges)))
    gshare = 100 * gen / max(gen.sum(), 1.0)
    ishare = 100 * imp / max(imp.sum(), 1.0)
    used = np.flatnonzero((gen + imp) > 0)
    lo = edges[used[0]] - 2 * width if used.size else -1.0
    hi = edges[used[-1] + 1] + 2 * width if used.size else 1.0
    fig, axes = figure(11.0, 4.2, ncols=2)
    ops = _operating_points(ver)
    thresholds = {k: (ver["fnmr_at_fmr"][k] or {}).get("threshold") for k, _, _ in ops}
    for ax, log in zip(axes, (False, True)):
        ax.stairs(ishare, edges, fill=True, color=_IMPOSTOR, alpha=0.35,
                  label=f"impostor pairs ({number(int(imp.sum()))})")
        ax.stairs(ishare, edges, color=_IMPOSTOR, linewidth=1.0)
        ax.stairs(gshare, edges, fill=True, color=_GENUINE, alpha=0.35,
                  label=f"genuine pairs ({number(int(gen.sum()))})")
        ax.stairs(gshare, edges, color=_GENUINE, linewidth=1.0)
        ax.set_xlim(lo, hi)
        ax.set_xlabel("score: cosine similarity of the pair", fontsize=8.5)
        if log:
            ax.set_yscale("log")
            pos = np.concatenate([gshare[gshare > 0], ishare[ishare > 0]])
            if pos.size:
                ax.set_ylim(pos.min() / 2, 100 * 1.5 if pos.max() > 50 else pos.max() * 2)
        for key, _, _ in ops:
            t = thresholds[key]
            if t is None:
                continue
            ax.axvline(t, color="0.25", linestyle="--", linewidth=0.8)
            # vertical labels beside their lines, so that close thresholds do not overlap
            ax.text(t, 0.98, f"FMR {compact(key)} ", transform=ax.get_xaxis_transform(), rotation=90,
                    fontsize=7, color="0.2", ha="right", va="top",
                    bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.7, "pad": 0.5})
        if ver.get("eer_threshold") is not None:
            ax.axvline(ver["eer_threshold"], color="#b03a2e", linestyle=":", linewidth=1.0, label="EER threshold")
    axes[0].set_ylabel(f"share of the class's pairs per bin of {compact(width)} (%)", fontsize=8.5)
    axes[1].set_ylabel("same, log scale (%)", fontsize=8.5)
    axes[0].set_title("score distributions (dashed: threshold of each FMR target)", fontsize=9.5)
    axes[1].set_title("the tails, where low-FMR thresholds sit", fontsize=9.5)
    axes[0].legend(frameon=False, fontsize=7.5, loc="upper left")
    if title:
        fig.suptitle(title, fontsize=10)
    return _save(fig, path)


# ---------------------------------------------------------------------------------------------
# the sweep's plots
# ---------------------------------------------------------------------------------------------
def _margin_axis(ax, margins):
    ax.set_xscale("log")
    ax.set_xticks(margins)
    ax.set_xticklabels([compact(m) for m in margins])
    ax.minorticks_off()
    ax.set_xlabel("margin alpha (squared distance on the unit sphere)")


def _bars(ax, margins, values, cis, colour, label, style="o-"):
    """Values (fractions, drawn in %) against margin with asymmetric interval bars where known."""
    points = [(m, v, c) for m, v, c in zip(margins, values, cis) if v is not None]
    if not points:
        return
    x = [p[0] for p in points]
    y = np.array([100 * p[1] for p in points])
    lo = np.array([100 * max(p[1] - p[2][0], 0.0) if p[2] else 0.0 for p in points])
    hi = np.array([100 * max(p[2][1] - p[1], 0.0) if p[2] else 0.0 for p in points])
    ax.errorbar(x, y, yerr=[lo, hi], fmt=style, color=colour, ecolor=colour, elinewidth=0.8, capsize=4,
                linewidth=1.2, markersize=5, label=label)


def plot_metric_vs_margin(rows, comparison, primary_label, path):
    """The ranking metric and each report's error rates against the margin, with interval bars.

    Parameters
    ----------
    rows : list of dict
        The ``runs`` of a sweep result: ``margin``, ``primary`` (``value``, ``ci``) and
        ``metrics`` (``eer``, ``fnmr_at_fmr``).
    comparison : dict
        The sweep's ``comparison`` (``best``, ``confidence``); the best run gets a star.
    primary_label : str
        Name of the ranking metric, for the axis.
    path : str or Path
        PNG file to write.

    Returns
    -------
    Path

    Notes
    -----
    Left: the ranking metric with the intervals of the sweep's identity resamples. Right: each
    run's EER and FNMR at each FMR target, with the intervals of its own report.
    """
    margins = [r["margin"] for r in rows]
    best = (comparison.get("best") or {}).get("margin")
    fig, (ax_p, ax_f) = figure(10.4, 4.2, ncols=2)
    _bars(ax_p, margins, [r["primary"]["value"] for r in rows], [r["primary"]["ci"] for r in rows], COLOURS[0],
          None)
    if best is not None:
        ax_p.plot([best], [100 * comparison["best"]["value"]], marker="*", markersize=15, color=COLOURS[1],
                  linestyle="none", label=f"best: margin {compact(best)}")
        ax_p.legend(frameon=False, fontsize=8)
    ax_p.set_ylabel(f"{primary_label} (%)")
    ax_p.set_title(f"ranking metric ({level(comparison['confidence'])} identity-resample intervals)", fontsize=9)
    keys = sorted_targets({k for r in rows for k in r["metrics"]["fnmr_at_fmr"]})
    for j, key in enumerate(keys):
        entries = [r["metrics"]["fnmr_at_fmr"].get(key) or {} for r in rows]
        _bars(ax_f, margins, [e.get("fnmr") for e in entries], [e.get("ci") for e in entries],
              COLOURS[j % len(COLOURS)], f"FNMR at FMR {compact(key)}")
    _bars(ax_f, margins, [r["metrics"]["eer"] for r in rows], [None] * len(rows), "0.45", "EER", style="s--")
    ax_f.set_ylim(bottom=0)
    ax_f.set_ylabel("error rate (%)")
    ax_f.set_title("each run's report (FNMR with its report's intervals)", fontsize=9)
    if ax_f.get_legend_handles_labels()[0]:  # nothing labelled when every value is null
        ax_f.legend(frameon=False, fontsize=8)
    for ax in (ax_p, ax_f):
        _margin_axis(ax, margins)
    return _save(fig, path)


def plot_loss_curves(rows, path):
    """Loss and mined triplets per epoch of each run of a fit-head sweep.

    Parameters
    ----------
    rows : list of dict
        The ``runs`` of a fit-head sweep result: ``margin`` and ``epochs`` (per epoch ``epoch``,
        ``loss``, ``loss_after``, ``triplets``).
    path : str or Path
        PNG file to write.

    Returns
    -------
    Path
    """
    from matplotlib.ticker import MaxNLocator

    fig, (ax_l, ax_t) = figure(10.4, 4.2, ncols=2)
    for j, row in enumerate(rows):
        colour = COLOURS[j % len(COLOURS)]
        epochs = [h["epoch"] for h in row["epochs"]]
        loss = [np.nan if h["loss"] is None else h["loss"] for h in row["epochs"]]
        after = [np.nan if h["loss_after"] is None else h["loss_after"] for h in row["epochs"]]
        name = f"margin {compact(row['margin'])}"
        ax_l.plot(epochs, loss, "o-", color=colour, markersize=3, linewidth=1.2, label=name)
        ax_l.plot(epochs, after, "v--", color=colour, markersize=3, linewidth=0.9)
        ax_t.plot(epochs, [h["triplets"] for h in row["epochs"]], "o-", color=colour, markersize=3, linewidth=1.2,
                  label=name)
    ax_l.set_ylabel("hinge loss, mean over the epoch's mined triplets")
    ax_l.set_title("loss during the epoch (solid) and after it (dashed)", fontsize=9)
    ax_t.set_ylabel("triplets mined at the start of the epoch")
    ax_t.set_title("triplets in the mined regimes", fontsize=9)
    for ax in (ax_l, ax_t):
        ax.set_xlabel("epoch")
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        ax.legend(frameon=False, fontsize=8)
    return _save(fig, path)


def _save(fig, path):
    fig.tight_layout()
    path = Path(path)
    fig.savefig(path)
    return path
