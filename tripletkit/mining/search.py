"""The search path: hard and semi-hard candidates of a block of rows from the index's widening search.

Hard and semi-hard negatives of every pair of anchor ``a`` lie within the largest ``d_ap + alpha``
(semi-hard requested) or ``d_ap`` (hard only) of its pairs, i.e. above a cosine threshold, so one
search serves every regime: :meth:`~tripletkit.mining.index.SearchIndex.within_pieces` returns
every row above each query's threshold, and membership is decided on exact float64 cosines. Every
row is also a query at the duplicate threshold, so the same search finds the suspect duplicates.
"""

from __future__ import annotations

import numpy as np

from .cosines import exact_cosine
from .regimes import HARD, distance_from_cosine, euclidean
from .select import choose_negatives, count_below, distance_log_weights

__all__ = ["search_candidates"]


def search_candidates(plan, index, start, stop, keep_topk, found):
    """Duplicates and hard/semi-hard picks of the anchors in rows ``[start, stop)``.

    Parameters
    ----------
    plan : Plan
    index : SearchIndex
    start, stop : int
        The block of query rows.
    keep_topk : bool
        Return the first top-k result of the block (easy negatives of ``hardest`` use it).
    found : BlockResult
        Receives the picks, the duplicates and the counters.

    Returns
    -------
    tuple or None
        ``(D, I, bound)`` of the block's first top-k with ``keep_topk``, else None.
    """
    topk = None
    for sel, nb in index.within_pieces(plan.embeddings[start:stop], plan.thresholds[start:stop],
                                       plan.config.neighbours, memory_mb=plan.memory_mb, keep_topk=keep_topk):
        if nb.topk is not None:
            topk = nb.topk
        found.widened += nb.widened
        _piece(plan, start, sel, nb, found)
    return topk


def _piece(plan, start, sel, nb, found):
    """Duplicates and hard/semi-hard picks from one piece of the search (queries ``start + sel``)."""
    query_rows = start + np.repeat(sel, np.diff(nb.lims))
    rows = nb.rows
    other = plan.labels[rows] != plan.labels[query_rows]
    query_rows, rows = query_rows[other], rows[other]
    cos = exact_cosine(plan.embeddings, query_rows, rows)
    duplicate = cos > plan.duplicate_cosine
    if duplicate.any():
        found.add_duplicates(query_rows[duplicate], rows[duplicate], cos[duplicate])
    if not plan.searched:
        return
    # the candidate list: rows within each anchor's radius, sorted by (anchor, distance, row)
    owner = plan.anchor_of_row[query_rows]
    dist = distance_from_cosine(cos, plan.distance)
    keep = owner >= 0
    keep[keep] = dist[keep] < plan.radius[owner[keep]]
    if plan.config.exclude_duplicates:
        keep &= ~duplicate
    owner, rows, dist = owner[keep], rows[keep], dist[keep]
    order = np.lexsort((rows, dist, owner))
    owner, rows, dist = owner[order], rows[order], dist[order]
    anchors = plan.anchor_of_row[start + sel]
    anchors = anchors[anchors >= 0]
    if not anchors.size:
        return
    starts = np.searchsorted(owner, anchors, side="left")
    ends = np.searchsorted(owner, anchors, side="right")
    seg, pairs = plan.pairs_of(anchors)
    lo, hi = starts[seg], ends[seg]
    d_ap = plan.d_ap[pairs]
    n_hard = count_below(dist, lo, hi, d_ap)
    n_band = count_below(dist, lo, hi, d_ap + plan.margin)
    logw = None
    if plan.config.select == "distance-weighted":
        logw = distance_log_weights(euclidean(dist, plan.distance), plan.dim, plan.config.weighted_cutoff)
    for code in plan.searched:
        range_lo, range_hi = (lo, lo + n_hard) if code == HARD else (lo + n_hard, lo + n_band)
        found.without[code] += int((range_hi == range_lo).sum())
        chosen, idx = choose_negatives(plan, pairs, range_lo, range_hi, rows, logw, code)
        if chosen.size:
            found.add(pairs[chosen], rows[idx], dist[idx], code)
