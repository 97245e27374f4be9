"""One block of query rows: its candidates, its chosen negatives, and its triplets in output order.

:func:`mine_block` is the task of a mining plan: given the plan and the index, the rows
``[start, stop)`` are mined independently of every other block. Hard and semi-hard candidates
come from the search path (:mod:`.search`) or the dense path (:mod:`.dense`), easy ones from
:mod:`.easy`; negatives are chosen by :mod:`.select`. The run merges the blocks' results in row
order (:class:`BlockResult`).
"""

from __future__ import annotations

import numpy as np

from .dense import dense_candidates
from .easy import easy_negatives
from .regimes import EASY, REGIMES, classify
from .search import search_candidates

__all__ = ["BlockResult", "mine_block"]


class BlockResult:
    """What one block found: its triplets and the counters the run adds up.

    Attributes
    ----------
    triplets : dict of str -> ndarray or None
        ``anchor``, ``positive``, ``negative`` (row positions), ``d_ap``, ``d_an``, ``violation``
        (float32) and ``regime`` (int8 codes), in output order; None when the block has none.
    regime_counts : ndarray of int64, shape (3,)
        Triplets per regime code.
    active : int
        Triplets with violation > 0.
    without : ndarray of int64, shape (3,)
        Per regime code, the pairs of the block's anchors with no negative in it.
    duplicates : list of (ndarray, ndarray, ndarray)
        Suspect duplicate pairs found: rows (smaller first) and their cosines; a pair may repeat.
    widened, easy_scanned, dense_rows : int
        Queries the search widened, pairs whose easy negatives were scanned, rows of the dense path.
    """

    def __init__(self):
        self.triplets = None
        self.regime_counts = np.zeros(len(REGIMES), dtype=np.int64)
        self.active = 0
        self.without = np.zeros(len(REGIMES), dtype=np.int64)
        self.duplicates = []
        self.widened = 0
        self.easy_scanned = 0
        self.dense_rows = 0
        self._picks = []

    def add(self, pairs, negatives, d_an, code):
        """Record chosen negatives: their pair numbers, rows and distances, all in regime ``code``."""
        self._picks.append((pairs, negatives, d_an, np.full(pairs.size, code, dtype=np.int8)))

    def add_duplicates(self, rows_a, rows_b, cosines):
        """Record suspect duplicate pairs (in either order) and their cosines."""
        self.duplicates.append((np.minimum(rows_a, rows_b), np.maximum(rows_a, rows_b), cosines))

    def finish(self, plan):
        """Put the picks in output order, check their regimes, and fill the triplets and counts.

        Output order: pair (anchor row, then positive row), regime in the order requested, d_an,
        negative row.
        """
        picks, self._picks = self._picks, []
        if not picks:
            return
        pair = np.concatenate([p[0] for p in picks])
        negative = np.concatenate([p[1] for p in picks])
        d_an = np.concatenate([p[2] for p in picks])
        code = np.concatenate([p[3] for p in picks]).astype(np.int8)
        order = np.lexsort((negative, d_an, plan.regime_position[code], pair))
        pair, negative, d_an, code = pair[order], negative[order], d_an[order], code[order]
        d_ap = plan.d_ap[pair]
        if not np.array_equal(classify(d_ap, d_an, plan.margin), code):  # an internal inconsistency
            raise RuntimeError("mined triplets disagree with the regime boundaries; please report this")
        violation = d_ap - d_an + plan.margin
        self.active += int((violation > 0).sum())
        self.regime_counts += np.bincount(code, minlength=len(REGIMES))
        self.triplets = {"anchor": plan.pair_anchors[pair], "positive": plan.pair_positives[pair],
                         "negative": negative, "d_ap": d_ap.astype(np.float32), "d_an": d_an.astype(np.float32),
                         "violation": violation.astype(np.float32), "regime": code}


def mine_block(plan, index, start, stop):
    """Mine the anchors in rows ``[start, stop)`` (and find the suspect duplicates of those rows).

    Parameters
    ----------
    plan : Plan
    index : SearchIndex
        The candidate index (unused by the dense path except for ``hardest`` easy negatives).
    start, stop : int

    Returns
    -------
    BlockResult
    """
    found = BlockResult()
    keep_topk = EASY in plan.regime_order and plan.config.select == "hardest"
    if plan.dense:
        topk = dense_candidates(plan, index, start, stop, keep_topk, found)
    else:
        topk = search_candidates(plan, index, start, stop, keep_topk, found)
    first, last = np.searchsorted(plan.anchors, [start, stop])
    pairs = np.arange(plan.pair_limits[first], plan.pair_limits[last], dtype=np.int64)
    if EASY in plan.regime_order and pairs.size:
        easy_negatives(plan, pairs, topk, start, found)
    found.finish(plan)
    return found
