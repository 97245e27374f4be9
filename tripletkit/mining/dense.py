"""The dense path: hard and semi-hard candidates of a block from its scores against every row.

On a poorly separated embedding (the first epochs of training) most anchors' search bands hold a
large share of the table, so nearly every anchor widens and the candidate lists approach rows x
rows. The dense path (chosen in :func:`tripletkit.mining.plan.make_plan`) scores a block of rows
against every row with one float32 product, orders each anchor's rows by a bin of that score (a
radix sort), and computes exact float64 cosines only where a decision needs them (``hardest``,
``random``) or for every row (``distance-weighted``, whose weights need them). Membership is
decided by the same cosines and the same counts, ranks and draws reach
:func:`~tripletkit.mining.select.choose`, so the output bytes are those of the search path.
"""

from __future__ import annotations

import numpy as np

from .cosines import exact_cosine, exact_cosine_rows, exact_scores
from .regimes import HARD, distance_from_cosine, euclidean
from .select import choose_negatives, distance_log_weights, ragged

__all__ = ["dense_candidates"]


def dense_candidates(plan, index, start, stop, keep_topk, found):
    """Duplicates and hard/semi-hard picks of rows ``[start, stop)`` against every row.

    The same decisions as the search path: a float32 product pre-selects the duplicate
    candidates (score >= ``duplicate_cosine`` - slack) and float64 cosines decide; the anchors'
    cosines with every row come from :func:`exact_cosine_rows`, bit for bit those of
    :func:`exact_cosine`. Parameters and return value as
    :func:`tripletkit.mining.search.search_candidates`.
    """
    embeddings, labels = plan.embeddings, plan.labels
    scores = exact_scores(embeddings, embeddings[start:stop])
    low = plan.duplicate_cosine - plan.slack
    hit = np.flatnonzero(scores.max(axis=1) >= low)  # most rows have no duplicate candidate
    qi, cols = np.nonzero(scores[hit] >= low)
    query_rows, cols = start + hit[qi].astype(np.int64), cols.astype(np.int64)
    other = labels[cols] != labels[query_rows]
    query_rows, cols = query_rows[other], cols[other]
    dup_rows, dup_cols = query_rows[:0], cols[:0]
    if query_rows.size:
        cos = exact_cosine(embeddings, query_rows, cols)
        duplicate = cos > plan.duplicate_cosine
        if duplicate.any():
            dup_rows, dup_cols = query_rows[duplicate], cols[duplicate]
            found.add_duplicates(dup_rows, dup_cols, cos[duplicate])
    topk = None
    if keep_topk:
        k = int(min(max(1, plan.config.neighbours), plan.n))
        D, I = index.search(embeddings[start:stop], k)
        topk = (D, I, index.topk_bound(D, I, k))
    found.dense_rows += stop - start
    anchors = plan.anchor_of_row[start:stop]
    local = np.flatnonzero(anchors >= 0)
    anchors = anchors[local]
    if not anchors.size:
        return topk
    if plan.config.select == "distance-weighted":
        del scores
        _weighted(plan, anchors, found)
    else:
        scores = scores[local] if local.size < scores.shape[0] else scores
        _ranked(plan, anchors, scores, dup_rows, dup_cols, found)
    return topk


def _bin_count(plan):
    """Bins of the dense path: (count nb, scale) with nb bins of 1 - cosine over [0, 2]."""
    # Approximate bin values are off by at most a quarter of a bin: the float32 score's error
    # (slack), the float32 rounding of 1 - score and of the product with the scale, and the
    # float64 rounding of a distance threshold; with windows of three bins that is what keeps
    # every cell outside a window on its side of the decision (see _BinnedRows).
    err = plan.slack + 3e-7 + 1e-12
    cap = int(2 * 0.25 / err)
    nb = int(max(2, min(16384, max(16, plan.n // 2), cap)))
    return nb, nb / 2.0


class _BinnedRows:
    """Every row of a block of anchors, ordered by a bin of its float32 score.

    Every row of an anchor gets the bin ``trunc(min((1 - s) * scale, nb - 1))`` of its float32
    score ``s``; rows of the anchor's identity (and suspect duplicates when those are excluded)
    go to a last bin ``nb``. A bin value is off the exact one, (1 - cos) * scale, by at most a
    quarter of a bin (:func:`_bin_count`). Hence for a distance threshold t in bin b_t every row
    in a bin <= b_t - 2 is closer than t and every row in a bin >= b_t + 2 is not: the count of
    rows with d < t is the rows of the bins below plus an exact count over the three bins
    b_t - 1 .. b_t + 1 (:meth:`count_below`). Likewise the row at rank g in (distance, row) order
    among the valid rows lies in the three bins around the bin holding rank g, and every row
    outside them ranks wholly before or after it (:meth:`window`). Rows are sorted by bin only (a
    linear-time radix sort of int16 keys), never by distance.
    """

    def __init__(self, plan, anchors, scores, dup_rows, dup_cols):
        self.plan = plan
        self.rows = plan.anchors[anchors]
        labels = plan.labels
        self.count, self.scale = _bin_count(plan)
        nb = self.count
        values = np.subtract(np.float32(1.0), scores, dtype=np.float32)
        values *= np.float32(self.scale)
        np.minimum(values, np.float32(nb - 1), out=values)
        bins = values.astype(np.int16)
        del values
        bins[labels[None, :] == labels[self.rows][:, None]] = nb  # sorted after every valid row
        if plan.config.exclude_duplicates and dup_rows.size:
            at = plan.anchor_of_row[dup_rows]
            where = np.searchsorted(anchors, at)
            ok = (at >= 0) & (where < anchors.size)
            ok[ok] = anchors[where[ok]] == at[ok]
            bins[where[ok], dup_cols[ok]] = nb
        self.order = np.argsort(bins, axis=1, kind="stable")  # radix sort; rows ascending within a bin
        self.cum = np.zeros((self.rows.size, nb + 2), dtype=np.int64)
        for i in range(self.rows.size):
            np.cumsum(np.bincount(bins[i], minlength=nb + 1), out=self.cum[i, 1:])

    def window(self, i, b):
        """Rows of bins b-1 .. b+1 of anchors ``i`` (one request each): the request of each row,
        its column, its exact distance, and per request the valid rows in the bins below."""
        lo = np.clip(b - 1, 0, self.count)
        hi = np.clip(b + 2, 0, self.count)
        start = self.cum[i, lo]
        lengths = self.cum[i, hi] - start
        owner = np.repeat(np.arange(i.size), lengths)
        cols = self.order[i[owner], np.repeat(start, lengths) + ragged(lengths)]
        dist = distance_from_cosine(exact_cosine(self.plan.embeddings, self.rows[i[owner]], cols),
                                    self.plan.distance)
        return owner, cols, dist, start

    def count_below(self, seg, t):
        """Per request, the valid rows of anchor ``seg`` closer than ``t``."""
        squared = t / 2.0 if self.plan.distance == "squared" else t * t / 2.0
        owner, _, dist, start = self.window(seg, np.floor(squared * self.scale).astype(np.int64))
        return start + np.bincount(owner[dist < t[owner]], minlength=seg.size)


def _ranked(plan, anchors, scores, dup_rows, dup_cols, found):
    """Hard and semi-hard picks of ``anchors`` (anchor numbers) for ``hardest`` and ``random``,
    from their float32 scores against every row (see :class:`_BinnedRows`).

    The counts and ranks are those of the search path's sorted candidate list, so
    :func:`~tripletkit.mining.select.choose` draws the same offsets and picks the same rows.
    """
    n = plan.n
    binned = _BinnedRows(plan, anchors, scores, dup_rows, dup_cols)
    nb = binned.count
    seg, pairs = plan.pairs_of(anchors)
    d_ap = plan.d_ap[pairs]
    n_hard = binned.count_below(seg, d_ap)
    n_band = binned.count_below(seg, d_ap + plan.margin)
    # rank r of anchor i sits at i * n + r in one list of every anchor's ordered rows
    starts = (np.arange(anchors.size, dtype=np.int64)[:, None] * n + binned.cum[:, :nb + 1]).ravel()
    base = seg * n
    for code in plan.searched:
        range_lo, range_hi = (base, base + n_hard) if code == HARD else (base + n_hard, base + n_band)
        found.without[code] += int((range_hi == range_lo).sum())
        chosen, idx = choose_negatives(plan, pairs, range_lo, range_hi, None, None, code)
        if not chosen.size:
            continue
        # rank -> (anchor, bin holding it) -> its window, sorted by (distance, column)
        flat_bin = np.searchsorted(starts, idx, side="right") - 1
        i, b = flat_bin // (nb + 1), flat_bin % (nb + 1)
        request, cols, dist, below = binned.window(i, b)
        srt = np.lexsort((cols, dist, request))
        first = np.searchsorted(request[srt], np.arange(i.size), side="left")
        at = srt[first + (idx - i * n - below)]
        found.add(pairs[chosen], cols[at], dist[at], code)


def _weighted(plan, anchors, found):
    """distance-weighted picks of ``anchors`` (anchor numbers).

    Every entry of a band needs its exact weight, so the anchors' float64 cosines with every row
    come from :func:`exact_cosine_rows` (bit for bit those of :func:`exact_cosine`); one pair slot
    (j-th pair of each anchor) at a time, and the draw of an entry hangs on its row, not on its
    place in the list.
    """
    labels = plan.labels
    rows = plan.anchors[anchors]
    cos = exact_cosine_rows(plan.embeddings, rows, plan.transposed)
    valid = labels[None, :] != labels[rows][:, None]
    if plan.config.exclude_duplicates:
        valid &= ~(cos > plan.duplicate_cosine)
    dist = distance_from_cosine(cos, plan.distance, overwrite=True)
    del cos
    seg, pairs = plan.pairs_of(anchors)
    slot = ragged(np.bincount(seg, minlength=dist.shape[0]))
    d_ap = plan.d_ap[pairs]
    for code in plan.searched:
        lowest = np.full(pairs.size, -np.inf) if code == HARD else d_ap
        highest = d_ap if code == HARD else d_ap + plan.margin
        for j in range(int(slot.max()) + 1 if slot.size else 0):
            w = np.flatnonzero(slot == j)
            i = seg[w]
            dj = dist[i]
            mask = valid[i] & (dj >= lowest[w, None]) & (dj < highest[w, None])
            oi, cols = np.nonzero(mask)
            dv = dj[oi, cols]
            del dj, mask
            lengths = np.bincount(oi, minlength=w.size)
            hi = np.cumsum(lengths)
            lo = hi - lengths
            found.without[code] += int((lengths == 0).sum())
            logw = distance_log_weights(euclidean(dv, plan.distance), plan.dim, plan.config.weighted_cutoff)
            chosen, idx = choose_negatives(plan, pairs[w], lo, hi, cols, logw, code)
            if chosen.size:
                found.add(pairs[w][chosen], cols[idx], dv[idx], code)
