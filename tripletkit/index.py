"""faiss index choice, blocked search with widening, exact float64 scores and the recall estimate.

Every index here holds the L2-normalised float32 rows of an :class:`~tripletkit.table.EmbeddingTable`
and scores by inner product, which on unit vectors is the cosine. Three kinds:

- ``exact``: ``faiss.IndexFlatIP``, a brute-force scan; the reference for everything else;
- ``ivf``: ``faiss.IndexIVFFlat`` with inner product, its coarse centroids trained (spherical
  k-means, seeded) on a seeded sample of the rows; approximate: only ``nprobe`` of ``nlist`` lists
  are scanned per query;
- ``hnsw``: ``faiss.IndexHNSWFlat`` with ``METRIC_INNER_PRODUCT``; approximate (a graph walk).

``auto`` picks ``exact`` below ``exact_below`` rows (default 200,000: an exact self-search of that
many 128-d rows takes minutes on a laptop CPU, and it grows with the square of the rows) and
``ivf`` from there on (IVF is deterministic to build and search, unlike a multi-threaded HNSW
build, so ``auto`` keeps byte-identical outputs).

The one search the miner needs is :meth:`SearchIndex.within`: every row whose cosine with a query
exceeds that query's own threshold, never silently truncated. It starts with a top-k search; a
query whose k-th neighbour still lies above its threshold is widened, by a faiss range search
(``exact``, ``ivf``) or by doubling k (``hnsw``).

float32 scores from faiss differ from exact values by a few 1e-7 (rounding in a sum of ``d``
products), so thresholds are applied with a :func:`score_slack` safety band and the caller decides
membership with :func:`exact_cosine`, a float64 dot product computed in a fixed order.

faiss threads: nothing here changes faiss's global thread count; :func:`faiss_threads` does it
for the duration of a ``with`` block when the caller asks explicitly.
"""

from __future__ import annotations

import contextlib
import math
from dataclasses import dataclass

import faiss
import numpy as np

from ._errors import TripletkitError

__all__ = [
    "KINDS",
    "SearchIndex",
    "Neighbours",
    "resolve_kind",
    "build_index",
    "score_slack",
    "exact_cosine",
    "exact_cosine_rows",
    "exact_scores",
    "scan_within",
    "estimate_recall",
    "faiss_threads",
    "query_block_rows",
]

#: Index kinds that :func:`build_index` builds (``auto`` resolves to one of them).
KINDS = ("exact", "ivf", "hnsw")

# Rows of float64 work per chunk in exact_cosine (two gathered (chunk, d) matrices).
# Working set of one chunk of exact_cosine: both sides' rows gathered as float32 and copied to
# float64 (24 bytes per pair and dimension); 16 MiB whatever the dimension.
_COSINE_CHUNK_BYTES = 1 << 24


def cosine_chunk_pairs(d):
    """Pairs per chunk of :func:`exact_cosine` for dimension ``d`` (at least 64)."""
    return int(max(64, _COSINE_CHUNK_BYTES // (24 * max(1, int(d)))))
# Cells per tile of exact_cosine_rows (256 KiB of float64: fits a core's L2 cache).
_ROWS_TILE_CELLS = 1 << 15
# Most queries passed to one faiss range search: large enough for BLAS efficiency.
_RANGE_CHUNK_MAX = 4096


def score_slack(dim):
    """Bound on |faiss float32 inner product - exact inner product| for unit rows of dimension ``dim``.

    A float32 sum of ``d`` products of unit vectors is off by at most about ``d * 2**-24`` in any
    summation order (the standard rounding-error bound gamma_d * sum |x_i y_i| <= gamma_d for unit
    vectors; Higham, "Accuracy and Stability of Numerical Algorithms", SIAM 2002, Sec. 3.1). Twice
    that plus 1e-6 covers the rounding of the stored unit rows and of the output.
    """
    return 2.0 * dim * 2.0 ** -24 + 1e-6


def exact_cosine(embeddings, a, b):
    """Float64 inner products of row pairs ``(a[i], b[i])``, summed in a fixed order.

    Parameters
    ----------
    embeddings : ndarray of float32, shape (n, d)
    a, b : ndarray of int64, shape (m,)
        Row positions.

    Returns
    -------
    ndarray of float64, shape (m,)

    Notes
    -----
    The products are accumulated dimension by dimension (j = 0, 1, ..., d-1) with separate
    float64 multiplications and additions, so the value of a pair does not depend on which batch
    it is computed in, on memory alignment, or on the order of the pair (a.b == b.a bit for bit).
    That is what keeps outputs independent of block sizes.
    """
    a = np.asarray(a, dtype=np.int64)
    b = np.asarray(b, dtype=np.int64)
    out = np.empty(a.shape[0], dtype=np.float64)
    d = embeddings.shape[1]
    chunk = cosine_chunk_pairs(d)
    for s in range(0, a.shape[0], chunk):
        e = min(s + chunk, a.shape[0])
        at = np.ascontiguousarray(embeddings[a[s:e]].T, dtype=np.float64)
        bt = np.ascontiguousarray(embeddings[b[s:e]].T, dtype=np.float64)
        acc = at[0] * bt[0]
        for j in range(1, d):
            acc += at[j] * bt[j]
        out[s:e] = acc
    return out


def exact_cosine_rows(embeddings, rows, transposed=None):
    """Float64 inner products of ``rows`` with every row: the dense twin of :func:`exact_cosine`.

    Parameters
    ----------
    embeddings : ndarray of float32, shape (n, d)
    rows : ndarray of int64, shape (m,)
        Row positions.
    transposed : ndarray of float32, shape (d, n), optional
        ``embeddings.T`` as a C-contiguous array (pass it when calling repeatedly).

    Returns
    -------
    ndarray of float64, shape (m, n)
        Entry ``[i, j]`` equals ``exact_cosine(embeddings, [rows[i]], [j])`` bit for bit: the same
        exact float64 products (of float32 values), added dimension by dimension in the same order.
    """
    XT = np.ascontiguousarray(embeddings.T) if transposed is None else transposed
    A = np.asarray(embeddings[np.asarray(rows, dtype=np.int64)], dtype=np.float64)
    m, (d, n) = A.shape[0], XT.shape
    out = np.empty((m, n), dtype=np.float64)
    # Work in tiles of about _ROWS_TILE_CELLS cells (whole rows, or one row cut into column
    # pieces) so that the d passes over a tile stay in cache: 2-3x faster than whole blocks.
    rt = max(1, _ROWS_TILE_CELLS // max(n, 1))
    ct = n if rt > 1 else _ROWS_TILE_CELLS
    tmp = np.empty(min(rt, m) * min(ct, n), dtype=np.float64)
    for r0 in range(0, m, rt):
        r1 = min(m, r0 + rt)
        for c0 in range(0, n, ct):
            c1 = min(n, c0 + ct)
            o = out[r0:r1, c0:c1]
            t = tmp[:(r1 - r0) * (c1 - c0)].reshape(r1 - r0, c1 - c0)
            np.multiply(A[r0:r1, 0:1], XT[0, c0:c1], out=o, dtype=np.float64)
            for j in range(1, d):
                np.multiply(A[r0:r1, j:j + 1], XT[j, c0:c1], out=t, dtype=np.float64)
                o += t
    return out


def exact_scores(embeddings, queries):
    """float32 inner products of ``queries`` (q, d) with every row: a (q, n) matrix (one BLAS call)."""
    return queries @ embeddings.T


def resolve_kind(kind, n, exact_below):
    """The index kind for ``n`` rows: ``auto`` is ``exact`` below ``exact_below`` rows, else ``ivf``."""
    if kind == "auto":
        return "exact" if n < exact_below else "ivf"
    if kind not in KINDS:
        raise TripletkitError(f"index must be one of auto, {', '.join(KINDS)}; got {kind!r}")
    return kind


def query_block_rows(n, k, memory_mb, requested=0):
    """Queries per search block: ``requested`` if given, else sized so one block's top-k results
    and their bookkeeping (about 64 bytes per neighbour) fit in a quarter of ``memory_mb``."""
    if requested:
        return int(max(1, min(requested, n)))
    budget = memory_mb * 2 ** 20 // 4
    rows = budget // max(1, 64 * k)
    return int(max(1, min(n, max(256, min(rows, 16384)))))


@contextlib.contextmanager
def faiss_threads(threads):
    """Run the block with ``threads`` faiss/OpenMP threads (0: leave faiss's setting alone)."""
    if not threads:
        yield
        return
    previous = faiss.omp_get_max_threads()
    faiss.omp_set_num_threads(int(threads))
    try:
        yield
    finally:
        faiss.omp_set_num_threads(previous)


@dataclass
class Neighbours:
    """Result of :meth:`SearchIndex.within`, one segment per query (CSR layout).

    Attributes
    ----------
    lims : ndarray of int64, shape (q + 1,)
        Query ``i`` owns ``rows[lims[i]:lims[i+1]]``.
    rows : ndarray of int64
        Row positions in the index (sorted ascending within each query by :meth:`within` and
        :func:`scan_within`; in no particular order in the pieces of :meth:`within_pieces`).
    scores : ndarray of float32
        faiss scores (approximate cosines) of those rows.
    widened : int
        Queries whose first top-k did not reach their threshold and were searched wider.
    topk : tuple or None
        With ``keep_topk``: ``(D, I, bound)``, the first top-k scores and rows (q, k) and, per
        query, the cosine above which every row is among them (``-inf`` when all rows are).
    """

    lims: np.ndarray
    rows: np.ndarray
    scores: np.ndarray
    widened: int = 0
    topk: tuple | None = None


class SearchIndex:
    """A faiss index over unit rows plus the widening search the miner relies on.

    Build it with :func:`build_index`. Attributes: ``kind`` (exact/ivf/hnsw), ``n``, ``dim``,
    ``index`` (the faiss object), ``params`` (the knobs used, for provenance) and ``slack``
    (:func:`score_slack` of ``dim``).
    """

    def __init__(self, index, kind, n, dim, params):
        self.index = index
        self.kind = kind
        self.n = int(n)
        self.dim = int(dim)
        self.params = dict(params)
        self.slack = score_slack(dim)

    @property
    def approximate(self):
        """Whether results may miss rows (ivf, hnsw)."""
        return self.kind != "exact"

    def search(self, queries, k):
        """Top-``k`` rows per query: ``(D float32 (q, k), I int64 (q, k))``, -1 where fewer exist."""
        k = int(min(k, self.n))
        return self.index.search(np.ascontiguousarray(queries, dtype=np.float32), k)

    def range(self, queries, radius):
        """faiss range search: rows with score > ``radius`` -> ``(lims, D, I)``."""
        return self.index.range_search(np.ascontiguousarray(queries, dtype=np.float32), float(radius))

    def within(self, queries, thresholds, k, *, memory_mb=1024):
        """Every row whose cosine with query ``i`` exceeds ``thresholds[i]``, widening as needed.

        The pieces of :meth:`within_pieces` merged into one :class:`Neighbours` over all queries
        (rows sorted ascending within each query).
        """
        q = queries.shape[0]
        parts_q, parts_r, parts_s, widened = [], [], [], 0
        for sel, nb in self.within_pieces(queries, thresholds, k, memory_mb=memory_mb):
            parts_q.append(np.repeat(sel, np.diff(nb.lims)))
            parts_r.append(nb.rows)
            parts_s.append(nb.scores)
            widened += nb.widened
        qs, rs, ss = np.concatenate(parts_q), np.concatenate(parts_r), np.concatenate(parts_s)
        order = np.lexsort((rs, qs))
        return _csr(qs[order], rs[order], ss[order], q, widened)

    def within_pieces(self, queries, thresholds, k, *, memory_mb=1024, keep_topk=False):
        """Yield ``(sel, Neighbours)`` pieces: every row above each query's threshold, never truncated.

        Parameters
        ----------
        queries : ndarray of float32, shape (q, d)
            Unit rows.
        thresholds : ndarray of float64, shape (q,)
            Cosine thresholds (may be below -1: then every row qualifies).
        k : int
            Neighbours searched first (capped at the number of rows).
        memory_mb : int
            Budget for one piece's worst case (every row for every query of the piece).
        keep_topk : bool
            Attach the first top-k result and its trust bound to the first piece (``topk``).

        Yields
        ------
        sel : ndarray of int64
            Positions (into ``queries``) of the queries this piece answers; every query is in
            exactly one piece.
        nb : Neighbours
            Their rows, grouped by query (in no particular order within a query). For ``exact``: a superset of the rows with exact
            cosine > threshold holding only rows with faiss score >= threshold - slack. For
            ``ivf``/``hnsw``: the same as far as the approximate index finds them.

        Notes
        -----
        The first piece holds the queries whose top-k already reaches below their threshold. The
        others hold widened queries, a bounded number at a time, so that memory stays
        O(piece x rows) even when a threshold admits every row.
        """
        thresholds = np.asarray(thresholds, dtype=np.float64)
        k = int(min(max(1, k), self.n))
        D, I = self.search(queries, k)
        bound = self._bound(D, I, k)
        need = bound > thresholds
        done = np.flatnonzero(~need)
        yield done, _from_dense(D[done], I[done], thresholds[done] - self.slack,
                                topk=(D, I, bound) if keep_topk else None)
        widen = np.flatnonzero(need)
        if not widen.size:
            return
        if self.kind == "hnsw":
            yield from self._widen_by_doubling(queries, thresholds, widen, k, memory_mb)
        else:
            yield from self._widen_by_range(queries, thresholds, widen, _piece_rows(self.n, memory_mb),
                                            memory_mb)

    # -- widening ----------------------------------------------------------------------------
    def _bound(self, D, I, k):
        """Per query, the cosine above which every row is in the top-k (rows missing from a top-k
        have a float32 score <= the k-th score, so an exact cosine <= k-th + slack)."""
        if k >= self.n:
            return np.full(D.shape[0], -np.inf)
        bound = D[:, -1].astype(np.float64) + self.slack
        # Fewer than k results: the (approximate) index has nothing more to offer for this query.
        bound[I[:, -1] < 0] = -np.inf
        return bound

    def _widen_by_range(self, queries, thresholds, widen, chunk, memory_mb):
        # One radius per faiss call, so group queries of similar thresholds: sort, then chunk,
        # loosest first. The first chunk is sized for the worst case (every row for every query);
        # later ones from the largest result seen so far (x2), since a range search over few
        # queries wastes most of its BLAS throughput.
        widen = widen[np.argsort(thresholds[widen], kind="stable")]
        budget = memory_mb * 2 ** 20
        pos = 0
        while pos < widen.size:
            sel = widen[pos:pos + chunk]
            pos += sel.size
            low = thresholds[sel] - self.slack
            lims, D, I = self.range(queries[sel], float(low.min()) - 1e-7)
            counts = np.diff(lims).astype(np.int64)
            owner = np.repeat(np.arange(sel.size, dtype=np.int64), counts)
            ok = D >= low[owner]
            yield sel, _csr(owner[ok], I[ok], D[ok], sel.size, sel.size)
            widest = int(counts.max()) if counts.size else 0
            chunk = int(max(chunk, min(_RANGE_CHUNK_MAX, budget // (64 * max(1, 2 * widest)))))

    def _widen_by_doubling(self, queries, thresholds, widen, k, memory_mb):
        todo = widen
        kk = k
        while todo.size:
            kk = min(self.n, kk * 2)
            chunk = int(max(1, min(_RANGE_CHUNK_MAX, memory_mb * 2 ** 20 // (64 * kk))))
            finished = []
            for s in range(0, todo.size, chunk):
                sel = todo[s:s + chunk]
                D, I = self.search(queries[sel], kk)
                ok = self._bound(D, I, kk) <= thresholds[sel]
                if ok.any():
                    fin = sel[ok]
                    yield fin, _from_dense(D[ok], I[ok], thresholds[fin] - self.slack, widened=fin.size)
                    finished.append(fin)
            todo = np.setdiff1d(todo, np.concatenate(finished)) if finished else todo


def _piece_rows(n, memory_mb):
    """Queries per widened piece: the worst case (every row for each) in about 64 bytes a row."""
    return int(max(1, min(_RANGE_CHUNK_MAX, memory_mb * 2 ** 20 // (64 * n))))


def _csr(qs, rs, ss, q, widened=0, topk=None):
    lims = np.zeros(q + 1, dtype=np.int64)
    np.cumsum(np.bincount(qs, minlength=q), out=lims[1:])
    return Neighbours(lims=lims, rows=np.asarray(rs, dtype=np.int64),
                      scores=np.asarray(ss, dtype=np.float32), widened=int(widened), topk=topk)


def _from_dense(D, I, low, widened=0, topk=None):
    """CSR of the entries of a (q, k) top-k result with score >= ``low`` (per query)."""
    keep = (I >= 0) & (D >= low[:, None])
    return _csr(np.nonzero(keep)[0], I[keep], D[keep], D.shape[0], widened, topk)


def scan_within(embeddings, queries, thresholds, *, memory_mb=1024):
    """Brute-force twin of :meth:`SearchIndex.within` (numpy BLAS over all rows, in blocks).

    Returns the same kind of :class:`Neighbours`: every row with float32 score >= threshold - slack.
    """
    thresholds = np.asarray(thresholds, dtype=np.float64)
    n, d = embeddings.shape
    q = queries.shape[0]
    slack = score_slack(d)
    # half the budget for the (chunk, n) float32 scores and their mask (about 8 bytes a cell)
    chunk = int(max(1, min(4096, memory_mb * 2 ** 20 // (16 * n))))
    parts_q, parts_r, parts_s = [], [], []
    for s in range(0, q, chunk):
        S = exact_scores(embeddings, queries[s:s + chunk])
        qi, r = np.nonzero(S >= (thresholds[s:s + chunk] - slack)[:, None])
        parts_q.append(qi.astype(np.int64) + s)
        parts_r.append(r.astype(np.int64))
        parts_s.append(S[qi, r])
    qs = np.concatenate(parts_q) if parts_q else np.zeros(0, np.int64)
    rs = np.concatenate(parts_r) if parts_r else np.zeros(0, np.int64)
    ss = np.concatenate(parts_s) if parts_s else np.zeros(0, np.float32)
    return _csr(qs, rs, ss, q)


def build_index(embeddings, kind="exact", *, nlist=0, nprobe=32, hnsw_m=32, ef_search=128,
                ef_construction=80, seed=0):
    """Build a :class:`SearchIndex` of kind ``exact``, ``ivf`` or ``hnsw`` over unit rows.

    Parameters
    ----------
    embeddings : ndarray of float32, shape (n, d), C-contiguous, unit rows
    kind : {"exact", "ivf", "hnsw"}
    nlist : int, default 0
        IVF lists; 0 means ``round(4 * sqrt(n))``. Always capped at ``n // 39`` (at least 1), the
        fewest training points per centroid faiss accepts without a warning.
    nprobe : int, default 32
        IVF lists scanned per query (capped at ``nlist``).
    hnsw_m, ef_search, ef_construction : int
        HNSW links per node and search / construction depths.
    seed : int
        Seeds the IVF training sample and faiss's k-means.

    Notes
    -----
    IVF trains on ``min(n, 48 * nlist)`` rows drawn without replacement by
    ``np.random.default_rng(seed)``; k-means is spherical (centroids re-normalised), the natural
    choice for inner product on unit vectors. A multi-threaded HNSW build inserts rows in a
    timing-dependent order, so its graph (and the miner's output) is reproducible only when built
    with one thread (see :func:`faiss_threads`).

    References
    ----------
    .. [1] J. Johnson, M. Douze, H. Jegou, "Billion-scale similarity search with GPUs", IEEE
       Transactions on Big Data, 2019 (faiss; IVF and flat indexes).
    .. [2] Y. A. Malkov, D. A. Yashunin, "Efficient and robust approximate nearest neighbor search
       using Hierarchical Navigable Small World graphs", IEEE TPAMI, 2020.
    """
    x = np.ascontiguousarray(embeddings, dtype=np.float32)
    n, d = x.shape
    if kind == "exact":
        index = faiss.IndexFlatIP(d)
        index.add(x)
        return SearchIndex(index, "exact", n, d, {})
    if kind == "ivf":
        want = nlist if nlist else int(round(4 * math.sqrt(n)))
        lists = int(max(1, min(want, n // 39)))
        quantizer = faiss.IndexFlatIP(d)
        index = faiss.IndexIVFFlat(quantizer, d, lists, faiss.METRIC_INNER_PRODUCT)
        index.cp.seed = int(seed) % (2 ** 31)
        index.cp.spherical = True
        # The sample below always has >= 39 rows per list when it can; this only silences faiss's
        # stderr warning for tables of fewer than 39 rows.
        index.cp.min_points_per_centroid = 1
        size = min(n, 48 * lists)
        rng = np.random.default_rng(seed)
        sample = np.sort(rng.choice(n, size=size, replace=False)) if size < n else np.arange(n)
        index.train(np.ascontiguousarray(x[sample]))
        index.add(x)
        index.nprobe = int(min(nprobe, lists))
        return SearchIndex(index, "ivf", n, d, {"nlist": lists, "nprobe": int(index.nprobe)})
    if kind == "hnsw":
        index = faiss.IndexHNSWFlat(d, int(hnsw_m), faiss.METRIC_INNER_PRODUCT)
        index.hnsw.efConstruction = int(ef_construction)
        index.add(x)
        index.hnsw.efSearch = int(ef_search)
        return SearchIndex(index, "hnsw", n, d, {"m": int(hnsw_m), "ef_search": int(ef_search),
                                                  "ef_construction": int(ef_construction)})
    raise TripletkitError(f"index must be one of {', '.join(KINDS)}; got {kind!r}")


def estimate_recall(index, embeddings, query_rows, thresholds, *, labels=None, k=100, memory_mb=1024):
    """Recall of an index's :meth:`~SearchIndex.within` against a brute-force scan.

    Parameters
    ----------
    index : SearchIndex
    embeddings : ndarray of float32, shape (n, d)
        The rows the index holds.
    query_rows : ndarray of int64, shape (m,)
        Row positions of the requests; a row may appear several times (e.g. one request per
        anchor-positive pair), each with its own threshold.
    thresholds : ndarray of float64, shape (m,)
        A request's relevant rows are those with exact (float64) cosine > its threshold.
    labels : ndarray of int64, shape (n,), optional
        When given, rows with the query's label (and the query itself) do not count.
    k : int
        First top-k of the approximate search (as in the run being measured).

    Returns
    -------
    (found, relevant) : tuple of int
        Summed over requests: relevant rows the index returned, and relevant rows in all.
        Recall is ``found / relevant`` (undefined when ``relevant`` is 0).
    """
    query_rows = np.asarray(query_rows, dtype=np.int64)
    thresholds = np.asarray(thresholds, dtype=np.float64)
    uq, inv = np.unique(query_rows, return_inverse=True)
    # One search per distinct query row, at the loosest of its thresholds.
    loosest = np.full(uq.size, np.inf)
    np.minimum.at(loosest, inv, thresholds)
    queries = np.ascontiguousarray(embeddings[uq])
    counts = []
    for nb in (index.within(queries, loosest, k, memory_mb=memory_mb),
               scan_within(embeddings, queries, loosest, memory_mb=memory_mb)):
        owner = np.repeat(np.arange(uq.size), np.diff(nb.lims))
        rows = nb.rows
        ok = rows != uq[owner]
        if labels is not None:
            ok &= labels[rows] != labels[uq[owner]]
        owner, rows = owner[ok], rows[ok]
        cos = exact_cosine(embeddings, uq[owner], rows)
        # For every request, count the rows of its query above its own threshold.
        order = np.lexsort((-cos, owner))
        owner, cos = owner[order], cos[order]
        starts = np.searchsorted(owner, np.arange(uq.size), side="left")
        ends = np.searchsorted(owner, np.arange(uq.size), side="right")
        counts.append(_count_above(cos, starts[inv], ends[inv], thresholds))
    return int(counts[0].sum()), int(counts[1].sum())


def _count_above(desc, lo, hi, x):
    """Per segment ``desc[lo[i]:hi[i]]`` (sorted descending), how many values exceed ``x[i]``."""
    left, right = lo.astype(np.int64).copy(), hi.astype(np.int64).copy()
    active = left < right
    while active.any():
        idx = np.flatnonzero(active)
        mid = (left[idx] + right[idx]) // 2
        above = desc[mid] > x[idx]
        left[idx[above]] = mid[above] + 1
        right[idx[~above]] = mid[~above]
        active = left < right
    return left - lo
