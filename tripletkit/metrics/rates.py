"""Verification error rates from score counts: the one counting core of ROC, DET, EER, FNMR at FMR and AUC.

Every verification result comes from a table of *score counts* (:class:`ScoreCounts`: distinct
score values ascending, with the number of genuine and of impostor pairs at each) and the one
function that turns such a table into error rates, :func:`error_rates`. A pair is accepted at
threshold ``t`` when its score is ``>= t``: ``FMR(t)`` is the share of impostor pairs scoring
``>= t``, ``FNMR(t)`` the share of genuine pairs scoring ``< t`` (terms of ISO/IEC 19795-1 [1]_).
The thresholds are the distinct observed scores plus one value just above the top score, where
every pair is rejected.

An FMR target ``x`` is *resolvable* when there are at least ``3/x`` impostor pairs: with fewer,
even zero observed false matches leave a 95% upper bound above ``x`` (the "rule of 3", common
practice in biometric testing, no single source).

References
----------
.. [1] ISO/IEC 19795-1:2006, Information technology -- Biometric performance testing and
   reporting -- Part 1: Principles and framework.
"""

from __future__ import annotations

import contextlib
import math
import threading
from typing import NamedTuple

import numpy as np

from .._errors import TripletkitError
from .._validate import as_scores

__all__ = [
    "ScoreCounts",
    "count_scores",
    "error_rates",
    "roc_points",
    "det_points",
    "equal_error_rate",
    "fnmr_at_fmr",
    "auc",
    "resolvable",
    "max_false_matches",
    "reading_once",
]


class ScoreCounts(NamedTuple):
    """Distinct score values in ascending order with the genuine and impostor count at each.

    Attributes
    ----------
    thresholds : ndarray of float64, shape (m,)
        Distinct score values, strictly ascending.
    genuine : ndarray of int64, shape (m,)
        Number of genuine pairs scoring exactly ``thresholds[j]``.
    impostor : ndarray of int64, shape (m,)
        Number of impostor pairs scoring exactly ``thresholds[j]``.
    """

    thresholds: np.ndarray
    genuine: np.ndarray
    impostor: np.ndarray


def count_scores(genuine, impostor):
    """Count genuine and impostor scores at each distinct score value.

    Parameters
    ----------
    genuine : array-like of shape (g,)
        Scores of genuine (same identity) pairs; higher means more alike.
    impostor : array-like of shape (i,)
        Scores of impostor (different identity) pairs.

    Returns
    -------
    ScoreCounts
        Exact: ties between and within the two sets are kept as ties.

    Examples
    --------
    >>> c = count_scores([0.9, 0.5], [0.5, 0.1])
    >>> c.thresholds.tolist(), c.genuine.tolist(), c.impostor.tolist()
    ([0.1, 0.5, 0.9], [0, 1, 1], [1, 1, 0])
    """
    return _count_exact(as_scores(genuine, "genuine scores"), as_scores(impostor, "impostor scores"))


def _count_exact(genuine, impostor):
    """:func:`count_scores` of float64 arrays already checked."""
    values, inverse = np.unique(np.concatenate([genuine, impostor]), return_inverse=True)
    inverse = inverse.reshape(-1)
    m = values.size
    gen = np.bincount(inverse[: genuine.size], minlength=m).astype(np.int64)
    imp = np.bincount(inverse[genuine.size :], minlength=m).astype(np.int64)
    return ScoreCounts(values.astype(np.float64), gen, imp)


def _above(score):
    """A threshold just above ``score``: nothing scores at or above it."""
    return float(np.nextafter(np.float64(score), np.inf))


# While a report reads one ScoreCounts many ways, its error rates are computed once (see _memo).
_MEMO = threading.local()


@contextlib.contextmanager
def reading_once(counts):
    """Within the ``with`` block, the error rates of ``counts`` are computed once, however often asked."""
    _MEMO.counts, _MEMO.values = counts, {}
    try:
        yield
    finally:
        _MEMO.counts = _MEMO.values = None


def _memo(name, counts, compute):
    if getattr(_MEMO, "counts", None) is not counts:
        return compute()
    if name not in _MEMO.values:
        _MEMO.values[name] = compute()
    return _MEMO.values[name]


def _rate_counts(counts):
    """Integer form of :func:`error_rates`: thresholds, impostors >= t, genuines < t (m+1 points)."""
    return _memo("rate_counts", counts, lambda: _compute_rate_counts(counts))


def _compute_rate_counts(counts):
    thr, gen, imp = counts
    top = _above(thr[-1]) if thr.size else 0.0
    thresholds = np.append(thr, top)
    imp_ge = np.append(np.cumsum(imp[::-1])[::-1], 0).astype(np.int64)
    gen_lt = np.concatenate([[0], np.cumsum(gen)]).astype(np.int64)
    return thresholds, imp_ge, gen_lt


def _totals(counts):
    genuine = int(counts.genuine.sum())
    impostor = int(counts.impostor.sum())
    if genuine == 0 or impostor == 0:
        raise TripletkitError(
            f"score counts hold {genuine} genuine and {impostor} impostor pairs; error rates need at least one of each"
        )
    return genuine, impostor


def error_rates(counts):
    """Turn score counts into FMR and FNMR at every threshold.

    Parameters
    ----------
    counts : ScoreCounts

    Returns
    -------
    thresholds : ndarray of float64, shape (m + 1,)
        The distinct scores ascending, then one value just above the top score (where every pair
        is rejected).
    fmr : ndarray of float64, shape (m + 1,)
        Share of impostor pairs with score ``>= threshold``.
    fnmr : ndarray of float64, shape (m + 1,)
        Share of genuine pairs with score ``< threshold``.
    """
    def compute():
        genuine, impostor = _totals(counts)
        thresholds, imp_ge, gen_lt = _rate_counts(counts)
        return thresholds, imp_ge / impostor, gen_lt / genuine

    return _memo("error_rates", counts, compute)


def roc_points(counts):
    """ROC curve: (FMR, 1 - FNMR, threshold) with the threshold falling, FMR rising.

    Returns
    -------
    fmr, tmr, thresholds : ndarray of float64, shape (m + 1,)
        ``tmr`` is the true match rate ``1 - FNMR``; the first point is the all-reject threshold.
    """
    t, fmr, fnmr = error_rates(counts)
    return fmr[::-1].copy(), 1.0 - fnmr[::-1], t[::-1].copy()


def det_points(counts):
    """DET curve: (FMR, FNMR) with FMR rising (plot both on probit or log axes)."""
    _, fmr, fnmr = error_rates(counts)
    return fmr[::-1].copy(), fnmr[::-1].copy()


def max_false_matches(target, impostor_pairs):
    """Largest false-match count ``c`` with ``c / impostor_pairs <= target`` in floating point.

    The comparison is the one of floating-point FMRs (as scikit-learn's ROC compares them), so
    an operating point read off this count equals one read off the rates.
    """
    c = min(impostor_pairs, max(0, int(math.floor(target * impostor_pairs))))
    while c + 1 <= impostor_pairs and (c + 1) / impostor_pairs <= target:
        c += 1
    while c > 0 and c / impostor_pairs > target:
        c -= 1
    return c


def fnmr_at_fmr(counts, target):
    """Lowest FNMR over thresholds whose FMR is at most ``target``.

    Parameters
    ----------
    counts : ScoreCounts
    target : float
        FMR target in (0, 1].

    Returns
    -------
    fnmr : float
    threshold : float
        The smallest threshold with ``FMR <= target`` (the one giving the lowest FNMR).
    """
    genuine, impostor = _totals(counts)
    thresholds, imp_ge, gen_lt = _rate_counts(counts)
    # imp_ge falls with the threshold, so the allowed thresholds are a suffix; take its start.
    j = int(np.argmax(imp_ge <= max_false_matches(target, impostor)))
    return float(gen_lt[j] / genuine), float(thresholds[j])


def equal_error_rate(counts):
    """Equal error rate and its threshold, by linear interpolation at the sign change of FMR - FNMR.

    Returns
    -------
    eer : float
    threshold : float

    Notes
    -----
    With thresholds ``t_1 < ... < t_{m+1}`` (:func:`error_rates`), ``D = FMR - FNMR`` is
    non-increasing from 1 to -1. ``j`` is the last index with ``D_j >= 0``; with
    ``lam = D_j / (D_j - D_{j+1})`` the EER is ``FMR_j + lam * (FMR_{j+1} - FMR_j)`` (equal to the
    same expression in FNMR) and the threshold ``t_j + lam * (t_{j+1} - t_j)``.
    """
    t, fmr, fnmr = error_rates(counts)
    d = fmr - fnmr
    j = int(np.flatnonzero(d >= 0)[-1])
    if j == d.size - 1:  # cannot happen (D ends at -1); kept for clarity of the invariant
        return float(fmr[j]), float(t[j])
    lam = d[j] / (d[j] - d[j + 1])
    return float(fmr[j] + lam * (fmr[j + 1] - fmr[j])), float(t[j] + lam * (t[j + 1] - t[j]))


def auc(counts):
    """Area under the ROC: share of (genuine, impostor) pairs ranked correctly, ties counted 1/2.

    Computed in integers (exact) while ``2 * genuine * impostor`` fits in int64, else in float64.
    This is the Mann-Whitney statistic [1]_, equal to the area under the empirical ROC [2]_.

    References
    ----------
    .. [1] H. B. Mann and D. R. Whitney, "On a test of whether one of two random variables is
       stochastically larger than the other", Annals of Mathematical Statistics 18(1), 1947.
    .. [2] D. J. Hand and R. J. Till, "A simple generalisation of the area under the ROC curve for
       multiple class classification problems", Machine Learning 45, 2001.
    """
    genuine, impostor = _totals(counts)
    _, gen, imp = counts
    imp_below = np.cumsum(imp) - imp
    if 2 * genuine * impostor < 2**62:
        twice_u = int(np.dot(gen, 2 * imp_below + imp))
        return twice_u / (2 * genuine * impostor)
    u = np.dot(gen.astype(np.float64), imp_below + 0.5 * imp)
    return float(u / (genuine * impostor))


def resolvable(target, impostor_pairs):
    """Whether an FMR target can be resolved with ``impostor_pairs`` pairs (the rule of 3).

    Returns
    -------
    ok : bool
    reason : str or None
        Why not, when not.
    """
    if impostor_pairs < 3.0 / target:
        return False, (
            f"{impostor_pairs} impostor pairs are fewer than 3/FMR = {3.0 / target:.0f} (rule of 3); "
            "this FMR target cannot be resolved on this set"
        )
    return True, None
