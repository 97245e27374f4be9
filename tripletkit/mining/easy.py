"""Easy negatives: plentiful and far away, so they are drawn or scanned, not searched.

``random`` draws them by rejection sampling from the rows of other identities (up to
:data:`EASY_ROUNDS` rounds of proposals, doubling each round, then an exact scan of all rows for
the pairs still short); ``hardest`` takes the nearest easy ones from the block's first top-k when
it provably holds them, else from an exact scan; ``distance-weighted`` needs every easy negative's
weight, so it always scans all rows (one exact pass plus work proportional to pairs x rows).
"""

from __future__ import annotations

import numpy as np

from .cosines import exact_cosine, exact_scores
from .regimes import EASY, cosine_at, distance_from_cosine, euclidean
from .select import distance_log_weights, gumbel, rank_in_groups, uniform

__all__ = ["EASY_ROUNDS", "easy_negatives"]

#: Rejection rounds for random easy negatives before the exact scan takes over.
EASY_ROUNDS = 6


def easy_negatives(plan, pairs, topk, start, found):
    """Easy picks of ``pairs`` (pair numbers of the anchors of a block starting at row ``start``).

    Parameters
    ----------
    plan : Plan
    pairs : ndarray of int64
    topk : tuple or None
        The block's first top-k ``(D, I, bound)`` (``hardest`` only).
    start : int
        First row of the block (row ``start + q`` is query ``q`` of ``topk``).
    found : BlockResult
        Receives the picks and the counters.
    """
    policy = plan.config.select
    k = plan.negatives_per_positive
    taken = np.full((pairs.size, k), -1, dtype=np.int64)
    others = plan.n - plan.identity_sizes[plan.labels[plan.pair_anchors[pairs]]]
    if policy == "random":
        taken = _by_rejection(plan, pairs, others)
        todo = ((taken >= 0).sum(axis=1) < k) & (others > 0)
    elif policy == "hardest":
        taken, settled = _nearest_from_topk(plan, pairs, topk, start)
        todo = ~settled & (others > 0)
        taken[todo] = -1
    else:
        todo = others > 0
    if todo.any():
        idx = np.flatnonzero(todo)
        taken[idx] = _by_scan(plan, pairs[idx], taken[idx])
        found.easy_scanned += int(idx.size)
    got = (taken >= 0).sum(axis=1)
    found.without[EASY] += int((got == 0).sum())
    owner, col = np.nonzero(taken >= 0)
    if owner.size:
        negatives = taken[owner, col]
        dist = distance_from_cosine(exact_cosine(plan.embeddings, plan.pair_anchors[pairs[owner]], negatives),
                                    plan.distance)
        found.add(pairs[owner], negatives, dist, EASY)


def _other_row(plan, label, j):
    """The j-th row (in label order) among rows whose label is not ``label``."""
    first = plan.label_start[label]
    g = np.where(j < first, j, j + plan.identity_sizes[label])
    return plan.rows_by_label[g]


def _by_rejection(plan, pairs, others):
    """Uniform easy negatives without replacement by rejection sampling (unfilled: -1)."""
    k = plan.negatives_per_positive
    a, p = plan.pair_anchors[pairs], plan.pair_positives[pairs]
    anchor_labels = plan.labels[a]
    bound = plan.d_ap[pairs] + plan.margin
    taken = np.full((pairs.size, k), -1, dtype=np.int64)
    filled = np.zeros(pairs.size, dtype=np.int64)
    for rnd in range(EASY_ROUNDS):
        act = np.flatnonzero((filled < k) & (others > 0))
        if not act.size:
            break
        slots = k * 2 ** (rnd + 1)
        u = uniform(plan.streams.easy, a[act, None], p[act, None], rnd, np.arange(slots)[None, :])
        j = np.minimum((u * others[act, None]).astype(np.int64), others[act, None] - 1)
        cand = _other_row(plan, anchor_labels[act, None], j)
        cos = exact_cosine(plan.embeddings, np.repeat(a[act], slots), cand.ravel()).reshape(cand.shape)
        ok = distance_from_cosine(cos, plan.distance) >= bound[act, None]
        if plan.config.exclude_duplicates:
            ok &= ~(cos > plan.duplicate_cosine)
        ok &= ~(cand[:, :, None] == taken[act][:, None, :]).any(axis=2)
        # keep only the first proposal of a row within this round (sampling without replacement)
        srt = np.argsort(cand, axis=1, kind="stable")
        cs = np.take_along_axis(cand, srt, axis=1)
        first_sorted = np.ones(cand.shape, dtype=bool)
        first_sorted[:, 1:] = cs[:, 1:] != cs[:, :-1]
        first = np.empty_like(first_sorted)
        np.put_along_axis(first, srt, first_sorted, axis=1)
        ok &= first
        c = np.cumsum(ok, axis=1)
        room = k - filled[act]
        take = ok & (c <= room[:, None])
        ti, tj = np.nonzero(take)
        taken[act[ti], filled[act[ti]] + c[ti, tj] - 1] = cand[ti, tj]
        filled[act] += take.sum(axis=1)
    return taken


def _nearest_from_topk(plan, pairs, topk, start):
    """Nearest easy negatives from the first top-k, and whether the top-k provably holds them."""
    k = plan.negatives_per_positive
    D, I, bound = topk
    a = plan.pair_anchors[pairs]
    q = a - start
    cand = I[q]
    valid = (cand >= 0)
    valid[valid] = plan.labels[cand[valid]] != np.repeat(plan.labels[a], valid.sum(axis=1))
    pi, cj = np.nonzero(valid)
    rows = cand[pi, cj]
    cos = exact_cosine(plan.embeddings, a[pi], rows)
    dist = distance_from_cosine(cos, plan.distance)
    ok = dist >= plan.d_ap[pairs][pi] + plan.margin
    if plan.config.exclude_duplicates:
        ok &= ~(cos > plan.duplicate_cosine)
    pi, rows, dist, cos = pi[ok], rows[ok], dist[ok], cos[ok]
    order = np.lexsort((rows, dist, pi))
    pi, rows, cos = pi[order], rows[order], cos[order]
    first = rank_in_groups(pi) < k
    pi, rows, cos = pi[first], rows[first], cos[first]
    taken = np.full((pairs.size, k), -1, dtype=np.int64)
    taken[pi, rank_in_groups(pi)] = rows
    got = np.bincount(pi, minlength=pairs.size)
    last = np.full(pairs.size, np.inf)
    if pi.size:
        # rows are in (pair, distance) order: the last of each pair is its farthest choice
        end = np.ones(pi.size, dtype=bool)
        end[:-1] = pi[1:] != pi[:-1]
        last[pi[end]] = cos[end]
    b = bound[q]
    settled = np.isneginf(b) | ((got == k) & (last > b))
    return taken, settled


def _by_scan(plan, pairs, taken):
    """Exact easy negatives for ``pairs`` by scanning every row (``taken`` rows are kept)."""
    k = plan.negatives_per_positive
    n = plan.n
    out = taken.copy()
    policy = plan.config.select
    # half the budget for the (pairs, n) scores, masks, keys and hash temporaries (~64 bytes a cell)
    chunk = int(max(1, min(4096, plan.memory_mb * 2 ** 20 // (128 * n))))
    cols = np.arange(n, dtype=np.int64)
    for c0 in range(0, pairs.size, chunk):
        chunk_pairs = pairs[c0:c0 + chunk]
        tk = out[c0:c0 + chunk]
        a, p = plan.pair_anchors[chunk_pairs], plan.pair_positives[chunk_pairs]
        ua, inv = np.unique(a, return_inverse=True)
        scores = exact_scores(plan.embeddings, plan.embeddings[ua])[inv]
        bound = plan.d_ap[chunk_pairs] + plan.margin
        valid = plan.labels[None, :] != plan.labels[a][:, None]
        valid &= _refined(plan, scores, a, cosine_at(bound, plan.distance),
                          lambda cos, i: distance_from_cosine(cos, plan.distance) >= bound[i])
        if plan.config.exclude_duplicates:
            dup_thr = np.full(chunk_pairs.size, plan.duplicate_cosine)
            valid &= ~_refined(plan, scores, a, dup_thr, lambda cos, i: cos > plan.duplicate_cosine, above=True)
        ti, tj = np.nonzero(tk >= 0)
        valid[ti, tk[ti, tj]] = False
        need = k - (tk >= 0).sum(axis=1)
        if policy == "random":
            key = uniform(plan.streams.scan, a[:, None], p[:, None], cols[None, :])
        elif policy == "hardest":
            key = scores.astype(np.float64)
        else:
            d32 = distance_from_cosine(scores.astype(np.float64), plan.distance)
            key = (distance_log_weights(euclidean(d32, plan.distance), plan.dim, plan.config.weighted_cutoff)
                   + gumbel(uniform(plan.streams.weighted, a[:, None], p[:, None], EASY, cols[None, :])))
        key = np.where(valid, key, -np.inf)
        del scores
        m = min(k, n)
        top = np.argpartition(-key, m - 1, axis=1)[:, :m]
        tkey = np.take_along_axis(key, top, axis=1)
        if policy == "hardest":
            chosen = _exact_hardest(plan, a, key, tkey, need)
        else:
            order = np.argsort(-tkey, axis=1, kind="stable")
            top, tkey = np.take_along_axis(top, order, axis=1), np.take_along_axis(tkey, order, axis=1)
            ok = np.isfinite(tkey) & (np.arange(m)[None, :] < need[:, None])
            chosen = np.where(ok, top, -1)
        # rows already taken first, then the new choices; -1 padding last
        comb = np.concatenate([tk, chosen], axis=1)
        order = np.argsort(comb < 0, axis=1, kind="stable")
        tk = np.take_along_axis(comb, order, axis=1)[:, :k]
        out[c0:c0 + chunk] = tk
    return out


def _refined(plan, scores, a, thr, exact_test, above=False):
    """Boolean (pairs, rows): score below ``thr`` (or above it, ``above=True``), with entries
    within the float32 slack of the threshold decided by ``exact_test`` on float64 cosines."""
    lo = (thr - plan.slack)[:, None]
    hi = (thr + plan.slack)[:, None]
    res = (scores > hi) if above else (scores < lo)
    unsure = (scores >= lo) & (scores <= hi)
    ui, uj = np.nonzero(unsure)
    if ui.size:
        cos = exact_cosine(plan.embeddings, a[ui], uj)
        res[ui, uj] = exact_test(cos, ui)
    return res


def _exact_hardest(plan, a, key, tkey, need):
    """The ``need`` valid rows of smallest exact distance per pair (ties by row position).

    float32 order is trusted only outside the slack band: every valid row within 2 * slack of
    the need-th best float32 score is re-ranked by its exact distance (a row below that has
    an exact cosine below at least ``need`` others).
    """
    k = tkey.shape[1]
    out = np.full((a.size, k), -1, dtype=np.int64)
    srt = -np.sort(-tkey, axis=1)
    kth = srt[np.arange(a.size), np.clip(need - 1, 0, k - 1)]
    cut = kth - 2 * plan.slack
    pi, rj = np.nonzero(np.isfinite(key) & (key >= cut[:, None]) & (need[:, None] > 0))
    if not pi.size:
        return out
    dist = distance_from_cosine(exact_cosine(plan.embeddings, a[pi], rj), plan.distance)
    order = np.lexsort((rj, dist, pi))
    pi, rj = pi[order], rj[order]
    rank = rank_in_groups(pi)
    keep = rank < need[pi]
    out[pi[keep], rank[keep]] = rj[keep]
    return out
