"""Verification error rates: ROC, DET, EER, FNMR at fixed FMR, AUC, with subject-level intervals.

One mechanism, many thin users. Every result in this module comes from a table of *score counts*
(:class:`ScoreCounts`: distinct score values in ascending order with the number of genuine and of
impostor pairs at each value) and the one function that turns such a table into error rates,
:func:`error_rates`. The ROC and DET curves, the equal error rate, FNMR at a target FMR and the AUC
are read off that table by small functions.

Three ways to build the table:

* :func:`verify_all_pairs` scores every pair of distinct rows of an embedding matrix. The pairs are
  never listed: a block of rows is multiplied with all later rows (upper triangle, ``i < j``) and the
  products are counted into a fixed histogram of ``2**19`` bins of width ``2**-18`` over [-1, 1].
  The exact scores of the few bins that hold an operating point (each FMR target, the EER
  crossing) are then listed, from the highest impostor scores kept during the counting pass
  when those reach low enough, else by a second pass over the same blocks; so the operating
  points are exactly what every score would give. Scores are the exact cosines of
  :mod:`tripletkit._exact`, so no number depends on block shapes, threads, BLAS or process.
  Worker threads (one per CPU) compute and count blocks side by side, each product with one BLAS
  thread. Memory is O(n*d + workers*block*n).
* :func:`verify_pairs` scores a fixed protocol: a list of (left, right) row pairs.
* :func:`verify_scores` takes genuine and impostor scores directly.

Definitions (terms of ISO/IEC 19795-1:2006, "Biometric performance testing and reporting"): a
pair is accepted at threshold ``t`` when its score is ``>= t``.

* ``FMR(t)``: share of impostor pairs with score ``>= t``;
* ``FNMR(t)``: share of genuine pairs with score ``< t``;
* ``fnmr_at_fmr[x]``: the lowest FNMR over the thresholds ``t`` (the distinct observed scores, plus
  one value just above the top score) with ``FMR(t) <= x``, reported with that ``t``;
* EER: with thresholds ``t_1 < t_2 < ...`` as above, ``D(t) = FMR(t) - FNMR(t)`` falls from 1 to -1.
  Take the last threshold ``t_j`` with ``D(t_j) >= 0`` and the next one ``t_{j+1}`` (``D < 0``);
  the EER is where the straight line between the points ``(FMR, FNMR)`` at ``t_j`` and ``t_{j+1}``
  meets ``FMR = FNMR``; the EER threshold is interpolated between ``t_j`` and ``t_{j+1}`` with the
  same weight.
* AUC: the Mann-Whitney statistic, the share of (genuine, impostor) pairs of pairs with the genuine
  score higher, ties counted 1/2 (equal to the area under the empirical ROC).

An FMR target ``x`` is *not resolvable* when there are fewer than ``3/x`` impostor pairs: with
fewer, even zero observed false matches leaves a 95% upper bound above ``x`` (the "rule of 3",
common practice in biometric testing, no single source).

Confidence intervals come from a subject-level bootstrap (pairs sharing an identity are not
independent): see :func:`verify_all_pairs` for exactly what is computed.

References
----------
.. [1] ISO/IEC 19795-1:2006, Information technology -- Biometric performance testing and
   reporting -- Part 1: Principles and framework.
.. [2] D. J. Hand and R. J. Till, "A simple generalisation of the area under the ROC curve for
   multiple class classification problems", Machine Learning 45, 2001 (AUC as the Mann-Whitney
   statistic).
.. [3] R. M. Bolle, N. K. Ratha and S. Pankanti, "Error analysis of pattern recognition systems --
   the subsets bootstrap", Computer Vision and Image Understanding 93(1), 2004 (resampling
   identities rather than pairs).
"""

from __future__ import annotations

import contextlib
import contextvars
import copy
import math
import os
import threading
import warnings
from concurrent.futures import FIRST_EXCEPTION, ThreadPoolExecutor, wait
from typing import NamedTuple

import faiss
import numpy as np
from threadpoolctl import threadpool_limits

from .._errors import TripletkitError, TripletkitWarning
from .._exact import pair_cosines, snap
from .._validate import as_codes, as_embeddings, check_same_length

__all__ = [
    "ScoreCounts",
    "count_scores",
    "error_rates",
    "roc_points",
    "det_points",
    "equal_error_rate",
    "fnmr_at_fmr",
    "auc",
    "verify_all_pairs",
    "verify_pairs",
    "verify_scores",
    "block_runner",
    "DEFAULT_FMR_TARGETS",
]

DEFAULT_FMR_TARGETS = (1e-4, 1e-3, 1e-2)

# ---------------------------------------------------------------------------------------------
# The shared mechanism: score counts -> error rates
# ---------------------------------------------------------------------------------------------


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


def _as_scores(x, name):
    arr = np.asarray(x)
    if arr.ndim != 1:
        raise TripletkitError(f"{name} must be a 1-D array of scores, got shape {arr.shape}")
    if arr.size and (not np.issubdtype(arr.dtype, np.number) or np.issubdtype(arr.dtype, np.complexfloating)):
        raise TripletkitError(f"{name} must hold real numbers, got dtype {arr.dtype}")
    arr = arr.astype(np.float64)
    bad = ~np.isfinite(arr)
    if bad.any():
        raise TripletkitError(
            f"{name} has {int(bad.sum())} NaN or Inf scores (first positions: {np.flatnonzero(bad)[:5].tolist()}); "
            "remove or repair them"
        )
    return arr


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
    g = _as_scores(genuine, "genuine scores")
    i = _as_scores(impostor, "impostor scores")
    return _count_exact(g, i)


def _count_exact(g, i):
    values, inverse = np.unique(np.concatenate([g, i]), return_inverse=True)
    inverse = inverse.reshape(-1)
    m = values.size
    gen = np.bincount(inverse[: g.size], minlength=m).astype(np.int64)
    imp = np.bincount(inverse[g.size :], minlength=m).astype(np.int64)
    return ScoreCounts(values.astype(np.float64), gen, imp)


def _above(t):
    """A threshold just above score ``t``: nothing scores at or above it."""
    return float(np.nextafter(np.float64(t), np.inf))


# While _assemble reads one ScoreCounts many ways, its error rates are computed once (see _memo).
_MEMO = threading.local()


@contextlib.contextmanager
def _reading(counts):
    """Within the block, :func:`_rate_counts` and :func:`error_rates` of ``counts`` are computed once."""
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
    g = int(counts.genuine.sum())
    i = int(counts.impostor.sum())
    if g == 0 or i == 0:
        raise TripletkitError(
            f"score counts hold {g} genuine and {i} impostor pairs; error rates need at least one of each"
        )
    return g, i


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
        g, i = _totals(counts)
        thresholds, imp_ge, gen_lt = _rate_counts(counts)
        return thresholds, imp_ge / i, gen_lt / g

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


def _max_impostors(target, i):
    """Largest false-match count ``c`` with ``c / i <= target`` in floating point (as sklearn compares)."""
    c = min(i, max(0, int(math.floor(target * i))))
    while c + 1 <= i and (c + 1) / i <= target:
        c += 1
    while c > 0 and c / i > target:
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
    g, i = _totals(counts)
    thresholds, imp_ge, gen_lt = _rate_counts(counts)
    # imp_ge falls with the threshold, so the allowed thresholds are a suffix; take its start.
    j = int(np.argmax(imp_ge <= _max_impostors(target, i)))
    return float(gen_lt[j] / g), float(thresholds[j])


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

    References
    ----------
    .. [1] H. B. Mann and D. R. Whitney, "On a test of whether one of two random variables is
       stochastically larger than the other", Annals of Mathematical Statistics 18(1), 1947.
    """
    g, i = _totals(counts)
    _, gen, imp = counts
    imp_below = np.cumsum(imp) - imp
    if 2 * g * i < 2**62:
        twice_u = int(np.dot(gen, 2 * imp_below + imp))
        return twice_u / (2 * g * i)
    u = np.dot(gen.astype(np.float64), imp_below + 0.5 * imp)
    return float(u / (g * i))


# ---------------------------------------------------------------------------------------------
# Input checks shared by the public entries
# ---------------------------------------------------------------------------------------------


def _check_targets(fmr_targets):
    try:
        targets = [float(x) for x in fmr_targets]
    except (TypeError, ValueError):
        raise TripletkitError(f"fmr_targets must be a list of numbers, got {fmr_targets!r}") from None
    bad = [x for x in targets if not (0.0 < x <= 1.0) or not math.isfinite(x)]
    if bad:
        raise TripletkitError(f"fmr_targets must lie in (0, 1], got {bad}; give e.g. [0.0001, 0.001, 0.01]")
    if not targets:
        raise TripletkitError("fmr_targets is empty; give at least one FMR target, e.g. [0.001]")
    return sorted(set(targets))


def _check_common(bootstrap, confidence, curve_points):
    if isinstance(bootstrap, bool) or not isinstance(bootstrap, (int, np.integer)) or bootstrap < 0:
        raise TripletkitError(f"bootstrap must be a whole number of replicates >= 0, got {bootstrap!r}")
    if not (0.0 < float(confidence) < 1.0):
        raise TripletkitError(f"confidence must lie in (0, 1), got {confidence!r}; e.g. 0.95")
    if isinstance(curve_points, bool) or not isinstance(curve_points, (int, np.integer)) or curve_points < 8:
        raise TripletkitError(f"curve_points must be a whole number >= 8, got {curve_points!r}")


def _check_workers(workers):
    if isinstance(workers, bool) or not isinstance(workers, (int, np.integer)) or workers < 1:
        raise TripletkitError(f"workers must be a whole number >= 1, got {workers!r}")
    return int(workers)


def _check_unit(x, name):
    norms = np.sqrt(np.einsum("ij,ij->i", x, x, dtype=np.float64))
    bad = np.abs(norms - 1.0) > 1e-3
    if bad.any():
        first = np.flatnonzero(bad)[:5].tolist()
        raise TripletkitError(
            f"{name} has {int(bad.sum())} rows whose L2 norm is not 1 (first row positions: {first}); "
            "L2-normalise the embeddings first (scores are cosine similarities of unit vectors)"
        )


def _key(x):
    """Format an FMR target as a report key: 0.001 -> "0.001"."""
    return np.format_float_positional(float(x), trim="-")


def _check_groups(groups, n):
    if groups is None:
        return None, None
    codes, values = as_codes(groups, n=n, name="groups")
    return codes, values


# ---------------------------------------------------------------------------------------------
# Subject-level bootstrap, shared by the materialised and the blocked paths
# ---------------------------------------------------------------------------------------------


def _window_factor(identities):
    """How far (a factor on FMR) the bootstrap grid reaches either side of each target.

    A replicate's FMR at the full-sample threshold moves by a relative amount that shrinks like
    ``1 / sqrt(k)`` for k identities (first-order expansion of the resampled count), with a
    constant set by how unevenly the high-scoring impostors spread over identities. We use
    ``exp(20 / sqrt(k))`` kept between 1.25 and 8: in the simulation of the tests (100
    identities) a factor of 4 still left about 0.5% of replicates at an end of the grid and 8
    none. Replicates whose threshold falls at an end of the grid are counted and reported.
    """
    return float(min(8.0, max(1.25, math.exp(20.0 / math.sqrt(max(identities, 1))))))


def _boundaries(imp_ge, n_imp, targets, per_decade, factor, max_levels=None):
    """Indices into ascending candidate thresholds used as the bootstrap's threshold grid.

    ``imp_ge[j]`` is the number of impostors at or above candidate ``j`` (non-increasing). The grid
    holds, for FMR levels spaced evenly in log from ``min(targets) / factor`` to
    ``factor * max(targets)`` (``per_decade`` per decade, at most ``max_levels``) and the
    targets themselves, the first candidate whose FMR is at most the level.
    """
    lo = max(min(targets) / factor, 0.5 / n_imp)
    hi = max(lo, min(1.0, factor * max(targets)))
    levels = int(math.ceil(per_decade * math.log10(hi / lo))) + 1
    if max_levels is not None:
        levels = max(2, min(levels, max_levels))
    grid = np.concatenate([np.geomspace(lo, hi, levels), targets])
    idx = np.searchsorted(-imp_ge, -grid * n_imp, side="left")
    idx = np.clip(idx, 0, imp_ge.size - 1)
    return np.unique(idx)


def _bootstrap_fnmr(imp_ge_c, imp_ge, imp_c, n_imp, gen_lt_c, gen_c, targets, replicates, confidence, seed):
    """Percentile intervals of FNMR at each FMR target from identity-resampled replicates.

    Parameters
    ----------
    imp_ge_c : (k, w) impostor pairs involving identity c that score at or above grid threshold j
        (a pair counts for both of its identities).
    imp_ge : (w,) all impostor pairs at or above grid threshold j.
    imp_c : (k,) impostor pairs involving identity c; ``n_imp`` all impostor pairs.
    gen_lt_c : (k, w) genuine pairs of identity c scoring below grid threshold j; ``gen_c`` (k,) all.

    Each replicate draws k identities with replacement (weights ``w_c`` = multiplicities). Genuine
    counts are exact: identity c's pairs count ``w_c`` times; pairs between two copies of the same
    identity are not formed. Impostor counts use the first-order expansion of the exact
    ``sum_{c<c'} w_c w_c' N_cc'`` around ``w = 1``: ``sum_c w_c N_c - N``, which needs only the
    per-identity marginals ``N_c`` (the exact form needs every identity pair).
    """
    k, _ = imp_ge_c.shape
    rng = np.random.default_rng(seed)
    imp_ge_c = imp_ge_c.astype(np.float64)
    gen_lt_c = gen_lt_c.astype(np.float64)
    imp_c = imp_c.astype(np.float64)
    gen_c = gen_c.astype(np.float64)
    out = {x: [] for x in targets}
    edge = {x: 0 for x in targets}
    p = np.full(k, 1.0 / k)
    chunk = max(1, min(replicates, int(2**22 // max(k, 1))))
    done = 0
    while done < replicates:
        r = min(chunk, replicates - done)
        w = rng.multinomial(k, p, size=r).astype(np.float64)
        done += r
        num = w @ imp_ge_c - imp_ge[None, :]
        den = w @ imp_c - n_imp
        gden = w @ gen_c
        gnum = w @ gen_lt_c
        ok = (den > 0) & (gden > 0)
        fmr = np.where(ok[:, None], num / np.where(den > 0, den, 1.0)[:, None], np.inf)
        for x in targets:
            allowed = fmr <= x
            has = allowed.any(axis=1)
            j = np.where(has, np.argmax(allowed, axis=1), fmr.shape[1] - 1)
            # a replicate whose threshold sits at an end of the grid may lie beyond it
            edge[x] += int(np.sum(ok & (~has | (j == 0))))
            f = gnum[np.arange(r), j] / np.where(gden > 0, gden, 1.0)
            out[x].append(f[ok])
    alpha = 1.0 - confidence
    res = {}
    for x in targets:
        vals = np.concatenate(out[x]) if out[x] else np.empty(0)
        if vals.size < 2:
            res[x] = (None, 0, edge[x])
            continue
        lo, hi = np.percentile(vals, [100 * alpha / 2, 100 * (1 - alpha / 2)])
        res[x] = ([float(lo), float(hi)], int(vals.size), edge[x])
    return res


def _per_identity_cells(cell, ia, ib, k, w):
    """(k, w) grid-cell counts per identity; a pair counts for both identities; cell -1 is dropped."""
    keep = cell >= 0
    acc = np.bincount(ia[keep] * w + cell[keep], minlength=k * w)
    acc += np.bincount(ib[keep] * w + cell[keep], minlength=k * w)
    return acc.reshape(k, w).astype(np.int64)


def _ge_from_cells(cells):
    """(k, w) cell counts (cell j = [grid_j, grid_{j+1}), last cell open) -> counts >= grid_j."""
    return np.cumsum(cells[:, ::-1], axis=1)[:, ::-1]


def _lt_from_cells(ident, cell, k, w):
    """(k, w) genuine counts per identity below grid_j, from each genuine pair's cell (-1 = below)."""
    c = np.bincount(ident * (w + 1) + (cell + 1), minlength=k * (w + 1)).reshape(k, w + 1)
    return np.cumsum(c, axis=1)[:, :-1].astype(np.int64)


# ---------------------------------------------------------------------------------------------
# Report assembly
# ---------------------------------------------------------------------------------------------


def _downsample(fmr, fnmr, points):
    """Indices of at most about ``points`` curve points, even in log10(FMR) and in FNMR."""
    m = fmr.size
    if m <= points:
        return np.arange(m)
    half = points // 2
    pos = fmr[fmr > 0]
    lo = pos.min() if pos.size else 1.0
    grid = np.geomspace(lo, 1.0, half)
    a = np.searchsorted(fmr, grid, side="left")
    b = np.searchsorted(-fnmr, -np.linspace(1.0, 0.0, half), side="left")
    idx = np.unique(np.clip(np.concatenate([[0, m - 1], a, b]), 0, m - 1))
    return idx


def _histogram(counts, bins=200):
    """Genuine and impostor score histograms over [-1, 1] for plotting (scores outside are clipped)."""
    edges = np.linspace(-1.0, 1.0, bins + 1)
    pos = np.clip(np.searchsorted(edges, counts.thresholds, side="right") - 1, 0, bins - 1)
    gen = np.bincount(pos, weights=counts.genuine, minlength=bins)
    imp = np.bincount(pos, weights=counts.impostor, minlength=bins)
    return {
        "edges": edges.tolist(),
        "genuine": [int(v) for v in gen],
        "impostor": [int(v) for v in imp],
    }


def _degenerate(n_gen, n_imp, targets, reason):
    warnings.warn(f"verification: {reason}", TripletkitWarning, stacklevel=3)
    return {
        "genuine_pairs": int(n_gen),
        "impostor_pairs": int(n_imp),
        "auc": None,
        "auc_exact": None,
        "auc_error_bound": None,
        "eer": None,
        "eer_threshold": None,
        "fnmr_at_fmr": {
            _key(x): {"fnmr": None, "threshold": None, "ci": None, "resolvable": False, "reason": reason}
            for x in targets
        },
        "roc": None,
        "det": None,
        "score_histogram": None,
        "reason": reason,
    }


def _resolvable(x, n_imp):
    if n_imp < 3.0 / x:
        return False, (
            f"{n_imp} impostor pairs are fewer than 3/FMR = {3.0 / x:.0f} (rule of 3); "
            "this FMR target cannot be resolved on this set"
        )
    return True, None


def _assemble(counts, targets, curve_points, ci, bootstrap_info, auc_value, auc_bound, groups):
    with _reading(counts):
        return _assemble_read(counts, targets, curve_points, ci, bootstrap_info, auc_value, auc_bound, groups)


def _assemble_read(counts, targets, curve_points, ci, bootstrap_info, auc_value, auc_bound, groups):
    n_gen = int(counts.genuine.sum())
    n_imp = int(counts.impostor.sum())
    eer, eer_t = equal_error_rate(counts)
    ops = {}
    for x in targets:
        ok, reason = _resolvable(x, n_imp)
        if not ok:
            ops[_key(x)] = {"fnmr": None, "threshold": None, "ci": None, "resolvable": False, "reason": reason}
            continue
        f, t = fnmr_at_fmr(counts, x)
        interval, why = ci.get(x, (None, "no bootstrap requested (bootstrap = 0)"))
        ops[_key(x)] = {"fnmr": f, "threshold": t, "ci": interval, "resolvable": True, "reason": why}
    fmr, tmr, thr = roc_points(counts)
    idx = _downsample(fmr, 1.0 - tmr, curve_points)
    report = {
        "genuine_pairs": n_gen,
        "impostor_pairs": n_imp,
        "auc": float(auc_value),
        "auc_exact": auc_bound == 0.0,
        "auc_error_bound": float(auc_bound),
        "eer": eer,
        "eer_threshold": eer_t,
        "fnmr_at_fmr": ops,
        "roc": {
            "fpr": [float(v) for v in fmr[idx]],
            "tpr": [float(v) for v in tmr[idx]],
            "threshold": [float(v) for v in thr[idx]],
        },
        "det": {"fmr": [float(v) for v in fmr[idx]], "fnmr": [float(1.0 - v) for v in tmr[idx]]},
        "score_histogram": _histogram(counts),
        "bootstrap": bootstrap_info,
    }
    if groups is not None:
        report["groups"] = groups
    return report


def _ci_table(targets, n_imp, res, replicates, no_ci_reason):
    """Map target -> (interval or None, reason or None) from bootstrap results."""
    table = {}
    for x in targets:
        if not _resolvable(x, n_imp)[0]:
            continue
        if no_ci_reason is not None:
            table[x] = (None, no_ci_reason)
            continue
        interval, valid, edge = res[x]
        if interval is None:
            table[x] = (None, f"only {valid} of {replicates} bootstrap replicates had genuine pairs")
        elif edge > 0:
            table[x] = (interval, f"{edge} of {valid} replicates put the threshold at the end of the bootstrap grid")
        else:
            table[x] = (interval, None)
    return table


def _bootstrap_info(replicates, confidence, seed, identities):
    return {
        "replicates": int(replicates),
        "confidence": float(confidence),
        "seed": None if seed is None else int(seed),
        "identities": int(identities),
        "method": (
            "subject-level percentile bootstrap: identities resampled with replacement; genuine pairs of a "
            "drawn identity counted once per draw, no pairs between copies of one identity; impostor counts "
            "to first order in the draw weights"
        ),
    }


def _group_report(group_values, targets, thresholds_by_target, gen_lt_g, gen_g, imp_ge_g, imp_g):
    """groups[value] = {genuine_pairs, impostor_pairs, at_fmr: {x: {threshold, fmr, fnmr}}}."""
    out = {}
    for gi, value in enumerate(group_values):
        entry = {"genuine_pairs": int(gen_g[gi]), "impostor_pairs": int(imp_g[gi]), "at_fmr": {}}
        for x in targets:
            t = thresholds_by_target.get(x)
            if t is None:
                entry["at_fmr"][_key(x)] = {"threshold": None, "fmr": None, "fnmr": None}
                continue
            fmr = float(imp_ge_g[x][gi] / imp_g[gi]) if imp_g[gi] > 0 else None
            fnmr = float(gen_lt_g[x][gi] / gen_g[gi]) if gen_g[gi] > 0 else None
            entry["at_fmr"][_key(x)] = {"threshold": float(t), "fmr": fmr, "fnmr": fnmr}
        out[str(value.item() if hasattr(value, "item") else value)] = entry
    return out


# ---------------------------------------------------------------------------------------------
# Materialised scores: pair lists and score arrays
# ---------------------------------------------------------------------------------------------


def _materialised(gen, imp, gen_id, imp_a, imp_b, n_ident, gen_grp, imp_grp, group_values,
                  targets, bootstrap, confidence, seed, curve_points, per_decade):
    """Report from explicit score arrays (float64), with optional identities and pair groups."""
    n_gen, n_imp = gen.size, imp.size
    if n_gen == 0 or n_imp == 0:
        return _degenerate(n_gen, n_imp, targets,
                           f"{n_gen} genuine and {n_imp} impostor pairs; error rates need at least one of each")
    counts = _count_exact(gen, imp)
    ci_res, why = {}, None
    if bootstrap == 0:
        why = "no bootstrap requested (bootstrap = 0)"
    elif gen_id is None:
        why = "identities of the scores were not given; no subject-level interval"
    elif n_ident < 2:
        why = "fewer than 2 identities; no subject-level interval"
    else:
        imp_sorted = np.sort(imp)
        first = np.r_[True, imp_sorted[1:] != imp_sorted[:-1]]
        cand = imp_sorted[first]
        cand_ge = n_imp - np.flatnonzero(first)  # impostors at or above each distinct value
        b_idx = _boundaries(cand_ge, n_imp, [x for x in targets if _resolvable(x, n_imp)[0]] or targets,
                            per_decade, _window_factor(n_ident))
        bvals = cand[b_idx]
        w = bvals.size
        icell = np.searchsorted(bvals, imp, side="right") - 1
        imp_ge_c = _ge_from_cells(_per_identity_cells(icell, imp_a, imp_b, n_ident, w))
        gen_lt_c = _lt_from_cells(gen_id, np.searchsorted(bvals, gen, side="right") - 1, n_ident, w)
        imp_c = np.bincount(imp_a, minlength=n_ident) + np.bincount(imp_b, minlength=n_ident)
        gen_c = np.bincount(gen_id, minlength=n_ident)
        imp_ge = cand_ge[b_idx]
        ci_res = _bootstrap_fnmr(imp_ge_c, imp_ge, imp_c, n_imp, gen_lt_c, gen_c,
                                 targets, bootstrap, confidence, seed)
    ci = _ci_table(targets, n_imp, ci_res, bootstrap, why)
    groups = None
    if group_values is not None:
        ng = len(group_values)
        thr = {x: fnmr_at_fmr(counts, x)[1] for x in targets if _resolvable(x, n_imp)[0]}
        gen_g = np.bincount(gen_grp[gen_grp >= 0], minlength=ng)
        imp_g = np.bincount(imp_grp[imp_grp >= 0], minlength=ng)
        gen_lt_g, imp_ge_g = {}, {}
        for x, t in thr.items():
            sel = (gen_grp >= 0) & (gen < t)
            gen_lt_g[x] = np.bincount(gen_grp[sel], minlength=ng)
            sel = (imp_grp >= 0) & (imp >= t)
            imp_ge_g[x] = np.bincount(imp_grp[sel], minlength=ng)
        groups = _group_report(group_values, targets, thr, gen_lt_g, gen_g, imp_ge_g, imp_g)
    info = _bootstrap_info(bootstrap, confidence, seed, n_ident)
    return _assemble(counts, targets, curve_points, ci, info, auc(counts), 0.0, groups)


def verify_scores(genuine, impostor, *, genuine_identity=None, impostor_identity=None,
                        fmr_targets=DEFAULT_FMR_TARGETS, bootstrap=200, confidence=0.95, seed=0,
                        curve_points=512, grid_per_decade=40):
    """Verification report from genuine and impostor score arrays.

    Parameters
    ----------
    genuine : array-like of shape (g,)
        Genuine scores (higher = more alike).
    impostor : array-like of shape (i,)
        Impostor scores.
    genuine_identity : array-like of shape (g,), optional
        Identity of each genuine pair. Needed, with ``impostor_identity``, for intervals.
    impostor_identity : array-like of shape (i, 2), optional
        The two identities of each impostor pair.
    fmr_targets, bootstrap, confidence, seed, curve_points
        As in :func:`verify_all_pairs`.
    grid_per_decade : int, default 40
        FMR levels per decade of the bootstrap's threshold grid.

    Returns
    -------
    dict
        See :func:`verify_all_pairs`.
    """
    targets = _check_targets(fmr_targets)
    _check_common(bootstrap, confidence, curve_points)
    gen = _as_scores(genuine, "genuine scores")
    imp = _as_scores(impostor, "impostor scores")
    if (genuine_identity is None) != (impostor_identity is None):
        raise TripletkitError("give both genuine_identity and impostor_identity, or neither")
    gen_id = imp_a = imp_b = None
    n_ident = 0
    if genuine_identity is not None:
        gid = np.asarray(genuine_identity)
        iid = np.asarray(impostor_identity)
        if gid.shape != (gen.size,):
            raise TripletkitError(
                f"genuine_identity has shape {gid.shape}; expected ({gen.size},), one identity per genuine score"
            )
        if iid.shape != (imp.size, 2):
            raise TripletkitError(
                f"impostor_identity has shape {iid.shape}; expected ({imp.size}, 2), two identities per impostor score"
            )
        codes, values = as_codes(np.concatenate([gid, iid.reshape(-1)]), name="identities")
        gen_id = codes[: gen.size]
        imp_a = codes[gen.size :: 2][: imp.size]
        imp_b = codes[gen.size + 1 :: 2][: imp.size]
        if np.any(imp_a == imp_b):
            first = int(np.flatnonzero(imp_a == imp_b)[0])
            raise TripletkitError(
                f"impostor score {first} has the same identity on both sides; impostor pairs need two identities"
            )
        n_ident = values.size
    return _materialised(gen, imp, gen_id, imp_a, imp_b, n_ident, None, None, None,
                         targets, int(bootstrap), float(confidence), seed, int(curve_points), int(grid_per_decade))


def _as_positions(p, n, name):
    arr = np.asarray(p)
    if arr.ndim != 1:
        raise TripletkitError(f"{name} must be a 1-D array of row positions, got shape {arr.shape}")
    if arr.size and not np.issubdtype(arr.dtype, np.integer):
        raise TripletkitError(f"{name} must hold integer row positions, got dtype {arr.dtype}")
    arr = arr.astype(np.int64)
    bad = (arr < 0) | (arr >= n)
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        raise TripletkitError(
            f"{name}[{first}] = {int(arr[first])} is not a row position of a table with {n} rows; "
            "positions run from 0 to n-1"
        )
    return arr


def verify_pairs(embeddings, labels, left, right, *, same=None, groups=None,
                       fmr_targets=DEFAULT_FMR_TARGETS, bootstrap=200, confidence=0.95, seed=0,
                       curve_points=512, grid_per_decade=40):
    """Verification report for a fixed list of pairs (a protocol) instead of all pairs.

    Parameters
    ----------
    embeddings : array-like of shape (n, d)
        Unit-normalised embeddings (float32, C-contiguous preferred).
    labels : array-like of shape (n,)
        Identity of each row.
    left, right : array-like of int, shape (p,)
        Row positions of the two sides of each pair; a row may not be paired with itself.
    same : array-like of bool, shape (p,), optional
        Whether each pair is genuine, as the protocol states it; checked against ``labels``.
    groups : array-like of shape (n,), optional
        Subgroup of each row; a pair belongs to a group when both rows do.
    fmr_targets, bootstrap, confidence, seed, curve_points, grid_per_decade
        As in :func:`verify_all_pairs` and :func:`verify_scores`.

    Returns
    -------
    dict
        See :func:`verify_all_pairs`. Scores are the exact cosines of :mod:`tripletkit._exact`,
        the same values :func:`verify_all_pairs` gives the same pairs.
    """
    targets = _check_targets(fmr_targets)
    _check_common(bootstrap, confidence, curve_points)
    x = as_embeddings(embeddings)
    _check_unit(x, "embeddings")
    n = x.shape[0]
    codes, values = as_codes(labels, n=n)
    gcodes, gvalues = _check_groups(groups, n)
    lp = _as_positions(left, n, "left")
    rp = _as_positions(right, n, "right")
    check_same_length(left=lp, right=rp)
    selfpair = lp == rp
    if selfpair.any():
        first = int(np.flatnonzero(selfpair)[0])
        raise TripletkitError(f"pair {first} compares row {int(lp[first])} with itself; every pair needs two rows")
    is_gen = codes[lp] == codes[rp]
    if same is not None:
        s = np.asarray(same)
        if s.shape != lp.shape or s.dtype != np.bool_:
            raise TripletkitError(f"same must be a boolean array with one entry per pair ({lp.size}), got "
                                  f"dtype {s.dtype} and shape {s.shape}")
        wrong = s != is_gen
        if wrong.any():
            first = int(np.flatnonzero(wrong)[0])
            raise TripletkitError(
                f"pair {first} (rows {int(lp[first])}, {int(rp[first])}) is marked same={bool(s[first])} but the "
                f"labels say {bool(is_gen[first])}; {int(wrong.sum())} pairs disagree; fix the protocol or the labels"
            )
    scores = pair_cosines(snap(x), lp, rp)
    gen_grp = imp_grp = None
    if gcodes is not None:
        pg = np.where(gcodes[lp] == gcodes[rp], gcodes[lp], -1)
        gen_grp, imp_grp = pg[is_gen], pg[~is_gen]
    return _materialised(scores[is_gen], scores[~is_gen], codes[lp][is_gen], codes[lp][~is_gen],
                         codes[rp][~is_gen], values.size, gen_grp, imp_grp, gvalues,
                         targets, int(bootstrap), float(confidence), seed, int(curve_points), int(grid_per_decade))


# ---------------------------------------------------------------------------------------------
# All pairs: blocked matrix product, histogram, exact values of the bins that matter
# ---------------------------------------------------------------------------------------------

# Rows are snapped to the exact-cosine grid (tripletkit._exact) and scaled by 2**9, so the product
# of two rows is 2**18 * the exact cosine, computed exactly by any float64 matrix product: every
# pass, block shape, thread and process sees the same value.
_EMB_SCALE = 2.0**9
_SCORE_SCALE = 2.0**18
# bin key = trunc(2**18 * s + _OFFSET), exact in float64: bins of width 2**-18 (about 3.8e-6),
# keys >= 1 for s >= -1.0039. 2**19 bins (4 MiB of int64 per histogram) count faster than 2**21
# finer ones, and the exact values of the few bins that matter are listed anyway.
_OFFSET = float(2**18 + 2**10)
# Entries of a block that are not pairs (j <= i) get a value whose key is 0, a bin never reported.
_SENTINEL = -(2**18 + 2**10) + 0.5
_NBINS = 2**19 + 2**11
_COLLECT = np.uint8(1)
_WINDOW = np.uint8(2)
# Above this share of scores at or above the lowest bin the second pass needs, it looks every
# score's bin up in a table instead of comparing and listing positions.
_TABLE_SHARE = 0.3
# Buffers of one worker per score of a block: the float64 product, its int32 bin key and a byte
# of selection.
_BYTES_PER_BLOCK_SCORE = 13
# Bytes of one impostor score kept in the first pass: float64 value, int32 key, row and column.
_BYTES_PER_KEPT = 20
# Share of the memory budget that the impostor scores kept in the first pass may take.
_KEEP_SHARE = 0.5


def _keys_of(scaled, out=None):
    """Histogram bin of scaled scores: a non-decreasing function of the score."""
    if out is None:
        out = np.empty(scaled.shape, np.int32)
    np.add(scaled, _OFFSET, out=out, casting="unsafe")
    return out


def _bin_value(k):
    """A score inside bin ``k`` (its middle), for bins whose scores are not listed exactly."""
    return (np.asarray(k, np.float64) + 0.5 - _OFFSET) / _SCORE_SCALE


def _hist_into(keys, acc, tmp=None):
    """acc += histogram of int32 keys. faiss.ivec_hist is a plain C counting loop (about 2x np.bincount)."""
    flat = keys.reshape(-1)
    if tmp is None:
        tmp = np.empty(_NBINS, np.int32)
    nout = faiss.ivec_hist(flat.size, faiss.swig_ptr(flat), _NBINS, faiss.swig_ptr(tmp))
    if nout:
        raise RuntimeError(f"{nout} scores fell outside the histogram; embeddings are not unit vectors")
    acc += tmp


# Scaled scores are multiples of this step (exact cosines are multiples of 2**-52).
_STEP = 2.0**-34


def _lowest_scaled_in(k):
    """Smallest scaled score (a multiple of ``_STEP``) whose key is >= k.

    ``s + _OFFSET`` is exact below 2**19; above (cosines over 0.996) it rounds to a multiple of
    2**-33, which can lift a score one step below the edge into bin k.
    """
    s = float(k) - _OFFSET
    while _keys_of(np.array([s - _STEP]))[0] >= k:
        s -= _STEP
    return s


class _Blocks:
    """Rows sorted by identity, scaled, and cut into blocks of rows against all later rows.

    The rows are snapped to the exact-cosine grid (:mod:`tripletkit._exact`), so a score is the
    same float whichever block shape, thread, pass, BLAS kernel or process computes it.
    :meth:`view` gives a copy sharing the rows with buffers of its own, for one worker thread.
    """

    def __init__(self, x, codes, gcodes, block_rows, memory_budget):
        order = np.argsort(codes, kind="stable")
        self._arrange(snap(x[order], scale=_EMB_SCALE), codes[order],
                      None if gcodes is None else gcodes[order],
                      block_size(x.shape[0], block_rows, memory_budget))

    @classmethod
    def arranged(cls, xs, codes, gcodes, b):
        """Blocks over rows already sorted and scaled: the ``xs``, ``codes``, ``gcodes`` and ``b``
        of another instance (a copy in another process computes the very same products)."""
        self = cls.__new__(cls)
        self._arrange(np.require(xs, np.float64, ["C", "A"]), codes, gcodes, b)
        return self

    def block_starts(self):
        """First row of every block, in order."""
        return list(range(0, self.n, self.b))

    def _arrange(self, xs, codes, gcodes, b):
        self.xs, self.codes, self.gcodes = xs, codes, gcodes
        n = self.n = xs.shape[0]
        self.b = int(b)
        self.sizes = np.bincount(self.codes)
        self.starts = np.concatenate([[0], np.cumsum(self.sizes)[:-1]])
        self._sbuf = self._kbuf = None

    def view(self):
        """The same rows and blocks with buffers of its own (allocated on first use)."""
        other = copy.copy(self)
        other._sbuf = other._kbuf = None
        return other

    @property
    def kbuf(self):
        """int32 buffer of one block's bin keys."""
        if self._kbuf is None:
            self._kbuf = np.empty(self.b * self.n, np.int32)
        return self._kbuf

    def product(self, r0):
        """Scaled scores of the block starting at row ``r0`` against rows ``r0..n-1``, in this
        view's buffer (valid until its next call); entries ``j <= i`` hold ``_SENTINEL``."""
        if self._sbuf is None:
            self._sbuf = np.empty(self.b * self.n, np.float64)
        n = self.n
        r1 = min(n, r0 + self.b)
        rows, m = r1 - r0, n - r0
        s = self._sbuf[: rows * m].reshape(rows, m)
        np.matmul(self.xs[r0:r1], self.xs[r0:].T, out=s)
        for a in range(rows):  # j <= i: not a pair of the upper triangle
            s[a, : a + 1] = _SENTINEL
        return s

    def __iter__(self):
        """Yield (r0, scaled scores (rows, n - r0)) for every block, in order, in this thread."""
        with _one_blas_thread():
            for r0 in self.block_starts():
                yield r0, self.product(r0)

    def genuine(self, r0, s):
        """Genuine scaled scores in this block, with identity and pair group (-1 = across groups)."""
        r1 = r0 + s.shape[0]
        first, last = self.codes[r0], self.codes[r1 - 1]
        vals, ids, grps = [], [], []
        for c in range(first, last + 1):
            if self.sizes[c] < 2:
                continue
            sc, ec = self.starts[c], self.starts[c] + self.sizes[c]
            ra, rb = max(sc, r0), min(ec, r1)
            sub = s[ra - r0 : rb - r0, ra - r0 : ec - r0]
            keep = sub != _SENTINEL
            v = sub[keep]
            if v.size == 0:
                continue
            vals.append(v)
            ids.append(np.full(v.size, c, np.int64))
            if self.gcodes is not None:
                gr = self.gcodes[ra:rb][:, None]
                gc = self.gcodes[ra:ec][None, :]
                grps.append(np.where(gr == gc, gr, -1)[keep])
        return vals, ids, grps

    def impostors_at_or_above(self, r0, s, smin, chunk):
        """(scaled values, rows, cols) of this block's impostor scores >= smin, in row chunks."""
        rows, m = s.shape
        step = max(1, int(chunk // max(m, 1)))
        for a in range(0, rows, step):
            ss = s[a : a + step]
            sel = np.flatnonzero(ss >= smin)
            if sel.size == 0:
                continue
            row, col = np.divmod(sel, m)
            row += r0 + a
            col += r0
            imp = self.codes[row] != self.codes[col]
            yield ss.reshape(-1)[sel[imp]], row[imp], col[imp]


def _worker_keep(keep, workers):
    """Highest impostor scores each of ``workers`` threads keeps when together they should keep
    ``keep``: each sees about 1/workers of the pairs, so its floor settles at about the same
    score; the quarter more covers workers whose blocks hold more high scores than others."""
    return keep if workers <= 1 else int(math.ceil(1.25 * keep / workers))


class _TopImpostors:
    """Keep, during the first pass, every impostor score in the bins at or above a rising floor.

    The floor is a bin, and it only rises: when it does, the kept scores below it are dropped.
    So the kept set is at every moment exactly the impostor scores seen in bins from the floor
    up, and at the end every bin from the floor up is complete, wherever the floor went. It
    starts where the first block's impostor scores put twice the wanted share (``keep`` of
    ``n_imp``) above it, and when more than ``3 * keep`` scores are kept it moves up to the bin
    of the ``keep``-th highest kept one. A start too high only means that the kept scores may not
    reach the bins the operating points need; then a second pass lists them.
    """

    def __init__(self, keep, n_imp, chunk):
        self.keep = int(keep)
        self.share = min(1.0, 2.0 * keep / max(n_imp, 1))
        self.chunk = chunk
        self._empty()

    def _empty(self):
        self.floor = 1  # lowest bin kept; 1 = every pair
        self.vals, self.keys, self.rows, self.cols = [], [], [], []
        self.count = 0

    def start(self, imp_hist_first_block):
        ge = np.cumsum(imp_hist_first_block[::-1])[::-1]
        enough = np.flatnonzero(ge >= self.share * ge[0])
        if enough.size and self.share < 1.0:
            self.floor = max(self.floor, int(enough[-1]))

    def visit(self, blocks, r0, s):
        smin = _lowest_scaled_in(self.floor)
        for v, r, c in blocks.impostors_at_or_above(r0, s, smin, self.chunk):
            self.vals.append(v)
            self.keys.append(_keys_of(v))
            self.rows.append(r.astype(np.int32))
            self.cols.append(c.astype(np.int32))
            self.count += v.size
        if self.count > 3 * self.keep:
            k = np.concatenate(self.keys)
            floor = int(np.partition(k, k.size - self.keep)[k.size - self.keep])
            up = k >= floor
            self.vals = [np.concatenate(self.vals)[up]]
            self.rows = [np.concatenate(self.rows)[up]]
            self.cols = [np.concatenate(self.cols)[up]]
            self.keys = [k[up]]
            self.count = int(up.sum())
            self.floor = floor

    def fresh(self, workers):
        """An empty instance for one of ``workers`` threads: the same share of its own impostors,
        and a part of ``keep`` (see :func:`_worker_keep`)."""
        other = copy.copy(self)
        other.keep = _worker_keep(self.keep, workers)
        other._empty()
        return other

    def absorb(self, parts):
        """Become the union of ``parts`` (instances that each saw some blocks), complete from the
        highest of their floors: every part holds every impostor of its blocks from its own floor
        up, so the union restricted to the highest floor holds every impostor from there up.
        The parts' arrays stay separate runs (see :meth:`parts`)."""
        self.floor = max([self.floor] + [p.floor for p in parts])
        self.vals, self.keys, self.rows, self.cols = [], [], [], []
        self.count = 0
        for p in parts:
            for kk, kv, kr, kc in zip(p.keys, p.vals, p.rows, p.cols):
                if p.floor < self.floor:
                    up = kk >= self.floor
                    kk, kv, kr, kc = kk[up], kv[up], kr[up], kc[up]
                self.keys.append(kk)
                self.vals.append(kv)
                self.rows.append(kr)
                self.cols.append(kc)
                self.count += kk.size

    def _joined(self):
        if not self.vals:
            return np.empty(0, np.int32), np.empty(0, np.float64), np.empty(0, np.int32), np.empty(0, np.int32)
        return (np.concatenate(self.keys), np.concatenate(self.vals), np.concatenate(self.rows),
                np.concatenate(self.cols))

    def parts(self):
        """The kept (keys, scaled values, rows, cols) as runs that can be processed apart."""
        return list(zip(self.keys, self.vals, self.rows, self.cols))

    def result(self):
        kk, kv, kr, kc = self._joined()
        return kk, kv, kr.astype(np.int64), kc.astype(np.int64)

    def complete_from(self):
        """Lowest bin all of whose impostor scores were kept."""
        return self.floor


def _count_block(blocks, r0, s, hist, tmp):
    """First-pass work on one block's products: add their bins to ``hist`` (``tmp`` is left
    holding this block's histogram) and return its genuine scores (see :meth:`_Blocks.genuine`)."""
    k = _keys_of(s, blocks.kbuf[: s.size].reshape(s.shape))
    _hist_into(k, hist, tmp)
    return blocks.genuine(r0, s)


def _genuine_arrays(gvals, gids, ggrps):
    gval = np.concatenate(gvals) if gvals else np.empty(0, np.float64)
    gid = np.concatenate(gids) if gids else np.empty(0, np.int64)
    ggrp = np.concatenate(ggrps) if ggrps else None
    return gval, gid, ggrp


@contextlib.contextmanager
def _one_blas_thread():
    """Run the block products with one BLAS thread.

    Threads of our own run blocks side by side instead, so BLAS threads would only compete with
    them. (No number depends on it: the products are exact.)
    """
    with threadpool_limits(limits=1, user_api="blas"):
        yield


def block_size(n, block_rows, memory_budget):
    """Rows per block for ``n`` rows: ``block_rows`` if given, else sized for two workers'
    buffers (a float64 product, an int32 bin key and a byte of selection per score each) within
    ``memory_budget``, and at most a sixteenth of the rows (at least 256): the leading square of
    each block is computed in full but only its upper half is used."""
    nn = max(n, 1)
    if block_rows is None:
        block_rows = min(max(1, int(memory_budget // (2 * _BYTES_PER_BLOCK_SCORE * nn))), max(256, n // 16))
    return int(max(1, min(n, block_rows, (2**31 - 1) // nn)))


def workers_for(n, b, memory_budget):
    """Worker threads for ``n`` rows in blocks of ``b``: one per CPU, at most one per block, and
    as many as the memory budget holds buffers for (two with the default block size)."""
    per_worker = _BYTES_PER_BLOCK_SCORE * b * max(n, 1)
    return int(max(1, min(os.cpu_count() or 1, -(-max(n, 1) // b), memory_budget // per_worker)))


def default_workers(blocks, memory_budget):
    """:func:`workers_for` of a :class:`_Blocks`."""
    return workers_for(blocks.n, blocks.b, memory_budget)


def _in_threads(items, workers, work):
    """Run ``work(w, part)`` in ``workers`` threads, where ``part`` iterates over items w,
    w + workers, ... (a fixed assignment, so each worker's share is the same on every run).
    Returns the results in worker order. An exception in one worker (or an interrupt of the
    caller) stops the others at their next item."""
    workers = max(1, min(int(workers), len(items)))
    stop = threading.Event()

    def part(w):
        for item in items[w::workers]:
            if stop.is_set():
                raise _Stopped()
            yield item

    if workers == 1:
        return [work(0, part(0))]
    pool = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="tripletkit-verify")
    try:
        futures = [pool.submit(work, w, part(w)) for w in range(workers)]
        wait(futures, return_when=FIRST_EXCEPTION)
        if any(f.exception() is not None for f in futures if f.done()):
            stop.set()
            wait(futures)
            raise next(f.exception() for f in futures
                       if f.exception() is not None and not isinstance(f.exception(), _Stopped))
        return [f.result() for f in futures]
    except BaseException:
        stop.set()
        raise
    finally:
        pool.shutdown(wait=True)


def _in_workers(blocks, workers, work):
    """:func:`_in_threads` over the blocks: ``work(w, view, starts)`` with a view of ``blocks``
    (buffers of its own) per worker, every product with one BLAS thread."""
    starts = blocks.block_starts()
    workers = max(1, min(int(workers), len(starts)))
    views = [blocks] if workers == 1 else [blocks.view() for _ in range(workers)]
    with _one_blas_thread():
        return _in_threads(starts, workers, lambda w, part: work(w, views[w], part))


class _Stopped(Exception):
    """A worker stopped because another one failed."""


def _count_part(view, part, top):
    """First pass over the blocks ``part`` (an iterator of first rows) of one worker."""
    hist = np.zeros(_NBINS, np.int64)
    tmp = np.empty(_NBINS, np.int32)
    genuine = []
    first = True
    for r0 in part:
        s = view.product(r0)
        v, i, g = _count_block(view, r0, s, hist, tmp)
        genuine.append((r0, v, i, g))
        if top is not None:
            if first:
                imp = tmp.astype(np.int64)
                if v:
                    imp -= np.bincount(_keys_of(np.concatenate(v)), minlength=_NBINS)
                imp[0] = 0  # the key of entries that are not pairs
                top.start(imp)
                first = False
            top.visit(view, r0, s)
    return hist, genuine


def _merge_counts(parts):
    """Sum the histograms and concatenate the genuine scores of worker results in block order."""
    hist = np.zeros(_NBINS, np.int64)
    genuine = []
    for h, g in parts:
        hist += h
        genuine += g
    gvals, gids, ggrps = [], [], []
    for _, v, i, g in sorted(genuine, key=lambda item: item[0]):
        gvals += v
        gids += i
        ggrps += g
    return (hist, *_genuine_arrays(gvals, gids, ggrps))


def count_blocks(blocks, starts):
    """The counting pass over the blocks beginning at rows ``starts`` (no impostors kept).

    A building block for running the first pass of :func:`verify_all_pairs` elsewhere (see
    :func:`block_runner`). Returns ``(hist, gval, gid, ggrp)``: the bin counts of every score
    of these blocks and their genuine scaled scores with identity and pair group (``ggrp``
    None without groups). Summing ``hist`` and concatenating the rest over a partition of all
    blocks gives what the in-process pass gives.
    """
    with _one_blas_thread():
        return _merge_counts([_count_part(blocks, iter(starts), None)])


def refine_blocks(blocks, starts, ref, chunk, use_table):
    """The second pass of :func:`verify_all_pairs` over the blocks beginning at rows ``starts``:
    ``ref`` (a :class:`_Refiner`) sees their impostor scores (a building block, like
    :func:`count_blocks`)."""
    with _one_blas_thread():
        for r0 in starts:
            ref.visit(blocks, r0, blocks.product(r0), chunk, use_table)


def _pass_one(blocks, top, workers=1):
    """The counting pass over all blocks in ``workers`` threads; ``top`` (or None) ends holding
    the highest impostor scores, merged from one copy per worker."""
    workers = max(1, min(int(workers), len(blocks.block_starts())))
    if top is None:
        tops = [None] * workers
    else:
        tops = [top] if workers == 1 else [top.fresh(workers) for _ in range(workers)]
    parts = _in_workers(blocks, workers, lambda w, view, part: _count_part(view, part, tops[w]))
    if top is not None and workers > 1:
        top.absorb(tops)
    return _merge_counts(parts)


def _process_kept(blocks, ref, runs, workers):
    """Let ``ref`` see the impostor scores kept in the first pass (runs of (keys, values, rows,
    cols)): worker w processes runs w, w + workers, ... with a copy of ``ref``; the copies are
    absorbed in worker order."""
    runs = [r for r in runs if r[0].size]
    workers = max(1, min(int(workers), len(runs)))
    refs = [ref] if workers == 1 else [_Refiner(*ref.args) for _ in range(workers)]

    def work(w, part):
        for run in part:
            refs[w].process(blocks, *run)

    _in_threads(runs, workers, work)
    if workers > 1:
        for copy_ in refs:
            ref.absorb(copy_.export())


def _pass_two(blocks, ref, chunk, use_table, workers=1):
    """The second pass over all blocks in ``workers`` threads, one copy of ``ref`` each, absorbed
    into ``ref`` in worker order."""
    workers = max(1, min(int(workers), len(blocks.block_starts())))
    refs = [ref] if workers == 1 else [_Refiner(*ref.args) for _ in range(workers)]

    def visit_all(w, view, part):
        for r0 in part:
            refs[w].visit(view, r0, view.product(r0), chunk, use_table)

    _in_workers(blocks, workers, visit_all)
    if workers > 1:
        for copy_ in refs:
            ref.absorb(copy_.export())


class _Refiner:
    """Collect exact impostor scores of chosen bins; count a window per identity and per group.

    ``code[k]`` says what to do with an impostor score in bin k (``_COLLECT``, ``_WINDOW`` or
    both). Scores arrive either from a second pass over the blocks (:meth:`visit`) or from the
    impostors kept in the first pass (:meth:`process`).
    """

    def __init__(self, code, kwin, cell_of, n_ident, n_cells, gcell_of, n_groups, n_gcells):
        # kept so that a copy elsewhere (see block_runner) can be built with the same arguments
        self.args = (code, kwin, cell_of, n_ident, n_cells, gcell_of, n_groups, n_gcells)
        self.code = code
        self.want = code != 0
        nz = np.flatnonzero(code)
        self.kmin = int(nz[0]) if nz.size else _NBINS
        self.smin = _lowest_scaled_in(self.kmin) if nz.size else None
        self.kwin = kwin
        self.cell_of = cell_of
        self.n_cells = n_cells
        self.gcell_of, self.n_gcells = gcell_of, n_gcells
        self.values, self.keys, self.pgroup = [], [], []
        self.win = np.zeros(n_ident * n_cells, np.int64) if cell_of is not None else None
        self._pending = []
        self._pending_n = 0
        self.gwin = np.zeros(n_groups * n_gcells, np.int64) if gcell_of is not None else None
        self.examined = 0  # scores looked at more closely (for benchmarks)

    def _flush(self):
        if self._pending:
            self.win += np.bincount(np.concatenate(self._pending), minlength=self.win.size)
            self._pending, self._pending_n = [], 0

    def visit(self, blocks, r0, s, chunk, use_table):
        """Second pass over one block."""
        if self.smin is None:
            return
        if not use_table:
            for v, row, col in blocks.impostors_at_or_above(r0, s, self.smin, chunk):
                self.process(blocks, _keys_of(v), v, row, col)
            return
        rows, m = s.shape
        step = max(1, int(chunk // max(m, 1)))
        for a in range(0, rows, step):
            ss = s[a : a + step]
            kk = _keys_of(ss, blocks.kbuf[: ss.size].reshape(ss.shape))
            sel = np.flatnonzero(self.want[kk])
            if sel.size == 0:
                continue
            row, col = np.divmod(sel, m)
            row += r0 + a
            col += r0
            imp = blocks.codes[row] != blocks.codes[col]
            sel = sel[imp]
            self.process(blocks, kk.reshape(-1)[sel], ss.reshape(-1)[sel], row[imp], col[imp])

    def process(self, blocks, ksel, vals, row, col):
        """Impostor scores (keys, scaled values, rows, cols), any order, each seen once."""
        keep = self.want[ksel]
        ksel, vals, row, col = ksel[keep], vals[keep], row[keep], col[keep]
        self.examined += ksel.size
        if ksel.size == 0:
            return
        csel = self.code[ksel]
        pg = None
        if blocks.gcodes is not None:
            ga, gb = blocks.gcodes[row], blocks.gcodes[col]
            pg = np.where(ga == gb, ga, -1)
        take = (csel & _COLLECT) != 0
        if take.any():
            self.values.append(vals[take])
            self.keys.append(ksel[take])
            if pg is not None:
                self.pgroup.append(pg[take])
        win = (csel & _WINDOW) != 0
        if not win.any():
            return
        kw = ksel[win].astype(np.int64) - self.kwin
        if self.cell_of is not None:
            cell = self.cell_of[kw]
            ok = cell >= 0
            cell = cell[ok]
            w = self.n_cells
            for ident in (blocks.codes[row[win][ok]], blocks.codes[col[win][ok]]):
                # a pair counts for both of its identities; counted in large batches
                self._pending.append(ident * w + cell)
                self._pending_n += cell.size
            if self._pending_n > (1 << 24):
                self._flush()
        if self.gcell_of is not None:
            g = pg[win]
            same = g >= 0
            self.gwin += np.bincount(g[same] * self.n_gcells + self.gcell_of[kw[same]], minlength=self.gwin.size)

    def export(self):
        """What this refiner gathered, for :meth:`absorb` by one built with the same ``args``."""
        vals, keys, pg = self.finish()
        return vals, keys, pg, self.win, self.gwin, self.examined

    def absorb(self, part):
        """Add what another refiner (same ``args``) gathered from other blocks (see :meth:`export`)."""
        vals, keys, pg, win, gwin, examined = part
        self.values.append(vals)
        self.keys.append(keys)
        if pg is not None:
            self.pgroup.append(pg)
        if win is not None:
            self.win += win
        if gwin is not None:
            self.gwin += gwin
        self.examined += int(examined)

    def finish(self):
        if self.win is not None:
            self._flush()
        vals = np.concatenate(self.values) if self.values else np.empty(0, np.float64)
        keys = np.concatenate(self.keys) if self.keys else np.empty(0, np.int32)
        pg = np.concatenate(self.pgroup) if self.pgroup else None
        return vals, keys, pg


def _last_nonneg_bin(nonempty, imp_hist, gen_hist, n_gen, n_imp):
    """Non-empty bin holding the last threshold with FMR - FNMR >= 0, and the next non-empty bin."""
    imp_ge = np.cumsum(imp_hist[nonempty][::-1])[::-1]  # impostors in this bin and above
    gen_lt = np.cumsum(gen_hist[nonempty]) - gen_hist[nonempty]  # genuines below this bin
    d = imp_ge / n_imp - gen_lt / n_gen  # D at the first score of each non-empty bin
    j = int(np.flatnonzero(d >= 0)[-1])
    nxt = int(nonempty[j + 1]) if j + 1 < nonempty.size else None
    return int(nonempty[j]), nxt


def _auc_bins(both, gen_hist, imp_hist, budget, lowest=None):
    """Bins holding genuine and impostor scores to list for an exact AUC, most valuable first."""
    if lowest is not None:
        both = both[both >= lowest]
    cost = imp_hist[both]
    if cost.sum() <= budget:
        return both
    order = np.argsort(-(gen_hist[both] * imp_hist[both]), kind="stable")
    fit = np.cumsum(cost[order]) <= budget
    return np.sort(both[order[fit]])

# Who runs the passes over the row blocks of verify_all_pairs; None: this process, in order.
_BLOCK_RUNNER = contextvars.ContextVar("tripletkit_block_runner", default=None)


@contextlib.contextmanager
def block_runner(runner):
    """Within the ``with`` block, :func:`verify_all_pairs` hands its passes over row blocks to ``runner``.

    ``runner.first_pass(blocks)`` must return what :func:`count_blocks` returns for all blocks
    (``blocks.block_starts()``), summed and concatenated in block order, and
    ``runner.second_pass(blocks, ref, chunk, use_table)`` must leave ``ref`` as
    :func:`refine_blocks` over all blocks would (e.g. by :meth:`_Refiner.absorb` of the
    :meth:`_Refiner.export` of copies that each saw some blocks). ``tripletkit.distributed``
    runs them as Dask tasks. Every number of the report is the same as in this process (the
    products are exact); ``passes`` is then always 2, since impostors are not kept across blocks.
    """
    token = _BLOCK_RUNNER.set(runner)
    try:
        yield runner
    finally:
        _BLOCK_RUNNER.reset(token)


def verify_all_pairs(embeddings, labels, *, groups=None, fmr_targets=DEFAULT_FMR_TARGETS, bootstrap=200,
                     confidence=0.95, seed=0, curve_points=512, memory_budget=256 * 2**20, block_rows=None,
                     exact_auc="auto", auc_budget=2**24, grid_per_decade=40, workers=None):
    """Verification report over every pair of distinct rows, by blocked matrix product and counting.

    Parameters
    ----------
    embeddings : array-like of shape (n, d)
        Unit-normalised embeddings (float32, C-contiguous preferred; rows must have norm 1 within
        1e-3). Scores are cosine similarities, exact on the grid of :mod:`tripletkit._exact`.
    labels : array-like of shape (n,)
        Identity of each row: a pair is genuine when both rows share the label.
    groups : array-like of shape (n,), optional
        Subgroup of each row. ``groups`` in the report gives, for each group, FMR and FNMR at the
        global threshold of each FMR target over the pairs whose two rows are both in the group.
    fmr_targets : sequence of float, default (1e-4, 1e-3, 1e-2)
        FMR operating points.
    bootstrap : int, default 200
        Subject-level bootstrap replicates for the interval of FNMR at each FMR target (0 = none).
    confidence : float, default 0.95
        Coverage of the percentile interval.
    seed : int, default 0
        Seed of the bootstrap (``np.random.default_rng``).
    curve_points : int, default 512
        About how many ROC/DET points to report (even in log FMR and in FNMR).
    memory_budget : int, default 256 MiB
        Bytes for the block buffers (13 bytes per score of a block and worker: the product, a
        bin key and a selection byte; blocks are sized for two workers) and, on top, for the
        impostor scores kept in the first pass (20 bytes each, up to half the budget).
    block_rows : int, optional
        Rows per block, overriding ``memory_budget``.
    exact_auc : {"auto", True, False}, default "auto"
        ``True``: list the exact impostor scores of every histogram bin that also holds genuine
        scores (within ``auc_budget``), so that the AUC is exact, even if that takes a second
        pass. ``"auto"``: list those from the lowest bin an operating point or the bootstrap
        window needs up (their scores are at hand anyway). ``False``: none. Unlisted bins count
        their pairs as ties and ``auc_error_bound`` bounds the error.
    auc_budget : int, default 2**24
        Most impostor scores to list for the AUC; the bins with the most (genuine x impostor)
        pairs first.
    grid_per_decade : int, default 40
        FMR levels per decade of the bootstrap's threshold grid (fewer when identities x levels
        would pass 8 million counts).
    workers : int, optional
        Threads that compute and count blocks side by side (default: one per CPU, at most as
        many as ``memory_budget`` holds block buffers for: two with the default block size).
        No number of the report depends on ``workers`` or on the BLAS thread count (``passes``
        may: see below). Every product runs with one BLAS thread, for speed; that limit is
        process-wide (``threadpoolctl``) while the passes run, so other threads of the caller
        that multiply matrices meanwhile run with one BLAS thread too.

    Returns
    -------
    dict
        ``genuine_pairs``, ``impostor_pairs`` (int); ``auc``; ``auc_exact`` (bool) and
        ``auc_error_bound`` (0.0 when exact; else the AUC is within this of the exact value);
        ``eer``, ``eer_threshold``; ``fnmr_at_fmr``: ``{"0.001": {"fnmr", "threshold", "ci":
        [lo, hi] or None, "resolvable", "reason"}}``; ``roc``: ``{"fpr", "tpr", "threshold"}``
        and ``det``: ``{"fmr", "fnmr"}`` (downsampled lists); ``score_histogram``: ``{"edges",
        "genuine", "impostor"}`` (200 bins over [-1, 1]); ``bootstrap`` (settings and method);
        ``passes`` (1 or 2); ``groups`` when groups are given. Plain Python numbers; ``None``
        with a ``reason`` when a value cannot be computed. No genuine or no impostor pairs gives
        a warning and ``None`` values.

    Notes
    -----
    Exactness. Every score is the exact cosine of two rows on the grid of
    :mod:`tripletkit._exact`, a float64 product that no block shape, thread count, BLAS kernel or
    process can round differently, so every pass sees the same values. The first pass counts all scores
    into ``2**19`` bins of width ``2**-18``, keeps every genuine score (they are few) and keeps
    the highest impostor scores (as many as the operating points and the bootstrap window
    need, within the memory budget). Counts are exact, so FMR and FNMR are exact at every bin
    edge; what is left is the order inside the bins that hold an operating point: the bin of
    the (m+1)-th highest impostor score for target x (m = floor(x * impostors)) and the next
    non-empty bin; the bin holding the EER crossing and the next non-empty bin. When the kept
    impostors cover all of these bins, their exact scores come from there (one pass); otherwise a
    second pass lists them. So FNMR at FMR, its threshold and the EER equal what sorting every
    score would give. The AUC is exact when every bin holding both genuine and impostor scores
    was listed (``auc_exact``); a bin that was not contributes its pairs as ties, off by at most
    half its genuine x impostor pairs, summed in ``auc_error_bound``.

    Intervals (``ci``). Identities are drawn with replacement ``bootstrap`` times (seeded). In a
    replicate with multiplicities ``w_c``: a genuine pair of identity c counts ``w_c`` times;
    pairs between two copies of one identity are not formed (they would compare images with
    themselves); the impostor count at a threshold, exactly ``sum_{c<c'} w_c w_c' N_cc'``, is
    taken to first order in ``w - 1`` as ``sum_c w_c N_c - N`` (``N_c``: impostor pairs involving
    c), with the same expansion for the impostor total. This needs only per-identity counts at a
    grid of thresholds (``grid_per_decade`` FMR levels a decade from target/f to f x target, f
    from 8 for few identities down to 1.25 for thousands, as replicates vary less),
    not every identity pair; the quadratic term dropped is small when no small set of identity
    pairs holds most high-scoring impostors (in the simulation tests it moves the interval by
    far less than its width). Each replicate's threshold is the lowest grid threshold with
    FMR <= x and its FNMR is exact for that threshold. The interval is the percentile interval of
    the replicates. Like every percentile interval over few clusters it covers a little less
    than nominal: about 0.90-0.94 for a nominal 0.95 with 100 identities in the simulation of
    tests/test_verification.py.

    Threads. Worker w computes and counts blocks w, w + workers, ... with buffers of its own and
    keeps its own highest impostor scores; the histograms are summed and the kept scores merged
    (complete from the highest of the workers' floors). Whether the kept scores reach low enough
    for one pass can depend on that split, so ``passes`` can differ with ``workers``; the numbers
    do not, since both ways give the exact scores of the same bins.

    Memory is O(n*d + workers*block*n + bins + genuine pairs + kept impostors + identities * grid).

    References
    ----------
    .. [1] ISO/IEC 19795-1:2006, Biometric performance testing and reporting -- Part 1.
    .. [2] R. M. Bolle, N. K. Ratha and S. Pankanti, "Error analysis of pattern recognition
       systems -- the subsets bootstrap", CVIU 93(1), 2004.
    .. [3] B. Efron and R. J. Tibshirani, "An Introduction to the Bootstrap", Chapman & Hall,
       1993 (percentile interval).
    """
    targets = _check_targets(fmr_targets)
    _check_common(bootstrap, confidence, curve_points)
    if block_rows is not None and (isinstance(block_rows, bool) or not isinstance(block_rows, (int, np.integer))
                                   or block_rows < 1):
        raise TripletkitError(f"block_rows must be a whole number >= 1, got {block_rows!r}")
    if not (isinstance(memory_budget, (int, np.integer)) and memory_budget >= 1 << 20):
        raise TripletkitError(f"memory_budget must be a number of bytes >= 1 MiB, got {memory_budget!r}")
    if exact_auc not in ("auto", True, False):
        raise TripletkitError(f"exact_auc must be 'auto', True or False, got {exact_auc!r}")
    x = as_embeddings(embeddings)
    _check_unit(x, "embeddings")
    n = x.shape[0]
    codes, values = as_codes(labels, n=n)
    gcodes, gvalues = _check_groups(groups, n)
    k_ident = values.size
    sizes = np.bincount(codes, minlength=k_ident).astype(np.int64)
    n_gen = int(np.sum(sizes * (sizes - 1) // 2))
    n_imp = n * (n - 1) // 2 - n_gen
    if n_gen == 0 or n_imp == 0:
        why = ("no genuine pairs: every identity has one row" if n_gen == 0
               else "no impostor pairs: all rows share one identity")
        return _degenerate(n_gen, n_imp, targets, why)
    resolvable = [x_ for x_ in targets if _resolvable(x_, n_imp)[0]]
    do_ci = bootstrap > 0 and k_ident >= 2 and bool(resolvable)

    # how many of the highest impostor scores the operating points and the bootstrap window need
    top_share = max(resolvable) * (_window_factor(k_ident) if do_ci else 1.0) if resolvable else 0.0
    keep = int(math.ceil(1.1 * top_share * n_imp)) + 4096
    chunk = max(1 << 16, memory_budget // 64)
    blocks = _Blocks(x, codes, gcodes, block_rows, memory_budget)
    workers = default_workers(blocks, memory_budget) if workers is None else _check_workers(workers)
    workers = min(workers, len(blocks.block_starts()))
    # each worker keeps up to 3 times its part of keep before it trims them
    fits = workers * 3 * _BYTES_PER_KEPT * _worker_keep(keep, workers) <= _KEEP_SHARE * memory_budget
    top = _TopImpostors(keep, n_imp, chunk) if fits else None
    runner = _BLOCK_RUNNER.get()
    if runner is None:
        hist_all, gval, gid, ggrp = _pass_one(blocks, top, workers)
    else:
        top = None  # a runner's blocks are counted apart, so the refined bins come from a second pass
        hist_all, gval, gid, ggrp = runner.first_pass(blocks)
    gkey = _keys_of(gval).astype(np.int64)
    gval = gval.astype(np.float64) / _SCORE_SCALE  # exact: undoes a power-of-two scaling
    gen_hist = np.bincount(gkey, minlength=_NBINS).astype(np.int64)
    imp_hist = hist_all - gen_hist
    imp_hist[0] = 0
    if gval.size != n_gen or int(imp_hist.sum()) != n_imp:
        raise RuntimeError("internal error: pair counts of the blocked pass do not add up")
    nonempty = np.flatnonzero(gen_hist + imp_hist)
    imp_ge_bin = np.cumsum(imp_hist[::-1])[::-1]  # impostors in bin k and above

    # bins to list exactly: each operating point's bin and the next non-empty bin
    needed = set()

    def with_next(b):
        needed.add(int(b))
        pos = np.searchsorted(nonempty, b, side="right")
        if pos < nonempty.size:
            needed.add(int(nonempty[pos]))

    op_bin = {}
    for t in resolvable:
        mx = _max_impostors(t, n_imp)
        if mx >= n_imp:
            continue  # every threshold is allowed; the lowest score decides, no bin to resolve
        # bin of the (mx+1)-th highest impostor: last bin with at least mx+1 impostors at or above
        b = int(np.flatnonzero(imp_ge_bin >= mx + 1)[-1])
        op_bin[t] = b
        with_next(b)
    with_next(_last_nonneg_bin(nonempty, imp_hist, gen_hist, n_gen, n_imp)[0])

    # bootstrap grid: candidate thresholds are the lower edges of non-empty impostor bins
    ci_res, why = {}, None
    bkeys = None
    kwin = _NBINS
    if bootstrap == 0:
        why = "no bootstrap requested (bootstrap = 0)"
    elif k_ident < 2:
        why = "fewer than 2 identities; no subject-level interval"
    elif not resolvable:
        why = "no resolvable FMR target"
    else:
        cand = np.flatnonzero(imp_hist)
        # per-identity counts take identities x grid int64s: keep them within 64 MiB
        bkeys = cand[_boundaries(imp_ge_bin[cand], n_imp, resolvable, grid_per_decade, _window_factor(k_ident),
                                 max_levels=max(16, (8 * 2**20) // k_ident))]
        kwin = int(bkeys[0])
    ob = np.unique(np.fromiter(op_bin.values(), np.int64, len(op_bin)))
    if gvalues is not None and ob.size:
        kwin = min(kwin, int(ob[0]))

    # one pass suffices when the impostors kept in the first pass cover every bin needed
    covered = top.complete_from() if top is not None else _NBINS + 1
    lowest_needed = min(list(needed) + [kwin])
    both = np.flatnonzero((gen_hist > 0) & (imp_hist > 0))
    if exact_auc is True:
        auc_bins = _auc_bins(both, gen_hist, imp_hist, auc_budget)
    elif exact_auc == "auto":
        # the bins from the lowest one the operating points need up are listed anyway; this
        # choice does not depend on the blocks, so neither does the AUC
        auc_bins = _auc_bins(both, gen_hist, imp_hist, auc_budget, lowest=lowest_needed)
    else:
        auc_bins = np.empty(0, np.int64)
    one_pass = min([lowest_needed] + auc_bins[:1].tolist()) >= covered
    collect_bins = np.unique(np.concatenate([np.fromiter(needed, np.int64, len(needed)), auc_bins]))
    code = np.zeros(_NBINS, np.uint8)
    code[collect_bins] = _COLLECT
    cell_of = gcell_of = None
    n_gcells = 2 * ob.size + 1
    if kwin < _NBINS:
        code[kwin:] |= _WINDOW
        ks = np.arange(kwin, _NBINS)
        if bkeys is not None:
            # cell j holds keys in [bkeys[j], bkeys[j+1]), the last cell all keys from bkeys[-1] up;
            # -1: below the grid (inside the window only for the groups)
            cell_of = np.searchsorted(bkeys, ks, side="right") - 1
        if gvalues is not None and ob.size:
            # group cells: below the first op bin, the op bin, between, the next op bin, ...
            gcell_of = np.searchsorted(ob, ks, side="right") + np.searchsorted(ob, ks, side="left")

    ref = _Refiner(code, kwin, cell_of, k_ident, 0 if bkeys is None else bkeys.size, gcell_of,
                   0 if gvalues is None else gvalues.size, n_gcells)
    if one_pass:
        _process_kept(blocks, ref, top.parts(), workers)
    else:
        # one comparison per score finds the candidates when few scores lie at or above the
        # lowest chosen bin; otherwise looking every score's bin up in a table is cheaper
        above = int(hist_all[ref.kmin :].sum()) if ref.smin is not None else 0
        use_table = above > _TABLE_SHARE * (n_gen + n_imp)
        del top
        if runner is not None:
            runner.second_pass(blocks, ref, chunk, use_table)
        else:
            _pass_two(blocks, ref, chunk, use_table, workers)
    cvals, ckeys, cgrp = ref.finish()
    cvals = cvals.astype(np.float64) / _SCORE_SCALE

    listed = np.bincount(ckeys.astype(np.int64), minlength=_NBINS)
    if not np.array_equal(listed[collect_bins], imp_hist[collect_bins]):
        raise RuntimeError("internal error: the listed scores do not match the first pass's counts")

    counts = _merged_counts(gval, gkey, cvals, ckeys, collect_bins, gen_hist, imp_hist, nonempty)
    unrefined = both[~np.isin(both, collect_bins)]
    bound = float(0.5 * np.sum(gen_hist[unrefined].astype(np.float64) * imp_hist[unrefined]) / (n_gen * n_imp))
    auc_value = auc(counts)

    if bkeys is not None:
        w = bkeys.size
        imp_ge_c = _ge_from_cells(ref.win.reshape(k_ident, w))
        gcell = np.searchsorted(bkeys, gkey, side="right") - 1
        gen_lt_c = _lt_from_cells(gid, gcell, k_ident, w)
        imp_c = sizes * (n - sizes)
        ci_res = _bootstrap_fnmr(imp_ge_c, imp_ge_bin[bkeys], imp_c, n_imp, gen_lt_c, sizes * (sizes - 1) // 2,
                                 resolvable, bootstrap, confidence, seed)
    ci = _ci_table(targets, n_imp, ci_res, bootstrap, why)

    group_rep = None
    if gvalues is not None:
        group_rep = _groups_all_pairs(gvalues, gcodes, codes, targets, counts, n_imp, op_bin, ob, ref,
                                      cvals, ckeys, cgrp, gval, ggrp, resolvable)
    info = _bootstrap_info(bootstrap, confidence, seed, k_ident)
    report = _assemble(counts, targets, curve_points, ci, info, auc_value, bound, group_rep)
    report["passes"] = 1 if one_pass else 2
    return report


def _groups_all_pairs(gvalues, gcodes, codes, targets, counts, n_imp, op_bin, ob, p2, cvals, ckeys, cgrp,
                      gval, ggrp, resolvable):
    ng = gvalues.size
    # pairs within a group: C(n_g, 2) in all, of which sum_c C(n_gc, 2) genuine
    n_g = np.bincount(gcodes, minlength=ng).astype(np.int64)
    joint = np.bincount(gcodes * (codes.max() + 1) + codes, minlength=ng * (codes.max() + 1)).astype(np.int64)
    gen_g = (joint * (joint - 1) // 2).reshape(ng, -1).sum(axis=1)
    imp_g = n_g * (n_g - 1) // 2 - gen_g
    thr, gen_lt_g, imp_ge_g = {}, {}, {}
    gwin = None if p2.gwin is None else p2.gwin.reshape(ng, p2.n_gcells)
    gv = gval
    for x in resolvable:
        t = fnmr_at_fmr(counts, x)[1]
        thr[x] = t
        sel = (ggrp >= 0) & (gv < t)
        gen_lt_g[x] = np.bincount(ggrp[sel], minlength=ng)
        if x in op_bin:
            b = op_bin[x]
            cell = 2 * int(np.searchsorted(ob, b)) + 1  # the cell of bin b itself
            above = gwin[:, cell + 1 :].sum(axis=1)
            inbin = (ckeys == b) & (cgrp >= 0) & (cvals >= t)
            imp_ge_g[x] = above + np.bincount(cgrp[inbin], minlength=ng)
        else:
            imp_ge_g[x] = imp_g.copy()  # threshold at the lowest score: every impostor is accepted
    return _group_report(gvalues, targets, thr, gen_lt_g, gen_g, imp_ge_g, imp_g)


def _value_counts(v):
    """Distinct values of ``v`` ascending and how often each occurs."""
    v = np.sort(v)
    if v.size == 0:
        return v.astype(np.float64), np.empty(0, np.int64)
    starts = np.flatnonzero(np.r_[True, v[1:] != v[:-1]])
    return v[starts].astype(np.float64), np.diff(np.r_[starts, v.size]).astype(np.int64)


def _merged_counts(gval, gkey, cvals, ckeys, collect_bins, gen_hist, imp_hist, nonempty):
    """ScoreCounts with exact values wherever they are known and one tied entry per other bin.

    Bins are intervals of the score and a tied entry sits inside its bin (its middle), so ordering
    by value orders by bin too. The tied entries come sorted; only the exact values are sorted and
    then merged in.
    """
    exact_bin = np.zeros(_NBINS, bool)
    exact_bin[collect_bins] = True
    exact_bin[imp_hist == 0] = True  # genuine-only bins: the genuine scores are all known
    tied = nonempty[~exact_bin[nonempty]]
    # distinct exact values with their genuine and impostor counts: each side sorted apart (a
    # plain sort, no argsort), then the genuine values merged into the impostor ones
    gu, gc = _value_counts(gval[exact_bin[gkey]])
    iu, ic = _value_counts(cvals)
    at = np.searchsorted(iu, gu)
    shared = at < iu.size
    shared[shared] = iu[at[shared]] == gu[shared]
    new_g = ~shared
    pos = np.searchsorted(iu, gu[new_g]) + np.arange(int(new_g.sum()))
    m = iu.size + pos.size
    from_imp = np.ones(m, bool)
    from_imp[pos] = False
    ex_v = np.empty(m)
    ex_v[pos] = gu[new_g]
    ex_v[from_imp] = iu
    ex_ic = np.zeros(m, np.int64)
    ex_ic[from_imp] = ic
    ex_gc = np.zeros(m, np.int64)
    ex_gc[pos] = gc[new_g]
    imp_slot = np.flatnonzero(from_imp)
    ex_gc[imp_slot[at[shared]]] = gc[shared]
    t_v = _bin_value(tied)
    # no exact value equals a tied one (their bins differ): merge the two sorted runs
    pos = np.searchsorted(t_v, ex_v) + np.arange(ex_v.size)
    m = t_v.size + ex_v.size
    from_tied = np.ones(m, bool)
    from_tied[pos] = False
    merged = []
    for tied_part, exact_part, dtype in ((t_v, ex_v, np.float64), (gen_hist[tied], ex_gc, np.int64),
                                         (imp_hist[tied], ex_ic, np.int64)):
        out = np.empty(m, dtype)
        out[pos] = exact_part
        out[from_tied] = tied_part
        merged.append(out)
    return ScoreCounts(*merged)
