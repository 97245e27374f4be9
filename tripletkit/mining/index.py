"""faiss indexes over the table's unit rows, the widening search the miner relies on, and its recall.

Every index holds the L2-normalised float32 rows and scores by inner product, the cosine: ``exact``
(``faiss.IndexFlatIP``, the reference), ``ivf`` (``faiss.IndexIVFFlat``, spherical k-means
centroids trained on a seeded sample; only ``nprobe`` lists are scanned) and ``hnsw``
(``faiss.IndexHNSWFlat``, a graph walk). ``auto`` is ``exact`` below ``exact_below`` rows and
``ivf`` from there on: IVF is deterministic to build and search, unlike a multi-threaded HNSW
build, so ``auto`` keeps byte-identical outputs. :meth:`SearchIndex.within` returns every row
above each query's own cosine threshold, never truncated: a top-k search first, widened by a range
search (exact, ivf) or by doubling k (hnsw) where the k-th neighbour is still above the threshold.

faiss's float32 scores only pre-select, within :func:`~tripletkit.mining.cosines.score_slack`;
callers decide membership on exact float64 cosines. Nothing here changes faiss's global thread
count except :func:`faiss_threads`, for the duration of a ``with`` block.
"""

from __future__ import annotations

import contextlib
import math
from dataclasses import dataclass

import faiss
import numpy as np

from .._errors import TripletkitError
from .cosines import exact_cosine, exact_scores, score_slack

__all__ = ["KINDS", "SearchIndex", "Neighbours", "resolve_kind", "build_index", "scan_within", "estimate_recall",
           "faiss_threads"]

#: Index kinds that :func:`build_index` builds (``auto`` resolves to one of them).
KINDS = ("exact", "ivf", "hnsw")

# Most queries passed to one faiss range search: large enough for BLAS efficiency.
_RANGE_CHUNK_MAX = 4096


def resolve_kind(kind, n, exact_below):
    """The index kind for ``n`` rows: ``auto`` is ``exact`` below ``exact_below`` rows, else ``ivf``."""
    if kind == "auto":
        return "exact" if n < exact_below else "ivf"
    if kind not in KINDS:
        raise TripletkitError(f"index must be one of auto, {', '.join(KINDS)}; got {kind!r}")
    return kind


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

    @classmethod
    def from_entries(cls, query_numbers, rows, scores, n_queries, widened=0, topk=None):
        """Neighbours of ``n_queries`` queries from their entries, grouped by query.

        Parameters
        ----------
        query_numbers : ndarray of int, shape (m,)
            Query (in ``[0, n_queries)``) of each entry, ascending.
        rows : ndarray of int, shape (m,)
            Row position of each entry.
        scores : ndarray of float32, shape (m,)
            faiss score of each entry.
        n_queries : int
        widened : int, default 0
        topk : tuple, optional
            As the attributes of the same name.

        Returns
        -------
        Neighbours
        """
        lims = np.zeros(n_queries + 1, dtype=np.int64)
        np.cumsum(np.bincount(query_numbers, minlength=n_queries), out=lims[1:])
        return cls(lims=lims, rows=np.asarray(rows, dtype=np.int64), scores=np.asarray(scores, dtype=np.float32),
                   widened=int(widened), topk=topk)


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
        return Neighbours.from_entries(qs[order], rs[order], ss[order], q, widened)

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
            Their rows, grouped by query (in no particular order within a query). For
            ``exact``: a superset of the rows with exact cosine > threshold holding only rows
            with faiss score >= threshold - slack. For ``ivf``/``hnsw``: the same as far as the
            approximate index finds them.

        Notes
        -----
        The first piece holds the queries whose top-k already reaches below their threshold. The
        others hold widened queries, a bounded number at a time, so that memory stays
        O(piece x rows) even when a threshold admits every row.
        """
        thresholds = np.asarray(thresholds, dtype=np.float64)
        k = int(min(max(1, k), self.n))
        D, I = self.search(queries, k)
        bound = self.topk_bound(D, I, k)
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
    def topk_bound(self, D, I, k):
        """Per query, the cosine above which every row is in a top-``k`` result ``(D, I)``.

        A row missing from a top-k has a float32 score <= the k-th score, so an exact cosine <=
        the k-th score + slack; ``-inf`` when the top-k holds every row (or all the index offers).
        """
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
            yield sel, Neighbours.from_entries(owner[ok], I[ok], D[ok], sel.size, sel.size)
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
                ok = self.topk_bound(D, I, kk) <= thresholds[sel]
                if ok.any():
                    fin = sel[ok]
                    yield fin, _from_dense(D[ok], I[ok], thresholds[fin] - self.slack, widened=fin.size)
                    finished.append(fin)
            todo = np.setdiff1d(todo, np.concatenate(finished)) if finished else todo


def _piece_rows(n, memory_mb):
    """Queries per widened piece: the worst case (every row for each) in about 64 bytes a row."""
    return int(max(1, min(_RANGE_CHUNK_MAX, memory_mb * 2 ** 20 // (64 * n))))


def _from_dense(D, I, low, widened=0, topk=None):
    """CSR of the entries of a (q, k) top-k result with score >= ``low`` (per query)."""
    keep = (I >= 0) & (D >= low[:, None])
    return Neighbours.from_entries(np.nonzero(keep)[0], I[keep], D[keep], D.shape[0], widened, topk)


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
    return Neighbours.from_entries(qs, rs, ss, q)


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
