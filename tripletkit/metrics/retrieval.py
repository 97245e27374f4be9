"""Retrieval metrics, each query left out of its own gallery: Recall@K, R-precision, MAP@R.

Every row is a query against all other rows (the gallery), ranked by cosine similarity with an
exact faiss inner-product index (``faiss.IndexFlatIP``) searched in blocks of queries. For a query
of identity c, ``R`` is the number of *other* rows of identity c. Queries with ``R = 0`` (the
only row of their identity) have nothing to retrieve: they are skipped and counted in
``skipped_queries``.

* ``recall_at_k[K]``: share of queries with at least one row of their identity among the K
  nearest others (the convention of metric-learning papers, e.g. Oh Song et al., CVPR 2016;
  for K = 1 it is the leave-one-out accuracy of a 1-nearest-neighbour classifier).
* ``r_precision``: mean over queries of ``r / R``, ``r`` = rows of the identity among the R
  nearest others.
* ``map_at_r``: mean over queries of ``(1/R) * sum_{i=1..R} P(i) * rel(i)`` with ``P(i)`` the
  precision among the first i results and ``rel(i)`` = 1 when result i shares the identity.

Ties. Neighbours with equal scores are ranked by row position (lower first) within what faiss
returns; at the cut-off (the K-th or R-th place) faiss decides which of several tied rows are
returned. With continuous embeddings exact ties are rare; with duplicated rows they are not, and a
metric can then move by the share of queries whose cut-off falls inside a tie.

References
----------
.. [1] K. Musgrave, S. Belongie and S.-N. Lim, "A Metric Learning Reality Check", ECCV 2020
   (R-precision and MAP@R).
.. [2] H. Oh Song, Y. Xiang, S. Jegelka and S. Savarese, "Deep Metric Learning via Lifted
   Structured Feature Embedding", CVPR 2016 (Recall@K).
.. [3] J. Johnson, M. Douze and H. Jegou, "Billion-scale similarity search with GPUs", IEEE
   Transactions on Big Data, 2019 (faiss).
"""

from __future__ import annotations

import math
import warnings

import faiss
import numpy as np

from .._errors import TripletkitError, TripletkitWarning
from .._validate import as_codes, as_embeddings

__all__ = ["retrieval_metrics", "DEFAULT_KS"]

DEFAULT_KS = (1, 5, 10)


def _check_ks(ks):
    try:
        vals = sorted({int(k) for k in ks})
    except (TypeError, ValueError):
        raise TripletkitError(f"ks must be a list of whole numbers, got {ks!r}") from None
    if not vals or vals[0] < 1 or any(float(k) != int(k) for k in ks):
        raise TripletkitError(f"ks must be whole numbers >= 1, got {list(ks)!r}; e.g. [1, 5, 10]")
    return vals


def _drop_self(ids, scores, queries):
    """Remove each query from its own result row and rank ties by row position.

    ``ids``/``scores``: (q, k+1) faiss results; ``queries``: (q,) the query rows. Returns the
    (q, k) neighbour ids, best first.
    """
    q, k1 = ids.shape
    # order by (score descending, row position ascending)
    order = np.lexsort((ids, -scores), axis=1)
    ids = np.take_along_axis(ids, order, axis=1)
    is_self = ids == queries[:, None]
    # a query missing from its results (more than k rows tie at its own score) loses the last one
    is_self[~is_self.any(axis=1), k1 - 1] = True
    return ids[~is_self].reshape(q, k1 - 1)


def _hits_metrics(hits, r, ks):
    """Per-query Recall@K hits, R-precision and AP@R from a (q, depth) hit matrix and R (q,)."""
    depth = hits.shape[1]
    ranks = np.arange(1, depth + 1)
    within_r = ranks[None, :] <= r[:, None]
    rec = {k: hits[:, : min(k, depth)].any(axis=1) for k in ks}
    rprec = (hits & within_r).sum(axis=1) / r
    prec_at = np.cumsum(hits, axis=1) / ranks[None, :]
    ap = (prec_at * (hits & within_r)).sum(axis=1) / r
    return rec, rprec, ap


def retrieval_metrics(embeddings, labels, *, ks=DEFAULT_KS, memory_budget=256 * 2**20, block_rows=None):
    """Recall@K, R-precision and MAP@R with each query left out of its own gallery.

    Parameters
    ----------
    embeddings : array-like of shape (n, d)
        Unit-normalised embeddings (inner product = cosine similarity).
    labels : array-like of shape (n,)
        Identity of each row.
    ks : sequence of int, default (1, 5, 10)
        Cut-offs for Recall@K.
    memory_budget : int, default 256 MiB
        Bytes for one block of search results (12 bytes per returned neighbour).
    block_rows : int, optional
        Queries per faiss search, overriding ``memory_budget``.

    Returns
    -------
    dict
        ``recall_at_k`` (dict keyed ``"1"``, ``"5"``, ...), ``r_precision``, ``map_at_r``
        (floats, or ``None`` with ``reason`` when no query has another row of its identity),
        ``queries`` (scored) and ``skipped_queries`` (R = 0).

    References
    ----------
    .. [1] K. Musgrave, S. Belongie and S.-N. Lim, "A Metric Learning Reality Check", ECCV 2020.
    """
    vals = _check_ks(ks)
    x = as_embeddings(embeddings)
    n, d = x.shape
    codes, _ = as_codes(labels, n=n)
    if block_rows is not None and (isinstance(block_rows, bool) or not isinstance(block_rows, (int, np.integer))
                                   or block_rows < 1):
        raise TripletkitError(f"block_rows must be a whole number >= 1, got {block_rows!r}")
    sizes = np.bincount(codes)
    r_all = sizes[codes] - 1
    queries = np.flatnonzero(r_all > 0)
    skipped = n - queries.size
    if queries.size == 0:
        reason = "no query has another row of its identity (every identity has one row)"
        warnings.warn(f"retrieval: {reason}", TripletkitWarning, stacklevel=2)
        return {"recall_at_k": {str(k): None for k in vals}, "r_precision": None, "map_at_r": None,
                "queries": 0, "skipped_queries": int(skipped), "reason": reason}

    index = faiss.IndexFlatIP(d)
    index.add(x)
    # the deepest ranking needed: the largest R or K, plus the query itself, and never beyond n
    order = queries[np.argsort(r_all[queries], kind="stable")]  # similar depths share a block
    hit_k = {k: 0 for k in vals}
    rp_parts, ap_parts = [], []
    start = 0
    while start < order.size:
        if block_rows is not None:
            rows = int(block_rows)
        else:
            # queries are sorted by R, so the last query of a block needs the deepest search
            cap = max(1, int(memory_budget // 12))
            rows = max(1, cap // (min(n - 1, max(int(r_all[order[start]]), vals[-1])) + 1))
            while rows > 1 and rows * (min(n - 1, max(int(r_all[order[min(order.size, start + rows) - 1]]),
                                                      vals[-1])) + 1) > cap:
                rows //= 2
        block = order[start : start + rows]
        depth = min(n - 1, max(int(r_all[block].max()), vals[-1]))
        scores, ids = index.search(x[block], depth + 1)
        others = _drop_self(ids, scores, block)
        hits = codes[others] == codes[block][:, None]
        rec, rprec, ap = _hits_metrics(hits, r_all[block], vals)
        for k in vals:
            hit_k[k] += int(rec[k].sum())
        rp_parts.append(rprec)
        ap_parts.append(ap)
        start += block.size
    q = queries.size
    return {
        "recall_at_k": {str(k): hit_k[k] / q for k in vals},
        # exactly rounded sums: the same bits whatever the block size or row order
        "r_precision": math.fsum(np.concatenate(rp_parts).tolist()) / q,
        "map_at_r": math.fsum(np.concatenate(ap_parts).tolist()) / q,
        "queries": int(q),
        "skipped_queries": int(skipped),
    }
