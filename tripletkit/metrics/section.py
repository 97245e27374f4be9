"""The verification section of a score report, assembled from exact score counts.

Whichever entry of :mod:`.verification` computed the counts, the section has the same keys:
pair totals, AUC, EER, FNMR at each FMR target with its interval, the ROC and DET curves
(downsampled), a score histogram for plotting, the bootstrap settings and, with a group column,
FMR and FNMR of each subgroup at the global thresholds. Legal but degenerate input gives a
warning and ``None`` values with a reason (:func:`degenerate`).
"""

from __future__ import annotations

import warnings
from typing import NamedTuple

import numpy as np

from .._errors import TripletkitWarning
from .bootstrap import Resampling, settings
from .rates import equal_error_rate, fnmr_at_fmr, reading_once, resolvable, roc_points

__all__ = ["NO_BOOTSTRAP", "Request", "GroupCounts", "report_key", "degenerate", "build", "group_section",
           "thresholds", "pair_group_counts"]

#: The reason of an interval that was not asked for.
NO_BOOTSTRAP = "no bootstrap requested (bootstrap = 0)"


class Request(NamedTuple):
    """What a section holds: its FMR targets (sorted), about how many curve points, the bootstrap."""

    targets: list
    curve_points: int
    resampling: Resampling


class GroupCounts(NamedTuple):
    """Pairs with both rows in a group: totals per group, and per FMR target at its threshold."""

    genuine: np.ndarray  # genuine pairs per group
    impostor: np.ndarray  # impostor pairs per group
    genuine_below: dict  # target -> genuine pairs per group scoring below the threshold
    impostor_at_or_above: dict  # target -> impostor pairs per group scoring at or above it


def report_key(target):
    """An FMR target as a report key: 0.001 -> "0.001"."""
    return np.format_float_positional(float(target), trim="-")


def _downsample(fmr, fnmr, points):
    """Indices of at most about ``points`` curve points, even in log10(FMR) and in FNMR."""
    m = fmr.size
    if m <= points:
        return np.arange(m)
    half = points // 2
    pos = fmr[fmr > 0]
    lo = pos.min() if pos.size else 1.0
    a = np.searchsorted(fmr, np.geomspace(lo, 1.0, half), side="left")
    b = np.searchsorted(-fnmr, -np.linspace(1.0, 0.0, half), side="left")
    return np.unique(np.clip(np.concatenate([[0, m - 1], a, b]), 0, m - 1))


def _histogram(counts, bins=200):
    """Genuine and impostor score histograms over [-1, 1] for plotting (scores outside are clipped)."""
    edges = np.linspace(-1.0, 1.0, bins + 1)
    pos = np.clip(np.searchsorted(edges, counts.thresholds, side="right") - 1, 0, bins - 1)
    gen = np.bincount(pos, weights=counts.genuine, minlength=bins)
    imp = np.bincount(pos, weights=counts.impostor, minlength=bins)
    return {"edges": edges.tolist(), "genuine": [int(v) for v in gen], "impostor": [int(v) for v in imp]}


def _unresolved(reason):
    return {"fnmr": None, "threshold": None, "ci": None, "resolvable": False, "reason": reason}


def degenerate(genuine_pairs, impostor_pairs, targets, reason):
    """The section without genuine or without impostor pairs: a warning and ``None`` values."""
    warnings.warn(f"verification: {reason}", TripletkitWarning, stacklevel=3)
    return {
        "genuine_pairs": int(genuine_pairs),
        "impostor_pairs": int(impostor_pairs),
        "auc": None,
        "auc_exact": None,
        "auc_error_bound": None,
        "eer": None,
        "eer_threshold": None,
        "fnmr_at_fmr": {report_key(x): _unresolved(reason) for x in targets},
        "roc": None,
        "det": None,
        "score_histogram": None,
        "reason": reason,
    }


def _operating_points(counts, targets, intervals):
    impostor_pairs = int(counts.impostor.sum())
    points = {}
    for x in targets:
        ok, reason = resolvable(x, impostor_pairs)
        if not ok:
            points[report_key(x)] = _unresolved(reason)
            continue
        fnmr, threshold = fnmr_at_fmr(counts, x)
        interval, why = intervals.get(x, (None, NO_BOOTSTRAP))
        points[report_key(x)] = {"fnmr": fnmr, "threshold": threshold, "ci": interval, "resolvable": True,
                                 "reason": why}
    return points


def build(counts, request, intervals, identities, auc_value, auc_bound, groups=None):
    """The section (see :func:`tripletkit.metrics.verification.verify_all_pairs` for its keys).

    Parameters
    ----------
    counts : ScoreCounts
        Exact score counts of every pair (or with tied bins, whose AUC error ``auc_bound`` bounds).
    request : Request
    intervals : dict
        target -> (interval or None, reason or None), from
        :func:`tripletkit.metrics.bootstrap.interval_table`.
    identities : int
        Identities of the pairs (for the bootstrap settings).
    auc_value, auc_bound : float
        The AUC and the bound of its error (0.0: exact).
    groups : dict, optional
        :func:`group_section`.
    """
    with reading_once(counts):
        eer, eer_threshold = equal_error_rate(counts)
        points = _operating_points(counts, request.targets, intervals)
        fmr, tmr, thr = roc_points(counts)
        idx = _downsample(fmr, 1.0 - tmr, request.curve_points)
        section = {
            "genuine_pairs": int(counts.genuine.sum()),
            "impostor_pairs": int(counts.impostor.sum()),
            "auc": float(auc_value),
            "auc_exact": auc_bound == 0.0,
            "auc_error_bound": float(auc_bound),
            "eer": eer,
            "eer_threshold": eer_threshold,
            "fnmr_at_fmr": points,
            "roc": {
                "fpr": [float(v) for v in fmr[idx]],
                "tpr": [float(v) for v in tmr[idx]],
                "threshold": [float(v) for v in thr[idx]],
            },
            "det": {"fmr": [float(v) for v in fmr[idx]], "fnmr": [float(1.0 - v) for v in tmr[idx]]},
            "score_histogram": _histogram(counts),
            "bootstrap": settings(request.resampling, identities),
        }
    if groups is not None:
        section["groups"] = groups
    return section


def thresholds(counts, targets):
    """Threshold of each resolvable FMR target."""
    impostor_pairs = int(counts.impostor.sum())
    return {x: fnmr_at_fmr(counts, x)[1] for x in targets if resolvable(x, impostor_pairs)[0]}


def group_section(group_values, targets, thresholds_by_target, counts):
    """groups[value] = {genuine_pairs, impostor_pairs, at_fmr: {x: {threshold, fmr, fnmr}}}."""
    out = {}
    for gi, value in enumerate(group_values):
        gen, imp = counts.genuine[gi], counts.impostor[gi]
        entry = {"genuine_pairs": int(gen), "impostor_pairs": int(imp), "at_fmr": {}}
        for x in targets:
            t = thresholds_by_target.get(x)
            if t is None:
                entry["at_fmr"][report_key(x)] = {"threshold": None, "fmr": None, "fnmr": None}
                continue
            fmr = float(counts.impostor_at_or_above[x][gi] / imp) if imp > 0 else None
            fnmr = float(counts.genuine_below[x][gi] / gen) if gen > 0 else None
            entry["at_fmr"][report_key(x)] = {"threshold": float(t), "fmr": fmr, "fnmr": fnmr}
        out[str(value.item() if hasattr(value, "item") else value)] = entry
    return out


def pair_group_counts(genuine, genuine_group, impostor, impostor_group, groups, at):
    """:class:`GroupCounts` of explicit scores, each with its pair's group code (-1: across groups).

    ``at`` maps each resolvable FMR target to its threshold (:func:`thresholds`).
    """
    below, at_or_above = {}, {}
    for x, t in at.items():
        sel = (genuine_group >= 0) & (genuine < t)
        below[x] = np.bincount(genuine_group[sel], minlength=groups)
        sel = (impostor_group >= 0) & (impostor >= t)
        at_or_above[x] = np.bincount(impostor_group[sel], minlength=groups)
    return GroupCounts(np.bincount(genuine_group[genuine_group >= 0], minlength=groups),
                       np.bincount(impostor_group[impostor_group >= 0], minlength=groups), below, at_or_above)
