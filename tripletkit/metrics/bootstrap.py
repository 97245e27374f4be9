"""Identity-level bootstrap of the verification intervals: FNMR at each FMR target, resampled by identity.

Pairs that share an identity are not independent, so identities, not pairs, are drawn with
replacement [1]_. In a replicate with multiplicities ``w_c``: a genuine pair of identity c counts
``w_c`` times; pairs between two copies of one identity are not formed (they would compare images
with themselves); the impostor count at a threshold, exactly ``sum_{c<c'} w_c w_c' N_cc'``, is
taken to first order in ``w - 1`` as ``sum_c w_c N_c - N`` (``N_c``: impostor pairs involving c),
with the same expansion for the impostor total. This needs only per-identity counts at a grid of
thresholds (:func:`threshold_grid`), not every identity pair. Each replicate's threshold is the
lowest grid threshold with FMR <= x and its FNMR is exact for that threshold; the interval is the
percentile interval of the replicates [2]_. Like every percentile interval over few clusters it
covers a little less than nominal: about 0.90-0.94 for a nominal 0.95 with 100 identities in the
simulation of tests/metrics/test_bootstrap.py.

References
----------
.. [1] R. M. Bolle, N. K. Ratha and S. Pankanti, "Error analysis of pattern recognition systems --
   the subsets bootstrap", Computer Vision and Image Understanding 93(1), 2004.
.. [2] B. Efron and R. J. Tibshirani, "An Introduction to the Bootstrap", Chapman & Hall, 1993
   (percentile interval).
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from .rates import resolvable

__all__ = ["Resampling", "window_factor", "threshold_grid", "bootstrap_fnmr", "per_identity_cells",
           "at_or_above", "below", "scores_bootstrap", "binned_bootstrap", "interval_table", "settings"]

# Most replicate x identity weights drawn at once.
_DRAW_CELLS = 2**22


class Resampling(NamedTuple):
    """Settings of the identity-level bootstrap."""

    replicates: int  # 0: no interval
    confidence: float  # coverage of the percentile interval
    seed: int | None  # seed of np.random.default_rng
    per_decade: int  # FMR levels per decade of the threshold grid


def window_factor(identities):
    """How far (a factor on FMR) the bootstrap grid reaches either side of each target.

    A replicate's FMR at the full-sample threshold moves by a relative amount that shrinks like
    ``1 / sqrt(k)`` for k identities (first-order expansion of the resampled count), with a
    constant set by how unevenly the high-scoring impostors spread over identities. We use
    ``exp(20 / sqrt(k))`` kept between 1.25 and 8: in the simulation of the tests (100
    identities) a factor of 4 still left about 0.5% of replicates at an end of the grid and 8
    none. Replicates whose threshold falls at an end of the grid are counted and reported.
    """
    return float(min(8.0, max(1.25, math.exp(20.0 / math.sqrt(max(identities, 1))))))


def threshold_grid(imp_ge, impostor_pairs, targets, per_decade, factor, max_levels=None):
    """Indices into ascending candidate thresholds used as the bootstrap's threshold grid.

    ``imp_ge[j]`` is the number of impostors at or above candidate ``j`` (non-increasing). The grid
    holds, for FMR levels spaced evenly in log from ``min(targets) / factor`` to
    ``factor * max(targets)`` (``per_decade`` per decade, at most ``max_levels``) and the
    targets themselves, the first candidate whose FMR is at most the level.
    """
    lo = max(min(targets) / factor, 0.5 / impostor_pairs)
    hi = max(lo, min(1.0, factor * max(targets)))
    levels = int(math.ceil(per_decade * math.log10(hi / lo))) + 1
    if max_levels is not None:
        levels = max(2, min(levels, max_levels))
    grid = np.concatenate([np.geomspace(lo, hi, levels), targets])
    idx = np.searchsorted(-imp_ge, -grid * impostor_pairs, side="left")
    idx = np.clip(idx, 0, imp_ge.size - 1)
    return np.unique(idx)


def bootstrap_fnmr(imp_ge_c, imp_ge, imp_c, impostor_pairs, gen_lt_c, gen_c, targets, resampling):
    """Percentile intervals of FNMR at each FMR target from identity-resampled replicates.

    Parameters
    ----------
    imp_ge_c : ndarray, shape (k, w)
        Impostor pairs involving identity c that score at or above grid threshold j (a pair
        counts for both of its identities).
    imp_ge : ndarray, shape (w,)
        All impostor pairs at or above grid threshold j.
    imp_c : ndarray, shape (k,)
        Impostor pairs involving identity c; ``impostor_pairs`` all impostor pairs.
    gen_lt_c : ndarray, shape (k, w)
        Genuine pairs of identity c scoring below grid threshold j; ``gen_c`` (k,) all of them.
    targets : list of float
    resampling : Resampling

    Returns
    -------
    dict
        target -> (``[lo, hi]`` or None, replicates with pairs, replicates at an end of the grid).
    """
    k, _ = imp_ge_c.shape
    rng = np.random.default_rng(resampling.seed)
    imp_ge_c = imp_ge_c.astype(np.float64)
    gen_lt_c = gen_lt_c.astype(np.float64)
    imp_c = imp_c.astype(np.float64)
    gen_c = gen_c.astype(np.float64)
    out = {x: [] for x in targets}
    edge = {x: 0 for x in targets}
    p = np.full(k, 1.0 / k)
    replicates = resampling.replicates
    chunk = max(1, min(replicates, int(_DRAW_CELLS // max(k, 1))))
    done = 0
    while done < replicates:
        r = min(chunk, replicates - done)
        w = rng.multinomial(k, p, size=r).astype(np.float64)
        done += r
        num = w @ imp_ge_c - imp_ge[None, :]
        den = w @ imp_c - impostor_pairs
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
    return {x: _percentile_interval(out[x], edge[x], resampling.confidence) for x in targets}


def _percentile_interval(parts, edge, confidence):
    values = np.concatenate(parts) if parts else np.empty(0)
    if values.size < 2:
        return None, 0, edge
    alpha = 1.0 - confidence
    lo, hi = np.percentile(values, [100 * alpha / 2, 100 * (1 - alpha / 2)])
    return [float(lo), float(hi)], int(values.size), edge


def per_identity_cells(cell, ident_a, ident_b, k, w):
    """(k, w) grid-cell counts per identity; a pair counts for both identities; cell -1 is dropped."""
    keep = cell >= 0
    acc = np.bincount(ident_a[keep] * w + cell[keep], minlength=k * w)
    acc += np.bincount(ident_b[keep] * w + cell[keep], minlength=k * w)
    return acc.reshape(k, w).astype(np.int64)


def at_or_above(cells):
    """(k, w) cell counts (cell j = [grid_j, grid_{j+1}), last cell open) -> counts >= grid_j."""
    return np.cumsum(cells[:, ::-1], axis=1)[:, ::-1]


def below(ident, cell, k, w):
    """(k, w) genuine counts per identity below grid_j, from each genuine pair's cell (-1 = below)."""
    c = np.bincount(ident * (w + 1) + (cell + 1), minlength=k * (w + 1)).reshape(k, w + 1)
    return np.cumsum(c, axis=1)[:, :-1].astype(np.int64)


def scores_bootstrap(genuine, genuine_identity, impostor, impostor_identities, identities, targets, resampling):
    """:func:`bootstrap_fnmr` of explicit scores, on a grid of the distinct impostor scores.

    ``genuine_identity`` and ``impostor_identities`` (a pair of arrays) hold identity codes
    0..identities-1 of each genuine and impostor pair.
    """
    imp_a, imp_b = impostor_identities
    k, n_imp = identities, impostor.size
    imp_sorted = np.sort(impostor)
    first = np.r_[True, imp_sorted[1:] != imp_sorted[:-1]]
    candidates = imp_sorted[first]
    cand_ge = n_imp - np.flatnonzero(first)  # impostors at or above each distinct value
    resolved = [x for x in targets if resolvable(x, n_imp)[0]] or targets
    grid_index = threshold_grid(cand_ge, n_imp, resolved, resampling.per_decade, window_factor(k))
    grid = candidates[grid_index]
    w = grid.size
    imp_cell = np.searchsorted(grid, impostor, side="right") - 1
    imp_ge_c = at_or_above(per_identity_cells(imp_cell, imp_a, imp_b, k, w))
    gen_lt_c = below(genuine_identity, np.searchsorted(grid, genuine, side="right") - 1, k, w)
    imp_c = np.bincount(imp_a, minlength=k) + np.bincount(imp_b, minlength=k)
    gen_c = np.bincount(genuine_identity, minlength=k)
    return bootstrap_fnmr(imp_ge_c, cand_ge[grid_index], imp_c, n_imp, gen_lt_c, gen_c, targets, resampling)


def binned_bootstrap(window_counts, grid_at_or_above, genuine_cells, genuine_identity, sizes, targets, resampling):
    """:func:`bootstrap_fnmr` of all pairs of a table, from counts per identity and grid cell.

    Parameters
    ----------
    window_counts : ndarray of int64, shape (k * w,)
        Impostor pairs per identity and grid cell (a pair counts for both of its identities).
    grid_at_or_above : ndarray, shape (w,)
        All impostor pairs at or above each grid threshold.
    genuine_cells : ndarray of int, shape (g,)
        Grid cell of each genuine pair (-1: below the grid), with ``genuine_identity`` its identity.
    sizes : ndarray of int64, shape (k,)
        Rows of each identity.
    """
    k, w = sizes.size, grid_at_or_above.size
    n = int(sizes.sum())
    n_imp = n * (n - 1) // 2 - int(np.sum(sizes * (sizes - 1) // 2))
    imp_ge_c = at_or_above(window_counts.reshape(k, w))
    gen_lt_c = below(genuine_identity, genuine_cells, k, w)
    return bootstrap_fnmr(imp_ge_c, grid_at_or_above, sizes * (n - sizes), n_imp, gen_lt_c, sizes * (sizes - 1) // 2,
                          targets, resampling)


def interval_table(targets, impostor_pairs, results, replicates, no_interval_reason):
    """Map target -> (interval or None, reason or None) from :func:`bootstrap_fnmr` results."""
    table = {}
    for x in targets:
        if not resolvable(x, impostor_pairs)[0]:
            continue
        if no_interval_reason is not None:
            table[x] = (None, no_interval_reason)
            continue
        interval, valid, edge = results[x]
        if interval is None:
            table[x] = (None, f"only {valid} of {replicates} bootstrap replicates had genuine pairs")
        elif edge > 0:
            table[x] = (interval, f"{edge} of {valid} replicates put the threshold at the end of the bootstrap grid")
        else:
            table[x] = (interval, None)
    return table


def settings(resampling, identities):
    """The ``bootstrap`` entry of a verification report: settings and method."""
    return {
        "replicates": int(resampling.replicates),
        "confidence": float(resampling.confidence),
        "seed": None if resampling.seed is None else int(resampling.seed),
        "identities": int(identities),
        "method": (
            "subject-level percentile bootstrap: identities resampled with replacement; genuine pairs of a "
            "drawn identity counted once per draw, no pairs between copies of one identity; impostor counts "
            "to first order in the draw weights"
        ),
    }
