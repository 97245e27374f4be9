"""Choosing negatives inside a regime: hardest, random (uniform) and distance-weighted.

Every draw comes from a counter-based generator: a 64-bit hash of a stream key (drawn once from
``np.random.default_rng(seed)``) and of the draw's coordinates (anchor row, positive row, regime,
candidate row, round). A pair's draws therefore do not depend on block sizes or on the order in
which blocks are processed, and the same seed, input and options give the same triplets. Besides
the samplers, this module holds the small counting helpers on ragged segments (runs of equal group
numbers, ranges of a sorted list) that the candidate paths share.
"""

from __future__ import annotations

import numpy as np

__all__ = ["uniform", "floyd", "gumbel", "choose", "choose_negatives", "distance_log_weights", "top_in_groups",
           "ragged", "count_below", "rank_in_groups"]

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
# Distances are clipped this far below the antipode 2 (see distance_log_weights).
_ANTIPODAL_GAP = 1e-6


# ---------------------------------------------------------------------------------------------
# counter-based draws
# ---------------------------------------------------------------------------------------------
def _mix(x):
    """The SplitMix64 finaliser [1]_: a bijective 64-bit scramble.

    References
    ----------
    .. [1] G. L. Steele, D. Lea, C. H. Flood, "Fast splittable pseudorandom number generators",
       OOPSLA 2014.
    """
    x = x ^ (x >> np.uint64(30))
    x = x * _MIX1
    x = x ^ (x >> np.uint64(27))
    x = x * _MIX2
    return x ^ (x >> np.uint64(31))


def uniform(key, *counters):
    """Uniform floats in (0, 1), one per broadcast element of ``counters`` (non-negative ints).

    The value at given counters depends on ``key`` and those counters only.
    """
    with np.errstate(over="ignore"):
        h = np.asarray(key, dtype=np.uint64)
        for c in counters:
            h = _mix(h ^ _mix(np.asarray(c).astype(np.uint64) + _GOLDEN))
    return ((h >> np.uint64(11)).astype(np.float64) + 0.5) * 2.0 ** -53


def gumbel(u):
    """Standard Gumbel noise from uniforms ``u`` in (0, 1)."""
    return -np.log(-np.log(u))


def floyd(m, k, key, *counters):
    """Per row, ``min(m[i], k)`` distinct offsets in ``[0, m[i])``, uniformly (Floyd's algorithm [1]_).

    Returns an int64 array (len(m), k) padded with -1. Draw ``step`` of row ``i`` is
    ``uniform(key, *counters[i], step)``, so a row's sample depends only on its counters.

    References
    ----------
    .. [1] J. Bentley, R. Floyd, "Programming pearls: a sample of brilliance", Communications of
       the ACM 30(9), 1987.
    """
    m = np.asarray(m, dtype=np.int64)
    out = np.full((m.size, k), -1, dtype=np.int64)
    cols = np.arange(k, dtype=np.int64)
    small = m <= k
    if small.any():
        out[small] = np.where(cols[None, :] < m[small, None], cols[None, :], -1)
    big = np.flatnonzero(~small)
    if big.size:
        sizes = m[big]
        ctr = [np.broadcast_to(np.asarray(c), m.shape)[big] for c in counters]
        sel = np.empty((big.size, k), dtype=np.int64)
        for step in range(k):
            j = sizes - k + step
            t = np.minimum((uniform(key, *ctr, step) * (j + 1)).astype(np.int64), j)
            if step:
                t = np.where((sel[:, :step] == t[:, None]).any(axis=1), j, t)
            sel[:, step] = t
        out[big] = sel
    return out


# ---------------------------------------------------------------------------------------------
# choosing inside ranges of a candidate list
# ---------------------------------------------------------------------------------------------
def choose(policy, lo, hi, k, counters, keys, rows=None, logw=None):
    """Choose up to ``k`` entries of each range ``[lo[i], hi[i])`` of a candidate list.

    Parameters
    ----------
    policy : {"hardest", "random", "distance-weighted"}
        ``hardest`` takes the first ``k`` (the list is sorted by distance, then row);
        ``random`` a uniform sample without replacement (:func:`floyd`); ``distance-weighted`` a
        sample without replacement with probabilities proportional to ``exp(logw)``: the ``k``
        largest ``logw + Gumbel noise`` (Gumbel-top-k, equivalent to the weighted reservoir
        sampling of [1]_).
    lo, hi : ndarray of int64, shape (r,)
    k : int
    counters : tuple of arrays (or scalars) broadcastable to ``lo.shape``
        Coordinates of each range's draws (anchor row, positive row, regime code).
    keys : (uint64, uint64)
        Stream keys of the random and weighted draws.
    rows, logw : ndarray, optional
        Row position and log weight of every list entry (weighted only; the noise of an entry is
        drawn at its counters and row, so it does not depend on where the entry sits in the list).

    Returns
    -------
    owner, idx : ndarray of int64
        Range number and list position of each chosen entry.

    References
    ----------
    .. [1] P. S. Efraimidis, P. G. Spirakis, "Weighted random sampling with a reservoir",
       Information Processing Letters 97(5), 2006.
    """
    lengths = hi - lo
    if policy == "hardest":
        t = np.minimum(lengths, k)
        return np.repeat(np.arange(lo.size), t), np.repeat(lo, t) + ragged(t)
    if policy == "random":
        off = floyd(lengths, k, keys[0], *counters)
        owner, col = np.nonzero(off >= 0)
        return owner, lo[owner] + off[owner, col]
    owner = np.repeat(np.arange(lo.size), lengths)
    idx = np.repeat(lo, lengths) + ragged(lengths)
    ctr = [np.broadcast_to(np.asarray(c), lo.shape)[owner] for c in counters]
    score = logw[idx] + gumbel(uniform(keys[1], *ctr, rows[idx]))
    ok = np.isfinite(score)  # weight 0 (log -inf) is never drawn
    owner, idx, score = owner[ok], idx[ok], score[ok]
    pick = top_in_groups(owner, score, rows[idx], k)
    return owner[pick], idx[pick]


def choose_negatives(plan, pairs, lo, hi, rows, logw, code):
    """:func:`choose` with the run's policy, ``negatives_per_positive`` and streams.

    Parameters
    ----------
    plan : Plan
        The run (:class:`tripletkit.mining.plan.Plan`).
    pairs : ndarray of int64, shape (r,)
        The pair of each range.
    lo, hi : ndarray of int64, shape (r,)
        Ranges of the candidate list holding each pair's negatives in regime ``code``.
    rows, logw : ndarray or None
        Row and log weight of every list entry (distance-weighted only).
    code : int
        Regime code.

    Returns
    -------
    owner, idx : ndarray of int64
        As :func:`choose`.
    """
    return choose(plan.config.select, lo, hi, plan.negatives_per_positive,
                  (plan.pair_anchors[pairs], plan.pair_positives[pairs], code),
                  (plan.streams.random, plan.streams.weighted), rows, logw)


def top_in_groups(groups, score, rows, k):
    """Positions of the ``k`` entries of largest ``score`` (ties: smallest row) of each run of
    equal ``groups`` (sorted), in (group, -score, row) order.

    What a lexsort by (group, -score, row) would put first, found with ``k`` passes of a per-group
    maximum instead of a sort of every entry. Rows are distinct within a group (candidate rows of
    one anchor); entries of score -inf are never taken.
    """
    if not groups.size:
        return np.zeros(0, dtype=np.int64)
    first = _group_firsts(groups)
    starts = np.flatnonzero(first)
    member = np.cumsum(first) - 1  # group number of each entry
    live = score.astype(np.float64, copy=True)
    big = np.iinfo(np.int64).max
    found, steps = [], []
    for step in range(k):
        top = np.maximum.reduceat(live, starts)
        best = (live == top[member]) & np.isfinite(top[member])
        if not best.any():
            break
        low = np.minimum.reduceat(np.where(best, rows, big), starts)
        hit = np.flatnonzero(best & (rows == low[member]))
        live[hit] = -np.inf
        found.append(hit)
        steps.append(np.full(hit.size, step, dtype=np.int64))
    if not found:
        return np.zeros(0, dtype=np.int64)
    hit, step = np.concatenate(found), np.concatenate(steps)
    return hit[np.lexsort((step, groups[hit]))]


def distance_log_weights(d, dim, cutoff=0.5):
    """Log sampling weights of distance-weighted sampling [1]_, log min(lambda, 1/q(d)).

    Parameters
    ----------
    d : array-like of float
        Euclidean distances between unit vectors, in [0, 2].
    dim : int
        Embedding dimension n (>= 2).
    cutoff : float, default 0.5
        lambda = 1/q(cutoff): weights are capped at their value at this distance (0.5 is the
        cut-off of [1]_, from memory of the paper).

    Returns
    -------
    ndarray of float64
        log weights up to an additive constant, all finite.

    Notes
    -----
    q(d) ∝ d^(n-2) (1 - d^2/4)^((n-3)/2) is the density of the distance between two independent
    uniform points on the unit sphere in R^n. Sampling negatives with weight 1/q(d) spreads the
    chosen distances evenly instead of concentrating them near sqrt(2); the cap lambda keeps very
    close (often noisy) negatives from dominating.

    Distances are clipped to ``[0, 2 - 1e-6]``: in dimension 2, q diverges at d = 2 and an
    antipodal candidate would otherwise get weight 0, so a pair whose only candidates are
    antipodal would silently get no negative. After the clip it gets the smallest weight.

    References
    ----------
    .. [1] C.-Y. Wu, R. Manmatha, A. J. Smola, P. Kraehenbuehl, "Sampling Matters in Deep
       Embedding Learning", ICCV 2017, Sec. 4 (q(d), and the weights min(lambda, q(d)^-1)).
    """
    d = np.clip(np.asarray(d, dtype=np.float64), 0.0, 2.0 - _ANTIPODAL_GAP)
    return np.minimum(-_log_density(d, dim), -_log_density(np.float64(cutoff), dim))


def _log_density(d, n):
    """log q(d) up to a constant, with 0 * log(0) taken as 0 (n = 2 or 3)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.zeros(np.shape(d))
        if n != 2:
            out = out + (n - 2) * np.log(d)
        if n != 3:
            out = out + 0.5 * (n - 3) * np.log1p(-(d * d) / 4.0)
    return out


# ---------------------------------------------------------------------------------------------
# counting on ragged segments
# ---------------------------------------------------------------------------------------------
def ragged(counts):
    """Offsets 0..c-1 for each count, concatenated."""
    counts = np.asarray(counts, dtype=np.int64)
    total = int(counts.sum())
    starts = np.cumsum(counts) - counts
    return np.arange(total, dtype=np.int64) - np.repeat(starts, counts)


def count_below(values, lo, hi, x):
    """Per segment ``values[lo[i]:hi[i]]`` (ascending), how many values are < ``x[i]``."""
    left, right = lo.astype(np.int64).copy(), hi.astype(np.int64).copy()
    active = np.flatnonzero(left < right)
    while active.size:
        mid = (left[active] + right[active]) // 2
        below = values[mid] < x[active]
        left[active[below]] = mid[below] + 1
        right[active[~below]] = mid[~below]
        active = active[left[active] < right[active]]
    return left - lo


def _group_firsts(groups):
    """Boolean mask of the first element of each run of equal (sorted) ``groups`` (n >= 1)."""
    first = np.ones(groups.size, dtype=bool)
    first[1:] = groups[1:] != groups[:-1]
    return first


def rank_in_groups(groups):
    """0-based position of each element within its run of equal (sorted) ``groups``."""
    n = groups.size
    if not n:
        return np.zeros(0, dtype=np.int64)
    starts = np.flatnonzero(_group_firsts(groups))
    return np.arange(n, dtype=np.int64) - np.repeat(starts, np.diff(np.append(starts, n)))
