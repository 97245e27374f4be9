"""Verification reports: error rates over all pairs, a pair list or score arrays, with identity-level intervals.

Three entries build the same report (the ``verification`` section of ``tripletkit score``):
:func:`verify_all_pairs` scores every pair of distinct rows of an embedding matrix without
listing them (the blocked plan of :mod:`.allpairs`, refined where it matters by :mod:`.refine`);
:func:`verify_pairs` scores a fixed protocol of (left, right) row pairs; :func:`verify_scores`
takes genuine and impostor scores directly. Every number comes from one table of score counts
(:mod:`.rates`); the intervals come from the identity-level bootstrap of :mod:`.bootstrap`.
Scores are the exact cosines of :mod:`tripletkit._exact`, so no number depends on block
shapes, threads, BLAS or process.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from .._errors import TripletkitError
from .._exact import pair_cosines, snap
from .._threads import InThreads
from .._validate import (
    as_codes, as_embeddings, as_positions, as_scores, check_bootstrap, check_confidence, check_fmr_targets,
    check_same_length, check_unit, whole_number,
)
from .allpairs import BlockPlan, Blocks, block_size, workers_for
from .bins import NBINS, SCORE_SCALE, keys_of, score_counts
from .bootstrap import Resampling, binned_bootstrap, interval_table, scores_bootstrap, threshold_grid, window_factor
from .rates import _count_exact, auc, fnmr_at_fmr, resolvable
from .refine import TopImpostors, choose_bins, operating_bins
from .section import (
    NO_BOOTSTRAP, GroupCounts, Request, build, degenerate, group_section, pair_group_counts, thresholds,
)

__all__ = ["DEFAULT_FMR_TARGETS", "verify_all_pairs", "verify_pairs", "verify_scores"]

DEFAULT_FMR_TARGETS = (1e-4, 1e-3, 1e-2)


def _request(fmr_targets, bootstrap, confidence, seed, curve_points, grid_per_decade):
    targets = check_fmr_targets(fmr_targets)
    replicates = check_bootstrap(bootstrap)
    confidence = check_confidence(confidence)
    curve_points = whole_number(curve_points, "curve_points", low=8)
    return Request(targets, curve_points, Resampling(replicates, confidence, seed, int(grid_per_decade)))


# ---------------------------------------------------------------------------------------------
# materialised scores: score arrays and pair lists
# ---------------------------------------------------------------------------------------------
class _Scores(NamedTuple):
    """Explicit scores (float64) with, optionally, their identities and pair groups."""

    genuine: np.ndarray
    impostor: np.ndarray
    genuine_identity: np.ndarray | None = None  # identity code of each genuine pair
    impostor_identities: tuple | None = None  # (left, right) identity codes of each impostor pair
    identities: int = 0
    genuine_group: np.ndarray | None = None  # group code of each pair, -1 across groups
    impostor_group: np.ndarray | None = None
    group_values: np.ndarray | None = None


def _materialised(scores, request):
    """Report from explicit score arrays."""
    n_gen, n_imp = scores.genuine.size, scores.impostor.size
    if n_gen == 0 or n_imp == 0:
        return degenerate(n_gen, n_imp, request.targets,
                          f"{n_gen} genuine and {n_imp} impostor pairs; error rates need at least one of each")
    counts = _count_exact(scores.genuine, scores.impostor)
    groups = None
    if scores.group_values is not None:
        at = thresholds(counts, request.targets)
        group_counts = pair_group_counts(scores.genuine, scores.genuine_group, scores.impostor,
                                         scores.impostor_group, len(scores.group_values), at)
        groups = group_section(scores.group_values, request.targets, at, group_counts)
    return build(counts, request, _materialised_intervals(scores, request), scores.identities, auc(counts), 0.0,
                 groups)


def _materialised_intervals(scores, request):
    resampling = request.resampling
    results, why = {}, None
    if resampling.replicates == 0:
        why = NO_BOOTSTRAP
    elif scores.genuine_identity is None:
        why = "identities of the scores were not given; no subject-level interval"
    elif scores.identities < 2:
        why = "fewer than 2 identities; no subject-level interval"
    else:
        results = scores_bootstrap(scores.genuine, scores.genuine_identity, scores.impostor,
                                   scores.impostor_identities, scores.identities, request.targets, resampling)
    return interval_table(request.targets, scores.impostor.size, results, resampling.replicates, why)


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
    fmr_targets, bootstrap, confidence, seed, curve_points, grid_per_decade
        As in :func:`verify_all_pairs`.

    Returns
    -------
    dict
        See :func:`verify_all_pairs`.
    """
    request = _request(fmr_targets, bootstrap, confidence, seed, curve_points, grid_per_decade)
    gen = as_scores(genuine, "genuine scores")
    imp = as_scores(impostor, "impostor scores")
    if (genuine_identity is None) != (impostor_identity is None):
        raise TripletkitError("give both genuine_identity and impostor_identity, or neither")
    if genuine_identity is None:
        return _materialised(_Scores(gen, imp), request)
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
    imp_a = codes[gen.size :: 2][: imp.size]
    imp_b = codes[gen.size + 1 :: 2][: imp.size]
    if np.any(imp_a == imp_b):
        first = int(np.flatnonzero(imp_a == imp_b)[0])
        raise TripletkitError(
            f"impostor score {first} has the same identity on both sides; impostor pairs need two identities"
        )
    return _materialised(_Scores(gen, imp, codes[: gen.size], (imp_a, imp_b), values.size), request)


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
        As in :func:`verify_all_pairs`.

    Returns
    -------
    dict
        See :func:`verify_all_pairs`. Scores are the exact cosines of :mod:`tripletkit._exact`,
        the same values :func:`verify_all_pairs` gives the same pairs.
    """
    request = _request(fmr_targets, bootstrap, confidence, seed, curve_points, grid_per_decade)
    rows = _rows(embeddings, labels, groups)
    lp = as_positions(left, rows.n, "left")
    rp = as_positions(right, rows.n, "right")
    check_same_length(left=lp, right=rp)
    selfpair = lp == rp
    if selfpair.any():
        first = int(np.flatnonzero(selfpair)[0])
        raise TripletkitError(f"pair {first} compares row {int(lp[first])} with itself; every pair needs two rows")
    is_gen = rows.codes[lp] == rows.codes[rp]
    if same is not None:
        _check_same(same, is_gen, lp, rp)
    scores = pair_cosines(snap(rows.embeddings), lp, rp)
    gen_grp = imp_grp = None
    if rows.group_codes is not None:
        gcodes = rows.group_codes
        pair_group = np.where(gcodes[lp] == gcodes[rp], gcodes[lp], -1)
        gen_grp, imp_grp = pair_group[is_gen], pair_group[~is_gen]
    codes = rows.codes
    return _materialised(_Scores(scores[is_gen], scores[~is_gen], codes[lp][is_gen],
                                 (codes[lp][~is_gen], codes[rp][~is_gen]), rows.identities.size,
                                 gen_grp, imp_grp, rows.group_values), request)


def _check_same(same, is_genuine, left, right):
    s = np.asarray(same)
    if s.shape != left.shape or s.dtype != np.bool_:
        raise TripletkitError(f"same must be a boolean array with one entry per pair ({left.size}), got "
                              f"dtype {s.dtype} and shape {s.shape}")
    wrong = s != is_genuine
    if wrong.any():
        first = int(np.flatnonzero(wrong)[0])
        raise TripletkitError(
            f"pair {first} (rows {int(left[first])}, {int(right[first])}) is marked same={bool(s[first])} but the "
            f"labels say {bool(is_genuine[first])}; {int(wrong.sum())} pairs disagree; fix the protocol or the labels"
        )


class _Rows(NamedTuple):
    """Checked rows: unit embeddings, identity codes and values, group codes and values (or None)."""

    embeddings: np.ndarray
    codes: np.ndarray
    identities: np.ndarray
    group_codes: np.ndarray | None
    group_values: np.ndarray | None

    @property
    def n(self):
        return self.embeddings.shape[0]


def _rows(embeddings, labels, groups):
    x = as_embeddings(embeddings)
    check_unit(x, "embeddings")
    codes, values = as_codes(labels, n=x.shape[0])
    gcodes = gvalues = None
    if groups is not None:
        gcodes, gvalues = as_codes(groups, n=x.shape[0], name="groups")
    return _Rows(x, codes, values, gcodes, gvalues)


# ---------------------------------------------------------------------------------------------
# all pairs
# ---------------------------------------------------------------------------------------------
def verify_all_pairs(embeddings, labels, *, groups=None, fmr_targets=DEFAULT_FMR_TARGETS, bootstrap=200,
                     confidence=0.95, seed=0, curve_points=512, memory_budget=256 * 2**20, block_rows=None,
                     exact_auc="auto", auc_budget=2**24, grid_per_decade=40, workers=None, engine=None):
    """Verification report over every pair of distinct rows, by blocked matrix product and counting.

    Parameters
    ----------
    embeddings : array-like of shape (n, d)
        Unit rows (norm 1 within 1e-3); scores are their exact cosines (:mod:`tripletkit._exact`).
    labels : array-like of shape (n,)
        Identity of each row: a pair is genuine when both rows share the label.
    groups : array-like of shape (n,), optional
        Subgroup of each row: ``groups`` in the report gives FMR and FNMR at each global
        threshold over the pairs whose two rows are both in the group.
    fmr_targets : sequence of float, default (1e-4, 1e-3, 1e-2)
        FMR operating points.
    bootstrap, confidence, seed, grid_per_decade : int, float, int, int, default 200, 0.95, 0, 40
        Replicates of the identity-level bootstrap of FNMR at each target (0: none), coverage of
        its percentile interval, its seed, and FMR levels per decade of its threshold grid
        (fewer when identities x levels would pass 8 million counts).
    curve_points : int, default 512
        About how many ROC/DET points to report (even in log FMR and in FNMR).
    exact_auc : {"auto", True, False}, default "auto"
        Which bins holding both genuine and impostor scores to list exactly for the AUC:
        ``True`` every one (within ``auc_budget``, even if that takes a second pass), ``"auto"``
        those from the lowest bin the operating points or the bootstrap need, ``False`` none.
        Unlisted bins count as ties; ``auc_error_bound`` bounds the error.
    auc_budget : int, default 2**24
        Most impostor scores to list for the AUC, the bins with most genuine x impostor pairs first.
    memory_budget, block_rows, workers, engine
        Memory and speed only: no number of the report depends on them (``passes`` may).
        ``memory_budget`` (default 256 MiB) holds the block buffers (13 bytes per score of a
        block and worker) and the impostors kept in the first pass (20 bytes each, up to
        :data:`~tripletkit.metrics.allpairs.KEEP_SHARE` of it); ``block_rows`` overrides the block
        size; ``workers`` groups of blocks run side by side (default: the engine's ``threads``,
        else one per CPU within the budget); ``engine`` runs them (:mod:`tripletkit.engines`;
        default ``LocalEngine(threads=workers)``, whose threads use one BLAS thread each).

    Returns
    -------
    dict
        ``genuine_pairs``, ``impostor_pairs``; ``auc``, ``auc_exact``, ``auc_error_bound``;
        ``eer``, ``eer_threshold``; ``fnmr_at_fmr``: ``{"0.001": {"fnmr", "threshold", "ci",
        "resolvable", "reason"}}``; ``roc`` (``fpr``, ``tpr``, ``threshold``) and ``det``
        (``fmr``, ``fnmr``), downsampled; ``score_histogram`` (``edges``, ``genuine``,
        ``impostor``: 200 bins over [-1, 1]); ``bootstrap`` (settings and method); ``passes``
        (1 or 2); ``groups`` with groups. Plain Python numbers; ``None`` with a ``reason`` where a
        value cannot be computed (no genuine or no impostor pairs also warns).

    Notes
    -----
    Definitions are those of :mod:`.rates` (FNMR at FMR: the lowest FNMR over thresholds with
    FMR <= x; a target with fewer than 3/x impostor pairs is not resolvable). The first pass
    counts every score into bins of width ``2**-18`` and keeps the genuine and the highest
    impostor scores; the exact scores of the bins holding an operating point come from the kept
    ones when they reach low enough (``passes`` 1), else from a second pass (:mod:`.refine`), so
    FNMR at FMR, its thresholds and the EER are what sorting every score would give. Intervals:
    :mod:`.bootstrap`. Memory is O(n*d + workers*block*n + bins + genuine pairs + kept
    impostors + identities * grid).
    """
    request = _request(fmr_targets, bootstrap, confidence, seed, curve_points, grid_per_decade)
    block_rows = whole_number(block_rows, "block_rows", low=1, allow_none=True)
    if not (isinstance(memory_budget, (int, np.integer)) and memory_budget >= 1 << 20):
        raise TripletkitError(f"memory_budget must be a number of bytes >= 1 MiB, got {memory_budget!r}")
    if exact_auc not in ("auto", True, False):
        raise TripletkitError(f"exact_auc must be 'auto', True or False, got {exact_auc!r}")
    rows = _rows(embeddings, labels, groups)
    workers = whole_number(workers, "workers", low=1, allow_none=True)
    sizes = np.bincount(rows.codes, minlength=rows.identities.size).astype(np.int64)
    n_gen = int(np.sum(sizes * (sizes - 1) // 2))
    n_imp = rows.n * (rows.n - 1) // 2 - n_gen
    if n_gen == 0 or n_imp == 0:
        why = ("no genuine pairs: every identity has one row" if n_gen == 0
               else "no impostor pairs: all rows share one identity")
        return degenerate(n_gen, n_imp, request.targets, why)
    plan = _block_plan(rows, memory_budget, block_rows, workers, engine)
    return _all_pairs_section(rows, sizes, plan, request, exact_auc, auc_budget)


def _block_plan(rows, memory_budget, block_rows, workers, engine):
    """The groups of blocks and the engine that runs them (memory and speed only)."""
    block = block_size(rows.n, block_rows, memory_budget)
    if workers is None:
        workers = getattr(engine, "threads", None) or workers_for(rows.n, block, memory_budget)
    if engine is None:  # a direct caller's default; the verbs choose their engine
        engine = InThreads(threads=workers)
    return BlockPlan(Blocks(rows.embeddings, rows.codes, rows.group_codes, block), engine, workers, memory_budget)


class _Genuine(NamedTuple):
    """Every genuine pair: exact score, bin, identity code and pair group (-1 across; None without)."""

    scores: np.ndarray
    keys: np.ndarray
    identity: np.ndarray
    group: np.ndarray | None


class _Listed(NamedTuple):
    """The exact impostor scores of the chosen bins, their bins and pair groups (None without)."""

    scores: np.ndarray
    keys: np.ndarray
    group: np.ndarray | None


def _all_pairs_section(rows, sizes, plan, request, exact_auc, auc_budget):
    """Count, refine and assemble: the body of :func:`verify_all_pairs` on checked input."""
    n_gen = int(np.sum(sizes * (sizes - 1) // 2))
    n_imp = rows.n * (rows.n - 1) // 2 - n_gen
    identities = rows.identities.size
    resolved = [x for x in request.targets if resolvable(x, n_imp)[0]]
    top = _top_impostors(plan, request.resampling, identities, resolved, n_imp)
    first = plan.count(top)
    genuine, gen_hist, imp_hist = _split_first_pass(first, n_gen, n_imp)
    grid_keys, why = _bootstrap_grid(imp_hist, n_imp, identities, resolved, request.resampling)
    op_bins = operating_bins(imp_hist, resolved, n_imp)
    n_groups = 0 if rows.group_values is None else rows.group_values.size
    listing = choose_bins(gen_hist, imp_hist, op_bins, grid_keys, identities, n_groups, exact_auc, auc_budget)
    one_pass = top is not None and listing.lowest >= top.complete_from()
    if one_pass:
        refiner = plan.list_kept(listing.selection, top)
    del top  # the kept impostors are not needed any more
    if not one_pass:
        refiner = plan.list_bins(listing.selection, first.histogram, n_gen + n_imp)
    listed = _listed(refiner, listing.collect_bins, imp_hist)
    counts = score_counts(genuine.scores, genuine.keys, listed.scores, listing.collect_bins, gen_hist, imp_hist)
    results = {}
    if grid_keys is not None:
        grid_at_or_above = np.cumsum(imp_hist[::-1])[::-1][grid_keys]
        cells = np.searchsorted(grid_keys, genuine.keys, side="right") - 1
        results = binned_bootstrap(refiner.win, grid_at_or_above, cells, genuine.identity, sizes, resolved,
                                   request.resampling)
    intervals = interval_table(request.targets, n_imp, results, request.resampling.replicates, why)
    groups = None
    if rows.group_values is not None:
        at = {x: fnmr_at_fmr(counts, x)[1] for x in resolved}
        group_counts = _all_pairs_group_counts(rows, at, genuine, listed, refiner, listing, op_bins)
        groups = group_section(rows.group_values, request.targets, at, group_counts)
    section = build(counts, request, intervals, identities, auc(counts), _auc_error_bound(gen_hist, imp_hist, listing),
                    groups)
    section["passes"] = 1 if one_pass else 2
    return section


def _auc_error_bound(gen_hist, imp_hist, listing):
    """Half the (genuine x impostor) pairs of the bins holding both whose scores were not listed,
    as a share of all: how far the AUC with those bins counted as ties can be off."""
    both = np.flatnonzero((gen_hist > 0) & (imp_hist > 0))
    unrefined = both[~np.isin(both, listing.collect_bins)]
    pairs = int(gen_hist.sum()) * int(imp_hist.sum())
    return float(0.5 * np.sum(gen_hist[unrefined].astype(np.float64) * imp_hist[unrefined]) / pairs)


def _top_impostors(plan, resampling, identities, resolved, impostor_pairs):
    """An empty :class:`TopImpostors` for as many of the highest impostor scores as the operating
    points and the bootstrap window need, or None when they do not fit the budget."""
    with_ci = resampling.replicates > 0 and identities >= 2 and bool(resolved)
    top_share = max(resolved) * (window_factor(identities) if with_ci else 1.0) if resolved else 0.0
    keep = int(math.ceil(1.1 * top_share * impostor_pairs)) + 4096
    return TopImpostors(keep, impostor_pairs, plan.chunk) if plan.keeps(keep) else None


def _split_first_pass(first, genuine_pairs, impostor_pairs):
    """The genuine pairs, and the genuine and impostor counts per bin, of the first pass."""
    keys = keys_of(first.genuine).astype(np.int64)
    scores = first.genuine.astype(np.float64) / SCORE_SCALE  # exact: undoes a power-of-two scaling
    gen_hist = np.bincount(keys, minlength=NBINS).astype(np.int64)
    imp_hist = first.histogram - gen_hist
    imp_hist[0] = 0
    if scores.size != genuine_pairs or int(imp_hist.sum()) != impostor_pairs:
        raise RuntimeError("internal error: pair counts of the blocked pass do not add up")
    return _Genuine(scores, keys, first.genuine_identity, first.genuine_group), gen_hist, imp_hist


def _bootstrap_grid(imp_hist, impostor_pairs, identities, resolved, resampling):
    """Bins of the bootstrap's threshold grid (lower edges of non-empty impostor bins), or None
    with the reason why there is no interval."""
    if resampling.replicates == 0:
        return None, NO_BOOTSTRAP
    if identities < 2:
        return None, "fewer than 2 identities; no subject-level interval"
    if not resolved:
        return None, "no resolvable FMR target"
    candidates = np.flatnonzero(imp_hist)
    at_or_above_bin = np.cumsum(imp_hist[::-1])[::-1]
    # per-identity counts take identities x grid int64s: keep them within 64 MiB
    grid = threshold_grid(at_or_above_bin[candidates], impostor_pairs, resolved, resampling.per_decade,
                          window_factor(identities), max_levels=max(16, (8 * 2**20) // identities))
    return candidates[grid], None


def _listed(refiner, collect_bins, imp_hist):
    """The refiner's listed scores, checked against the first pass's counts."""
    scaled, keys, group = refiner.finish()
    listed = np.bincount(keys.astype(np.int64), minlength=NBINS)
    if not np.array_equal(listed[collect_bins], imp_hist[collect_bins]):
        raise RuntimeError("internal error: the listed scores do not match the first pass's counts")
    return _Listed(scaled.astype(np.float64) / SCORE_SCALE, keys, group)


def _all_pairs_group_counts(rows, at, genuine, listed, refiner, listing, op_bins):
    """:class:`GroupCounts` from the group codes, the genuine scores, the group window counts and
    the listed scores of each operating bin."""
    gcodes, codes = rows.group_codes, rows.codes
    ng = rows.group_values.size
    # pairs within a group: C(n_g, 2) in all, of which sum_c C(n_gc, 2) genuine
    n_g = np.bincount(gcodes, minlength=ng).astype(np.int64)
    joint = np.bincount(gcodes * (codes.max() + 1) + codes, minlength=ng * (codes.max() + 1)).astype(np.int64)
    gen_g = (joint * (joint - 1) // 2).reshape(ng, -1).sum(axis=1)
    imp_g = n_g * (n_g - 1) // 2 - gen_g
    window = None if refiner.gwin is None else refiner.gwin.reshape(ng, listing.selection.group_cells)
    gen_lt, imp_ge = {}, {}
    for x, t in at.items():
        sel = (genuine.group >= 0) & (genuine.scores < t)
        gen_lt[x] = np.bincount(genuine.group[sel], minlength=ng)
        if x in op_bins:
            b = op_bins[x]
            cell = 2 * int(np.searchsorted(listing.op_bins, b)) + 1  # the cell of bin b itself
            above = window[:, cell + 1 :].sum(axis=1)
            inbin = (listed.keys == b) & (listed.group >= 0) & (listed.scores >= t)
            imp_ge[x] = above + np.bincount(listed.group[inbin], minlength=ng)
        else:
            imp_ge[x] = imp_g.copy()  # threshold at the lowest score: every impostor is accepted
    return GroupCounts(gen_g, imp_g, gen_lt, imp_ge)
