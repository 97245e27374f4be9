"""Evaluation reports: JSON, Markdown and PNG plots from the report dict of :func:`tripletkit.evaluate.score`.

Three outputs, written into a folder that the caller provides (``score`` passes the temporary
folder of :func:`tripletkit._io.atomic_path`, so nothing half-written is ever left behind):

- ``report.json``: the report dict, every value a plain JSON value (no NaN: a number that cannot
  be computed is ``null`` with a ``reason`` beside it);
- ``report.md``: the same for people (:func:`render_markdown`);
- ``roc_det.png`` (:func:`plot_roc_det`) and ``score_histogram.png``
  (:func:`plot_score_histogram`).

Plots are drawn on matplotlib ``Figure`` objects with the Agg canvas. pyplot is never imported,
so writing a report neither changes the backend of a user's interactive session nor leaves
figures open in pyplot's global registry. The plot functions take report dicts (or their
``verification`` part) so that other commands, such as a margin sweep, can overlay several runs.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

from .._errors import TripletkitError
from .._io import jsonable

__all__ = ["CAUTION", "write_report", "render_markdown", "plot_roc_det", "plot_score_histogram"]

#: The caution carried by every report (the README's "Caution on verification thresholds" says the same).
CAUTION = (
    "Verification error rates (FMR, FNMR, EER) and the thresholds that reach them hold only for the "
    "population and the capture conditions of the evaluation set they were measured on. Check the "
    "error rates of every subgroup you serve (the `group` column reports them) before relying on a "
    "threshold. When the model identifies people, deployment decisions follow local law and review "
    "— an impact assessment, a lawful basis, human review of matches — and not this tool."
)

# Our plain palette: dark blue, brick red, green, purple, orange, slate, teal, grey.
_COLOURS = ("#1f4e79", "#b03a2e", "#1e8449", "#6c3483", "#ca6f1e", "#34495e", "#138d75", "#7f8c8d")
_GENUINE = "#ca6f1e"
_IMPOSTOR = "#1f4e79"
# One marker per FMR target, in ascending order of the target; the EER gets an open square.
_TARGET_MARKERS = ("o", "^", "D", "v", "P", "X", "h")
_DPI = 110


# ---------------------------------------------------------------------------------------------
# writing
# ---------------------------------------------------------------------------------------------
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
    folder = Path(folder)
    if not folder.is_dir():
        raise TripletkitError(f"report folder {str(folder)!r} does not exist; create it first")
    report = dict(report)
    drawn = []
    ver = _verification(report)
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


# ---------------------------------------------------------------------------------------------
# Markdown
# ---------------------------------------------------------------------------------------------
def _verification(report):
    """The verification part of a full report, or ``report`` itself when it is one already."""
    if report is None:
        return {}
    if "verification" in report:
        return report.get("verification") or {}
    return report


def _num(x, digits=4):
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "n/a"
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, int):
        return f"{x:,}"
    return f"{x:.{digits}f}"


def _pct(x, digits=2):
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "n/a"
    return f"{100.0 * x:.{digits}f}%"


def _target_text(key):
    """'0.001' -> '0.1% (1 in 1,000)'."""
    x = float(key)
    share = f"{100.0 * x:.6g}%"
    if x > 0 and abs(1.0 / x - round(1.0 / x)) < 1e-6 * (1.0 / x) and round(1.0 / x) > 1:
        return f"{share} (1 in {round(1.0 / x):,})"
    return share


def _interval(ci, pct=True):
    if not ci:
        return "n/a"
    f = _pct if pct else _num
    return f"{f(ci[0])} – {f(ci[1])}"


def _table(header, rows):
    lines = ["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
    lines += ["| " + " | ".join(str(c) for c in row) + " |" for row in rows]
    return lines


def _sorted_targets(ops):
    return sorted(ops, key=float)


def render_markdown(report, *, plots_requested=True):
    """The report for people: headline numbers, FNMR at each FMR, subgroups, retrieval, clustering,
    embedding health, plots and the caution.

    Parameters
    ----------
    report : dict
        A report dict of :func:`tripletkit.evaluate.score` (missing parts are shown as such).
    plots_requested : bool, default True
        Only changes the wording when ``report["plots"]`` is empty.

    Returns
    -------
    str
        Markdown text ending with a newline.
    """
    inp = report.get("input") or {}
    ver = _verification(report)
    ret = report.get("retrieval") or {}
    clu = report.get("clustering")
    hea = report.get("health") or {}
    cfg = report.get("config") or {}
    ops = ver.get("fnmr_at_fmr") or {}
    out = ["# Evaluation report", ""]
    src = inp.get("path") or "(in-memory table)"
    out.append(
        f"Table `{src}`: {_num(inp.get('rows'))} rows, {_num(inp.get('identities'))} identities, "
        f"dimension {_num(inp.get('dim'))}; fingerprint `{inp.get('fingerprint')}`."
    )
    if inp.get("dropped_rows"):
        out.append(f"{inp['dropped_rows']:,} invalid rows (NaN/Inf or zero norm) were dropped before scoring.")
    mode = f"the pair list `{inp['pair_list']}`" if inp.get("pair_list") else "every pair of distinct rows"
    out.append(
        f"Verification pairs: {mode}; {_num(ver.get('genuine_pairs'))} genuine (same identity) and "
        f"{_num(ver.get('impostor_pairs'))} impostor pairs. Scores are cosine similarities of the "
        "unit-length embeddings; a pair is accepted when its score is at or above the threshold."
    )
    out.append(
        f"tripletkit {report.get('tripletkit_version', '?')}, {_num(report.get('seconds'), 1)} s."
    )
    warns = report.get("warnings") or []
    if warns:
        out += ["", "**Warnings**", ""] + [f"- {w}" for w in warns]

    # headline
    out += ["", "## Headline", ""]
    rows = [["EER", f"{_pct(ver.get('eer'))} at threshold {_num(ver.get('eer_threshold'))}"
             if ver.get("eer") is not None else f"n/a ({ver.get('reason', 'not computed')})"],
            ["AUC", _num(ver.get("auc")) + ("" if ver.get("auc_exact") in (None, True)
                                             else f" (within {ver.get('auc_error_bound'):.2g})")]]
    for key in _sorted_targets(ops):
        e = ops[key] or {}
        if e.get("fnmr") is None:
            rows.append([f"FNMR at FMR {_target_text(key)}", "not resolvable"])
        else:
            rows.append([f"FNMR at FMR {_target_text(key)}",
                         _pct(e["fnmr"]) + (f" ({_interval(e.get('ci'))})" if e.get("ci") else "")])
    rk = ret.get("recall_at_k") or {}
    for k in sorted(rk, key=int)[:1]:
        rows.append([f"Recall@{k}", _pct(rk[k])])
    if "map_at_r" in ret:
        rows.append(["MAP@R", _num(ret.get("map_at_r"))])
    out += _table(["metric", "value"], rows)

    # FNMR at FMR
    level = (ver.get("bootstrap") or {}).get("confidence", cfg.get("confidence"))
    ci_head = f"{level:.0%} interval" if isinstance(level, (int, float)) else "interval"
    out += ["", "## FNMR at each FMR target", ""]
    out.append(
        "FNMR at a target is the lowest FNMR over thresholds whose FMR is at most the target "
        "(terms of ISO/IEC 19795-1). Intervals resample identities, not pairs (subject-level "
        "bootstrap), because pairs that share an identity are not independent."
    )
    out.append("")
    rows = []
    for key in _sorted_targets(ops):
        e = ops[key] or {}
        note = e.get("reason") or ""
        rows.append([_target_text(key), _pct(e.get("fnmr")), _interval(e.get("ci")),
                     _num(e.get("threshold")), note])
    out += _table(["FMR target", "FNMR", ci_head, "threshold (cosine)", "note"], rows) if rows else ["(none)"]

    groups = ver.get("groups")
    if groups:
        keys = _sorted_targets(ops)
        out += ["", "## Subgroups", ""]
        out.append(
            "FMR and FNMR of the pairs whose two rows are both in the group, at the global threshold "
            "of each FMR target (differential error rates). A group whose FMR is well above the "
            "target gets more false matches than the global figure suggests."
        )
        out.append("")
        header = ["group", "genuine pairs", "impostor pairs"]
        for key in keys:
            header += [f"FMR at {float(key):g}", f"FNMR at {float(key):g}"]
        rows = []
        for name in sorted(groups):
            g = groups[name] or {}
            row = [name, _num(g.get("genuine_pairs")), _num(g.get("impostor_pairs"))]
            for key in keys:
                a = (g.get("at_fmr") or {}).get(key) or {}
                row += [_pct(a.get("fmr"), 3), _pct(a.get("fnmr"))]
            rows.append(row)
        out += _table(header, rows)

    # retrieval
    out += ["", "## Retrieval", ""]
    if ret.get("reason") and not rk:
        out.append(f"Not computed: {ret['reason']}.")
    else:
        out.append("Each row queries all other rows (it is left out of its own gallery), nearest first.")
        out.append("")
        rows = [[f"Recall@{k}", _pct(rk[k])] for k in sorted(rk, key=int)]
        rows += [["R-precision", _num(ret.get("r_precision"))], ["MAP@R", _num(ret.get("map_at_r"))]]
        out += _table(["metric", "value"], rows)
        if ret.get("queries") is not None:
            out += ["", f"Queries: {_num(ret.get('queries'))} rows with at least one other row of their identity."]

    # clustering
    out += ["", "## Clustering", ""]
    if clu is None:
        out.append("Not run (clustering = false).")
    elif clu.get("purity") is None:
        out.append(f"Not computed: {clu.get('reason', 'no reason given')}.")
    else:
        out.append(f"k-means with k = {_num(clu.get('clusters'))} (the number of identities), scored against the labels.")
        out.append("")
        out += _table(["metric", "value"], [["purity", _num(clu.get("purity"))], ["NMI", _num(clu.get("nmi"))],
                                            ["ARI", _num(clu.get("ari"))]])

    # health
    out += ["", "## Embedding health", ""]
    out += _table(["measure", "value"], [
        ["mean impostor cosine", _num(hea.get("mean_impostor_cosine"))],
        ["effective dimension", _num(hea.get("effective_dimension"), 2) + f" of {_num(inp.get('dim'))}"],
        ["collapsed", _num(hea.get("collapsed")) if hea.get("collapsed") is not None else "n/a"],
    ])
    if hea.get("collapsed"):
        out += ["", "**The embeddings look collapsed**" + (f": {hea['rule']}" if hea.get("rule") else "")
                + ". Error rates of a collapsed model say little; check the training run first."]
    elif hea.get("rule"):
        out += ["", f"Collapse rule: {hea['rule']}."]

    # plots
    out += ["", "## Plots", ""]
    plots = report.get("plots") or []
    if plots:
        for p in plots:
            out += [f"![{p['title']}]({p['file']})", ""]
        out.pop()
    elif not plots_requested:
        out.append("Not drawn (plots = false).")
    else:
        out.append(f"Not drawn: {ver.get('reason') or 'no verification curves'}.")

    out += ["", "## Caution", "", report.get("caution") or CAUTION, ""]
    return "\n".join(out)


# ---------------------------------------------------------------------------------------------
# plots
# ---------------------------------------------------------------------------------------------
def _figure(width, height, ncols=1):
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
    for key in _sorted_targets(ops):
        e = ops[key] or {}
        if e.get("fnmr") is not None:
            out.append((key, float(e.get("fmr", float(key))), float(e["fnmr"])))
    return out


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
    fig, (ax_roc, ax_det) = _figure(11.0, 4.6, ncols=2)
    single = len(curves) == 1
    all_keys = sorted({k for _, r in curves for k in (_verification(r).get("fnmr_at_fmr") or {})}, key=float)
    marker_of = {k: _TARGET_MARKERS[i % len(_TARGET_MARKERS)] for i, k in enumerate(all_keys)}
    lo_fmr = 1.0
    for i, (label, report) in enumerate(curves):
        ver = _verification(report)
        colour = _COLOURS[i % len(_COLOURS)]
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
        for key, fmr, fnmr in _operating_points(ver):
            m = marker_of[key]
            x = max(fmr, 1e-12)
            ax_roc.plot([x], [100 * (1 - fnmr)], marker=m, color=colour, markersize=6, linestyle="none")
            if fnmr > 0:
                ax_det.plot([x], [100 * fnmr], marker=m, color=colour, markersize=6, linestyle="none")
            if single:
                text = f"FMR {float(key):g}: FNMR {100 * fnmr:.1f}%"
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
            if single:
                text = f"EER {100 * eer:.1f}%"
                ax_roc.annotate(text, (max(eer, 1e-12), 100 * (1 - eer)), xytext=(6, -12),
                                textcoords="offset points", fontsize=7.5, color="0.2")
                if eer > 0:
                    ax_det.annotate(text, (eer, 100 * eer), xytext=(6, 4), textcoords="offset points",
                                    fontsize=7.5, color="0.2")
    # legend entries for the marker shapes, in neutral grey
    for key in all_keys:
        ax_det.plot([], [], marker=marker_of[key], color="0.35", linestyle="none", label=f"at FMR {float(key):g}")
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
    if any(lbl is not None for lbl, _ in curves) or not all(_verification(r).get("roc") for _, r in curves):
        ax_roc.legend(frameon=False, fontsize=7.5, loc="lower right")
    ax_det.legend(frameon=False, fontsize=7.5, loc="lower left")
    if title:
        fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    path = Path(path)
    fig.savefig(path)
    return path


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
    import numpy as np

    ver = _verification(report)
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
    fig, axes = _figure(11.0, 4.2, ncols=2)
    ops = _operating_points(ver)
    thresholds = {k: (ver["fnmr_at_fmr"][k] or {}).get("threshold") for k, _, _ in ops}
    for ax, log in zip(axes, (False, True)):
        ax.stairs(ishare, edges, fill=True, color=_IMPOSTOR, alpha=0.35,
                  label=f"impostor pairs ({int(imp.sum()):,})")
        ax.stairs(ishare, edges, color=_IMPOSTOR, linewidth=1.0)
        ax.stairs(gshare, edges, fill=True, color=_GENUINE, alpha=0.35,
                  label=f"genuine pairs ({int(gen.sum()):,})")
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
            ax.text(t, 0.98, f"FMR {float(key):g} ", transform=ax.get_xaxis_transform(), rotation=90,
                    fontsize=7, color="0.2", ha="right", va="top",
                    bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.7, "pad": 0.5})
        if ver.get("eer_threshold") is not None:
            ax.axvline(ver["eer_threshold"], color="#b03a2e", linestyle=":", linewidth=1.0, label="EER threshold")
    axes[0].set_ylabel(f"share of the class's pairs per bin of {width:g} (%)", fontsize=8.5)
    axes[1].set_ylabel("same, log scale (%)", fontsize=8.5)
    axes[0].set_title("score distributions (dashed: threshold of each FMR target)", fontsize=9.5)
    axes[1].set_title("the tails, where low-FMR thresholds sit", fontsize=9.5)
    axes[0].legend(frameon=False, fontsize=7.5, loc="upper left")
    if title:
        fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    path = Path(path)
    fig.savefig(path)
    return path
