"""Retrieval metrics, each query left out of its own gallery: Recall@K, R-precision, MAP@R.

Every row is a query against all other rows (the gallery), ranked by cosine similarity, ties by
row position (lower first). Cosines are the exact ones of :mod:`tripletkit._exact`: an exact
faiss inner-product index (``faiss.IndexFlatIP``, float32) only pre-selects a few more
neighbours than the ranking needs, their exact cosines decide the order, and a query whose
pre-selection cannot be shown to hold its whole ranking (the exact score at the needed depth is
not above the last float32 score plus :func:`tripletkit._exact.slack`) is searched again deeper.
The rankings are therefore those of a brute force over exact cosines, whatever the BLAS or the
block size. For a query of identity c, ``R`` is the number of *other* rows of identity c.
Queries with ``R = 0`` (the only row of their identity) have nothing to retrieve: they are
skipped and counted in ``skipped_queries``.

* ``recall_at_k[K]``: share of queries with at least one row of their identity among the K
  nearest others (the convention of metric-learning papers, e.g. Oh Song et al., CVPR 2016;
  for K = 1 it is the leave-one-out accuracy of a 1-nearest-neighbour classifier).
* ``r_precision``: mean over queries of ``r / R``, ``r`` = rows of the identity among the R
  nearest others.
* ``map_at_r``: mean over queries of ``(1/R) * sum_{i=1..R} P(i) * rel(i)`` with ``P(i)`` the
  precision among the first i results and ``rel(i)`` = 1 when result i shares the identity.

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
from .._exact import pair_cosines, slack, snap
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


def _ranked(index, x, snapped, queries, depth, eps):
    """The ``depth`` nearest other rows of each query, by exact cosine (descending), then row.

    Parameters
    ----------
    index : faiss.IndexFlatIP
        The float32 rows ``x``, for pre-selection.
    x : ndarray of float32, shape (n, d)
    snapped : ndarray of float64, shape (n, d)
        The rows on the exact-cosine grid.
    queries : ndarray of int64, shape (q,)
        Query rows.
    depth : int
        Ranks needed, at most n - 1.
    eps : float
        :func:`tripletkit._exact.slack` of the dimension.

    Returns
    -------
    ndarray of int64, shape (q, depth)
    """
    n = snapped.shape[0]
    out = np.empty((queries.size, depth), np.int64)
    todo = np.arange(queries.size)
    k = min(n, depth + 1 + max(8, depth // 4))  # +1: the query itself is among the results
    while todo.size:
        q = queries[todo]
        scores, ids = index.search(x[q], k)
        ok_id = (ids >= 0) & (ids != q[:, None])
        exact = np.where(ok_id, 0.0, -np.inf)
        rows, cols = np.nonzero(ok_id)
        exact[rows, cols] = pair_cosines(snapped, q[rows], ids[rows, cols])
        ids = np.where(ok_id, ids, n)  # missing results sort last
        order = np.lexsort((ids, -exact), axis=1)
        ids = np.take_along_axis(ids, order, axis=1)[:, :depth]
        kth = np.take_along_axis(exact, order, axis=1)[:, depth - 1]
        # a row not returned scores at most the last float32 score, so its exact cosine is at
        # most that plus eps: the ranking is complete when the depth-th exact score is above it
        done = (kth > scores[:, -1].astype(np.float64) + eps) if k < n else np.ones(todo.size, bool)
        out[todo[done]] = ids[done]
        todo = todo[~done]
        k = min(n, 2 * k)
    return out


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
        Bytes for one block of search results (about 40 bytes per returned neighbour).
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
    snapped = snap(x)
    eps = slack(d)
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
            cap = max(1, int(memory_budget // 40))
            rows = max(1, cap // (min(n - 1, max(int(r_all[order[start]]), vals[-1])) + 1))
            while rows > 1 and rows * (min(n - 1, max(int(r_all[order[min(order.size, start + rows) - 1]]),
                                                      vals[-1])) + 1) > cap:
                rows //= 2
        block = order[start : start + rows]
        depth = min(n - 1, max(int(r_all[block].max()), vals[-1]))
        others = _ranked(index, x, snapped, block, depth, eps)
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
