"""tripletkit.mining.index: the widening search against its brute-force twin, index kinds, the recall
estimate."""

import faiss
import numpy as np
import pytest

from tripletkit._errors import TripletkitError
from tripletkit.mining.cosines import score_slack
from tripletkit.mining.index import (Neighbours, _count_above, build_index, estimate_recall, faiss_threads,
                                     resolve_kind, scan_within)


def unit_rows(rng, n, d, clusters=0):
    if clusters:
        centres = rng.standard_normal((clusters, d))
        X = centres[rng.integers(0, clusters, n)] + 0.6 * rng.standard_normal((n, d))
    else:
        X = rng.standard_normal((n, d))
    X /= np.linalg.norm(X, axis=1, keepdims=True)
    return np.ascontiguousarray(X, dtype=np.float32)


def as_sets(nb, q):
    return [set(nb.rows[nb.lims[i]:nb.lims[i + 1]].tolist()) for i in range(q)]


@pytest.mark.parametrize("k", [1, 7, 300])
def test_exact_within_contains_every_row_above_threshold(rng, k):
    n, d = 300, 16
    X = unit_rows(rng, n, d, clusters=6)
    index = build_index(X, "exact")
    thr = np.concatenate([rng.uniform(-0.2, 0.95, 40), [-1.5, 1.5]])  # everything / nothing too
    q = thr.size
    queries = X[:q]
    nb = index.within(queries, thr, k, memory_mb=16)
    C = queries.astype(np.float64) @ X.T.astype(np.float64)
    slack = score_slack(d)
    S = queries @ X.T
    for i, got in enumerate(as_sets(nb, q)):
        must = set(np.flatnonzero(C[i] > thr[i]).tolist())
        may = set(np.flatnonzero(S[i] >= thr[i] - slack).tolist())
        assert must <= got <= may
        rows = nb.rows[nb.lims[i]:nb.lims[i + 1]]
        assert np.all(np.diff(rows) > 0)  # sorted, no repeats
    if k < n:
        assert nb.widened > 0
    # the brute-force twin returns the same
    twin = scan_within(X, queries, thr, memory_mb=16)
    assert as_sets(twin, q) == as_sets(nb, q)


def test_pieces_answer_each_query_once(rng):
    X = unit_rows(rng, 400, 8, clusters=4)
    index = build_index(X, "exact")
    thr = rng.uniform(-0.5, 0.9, 400)
    seen = np.zeros(400, int)
    for sel, nb in index.within_pieces(X, thr, 5, memory_mb=16):
        seen[sel] += 1
        assert nb.lims.size == sel.size + 1
    assert np.all(seen == 1)


def test_top_k_trust_bound(rng):
    X = unit_rows(rng, 200, 8)
    index = build_index(X, "exact")
    pieces = list(index.within_pieces(X[:10], np.full(10, 0.99), 5, keep_topk=True))
    D, I, bound = pieces[0][1].topk
    C = X[:10].astype(np.float64) @ X.T.astype(np.float64)
    for i in range(10):
        # every row with exact cosine above the bound is among the top-k
        assert set(np.flatnonzero(C[i] > bound[i]).tolist()) <= set(I[i].tolist())
    assert np.array_equal(index.topk_bound(D, I, 5), bound)
    # a top-k of every row holds every row; so does one the index could not fill
    D_all, I_all = index.search(X[:3], 200)
    assert np.all(index.topk_bound(D_all, I_all, 200) == -np.inf)
    I_short = I[:2].copy()
    I_short[0, -1] = -1
    assert index.topk_bound(D[:2], I_short, 5)[0] == -np.inf and np.isfinite(index.topk_bound(D[:2], I_short, 5)[1])


def test_neighbours_from_entries():
    nb = Neighbours.from_entries(np.array([0, 0, 2]), np.array([5, 7, 1]), np.array([0.9, 0.8, 0.5]), 4, widened=1)
    assert nb.lims.tolist() == [0, 2, 2, 3, 3]
    assert nb.rows.dtype == np.int64 and nb.rows.tolist() == [5, 7, 1]
    assert nb.scores.dtype == np.float32 and nb.widened == 1 and nb.topk is None
    empty = Neighbours.from_entries(np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.float32), 2)
    assert empty.lims.tolist() == [0, 0, 0] and empty.rows.size == 0


def test_hnsw_doubling_and_ivf_range_widen(rng):
    X = unit_rows(rng, 500, 8, clusters=5)
    thr = np.full(50, 0.3)
    exact = as_sets(build_index(X, "exact").within(X[:50], thr, 500), 50)
    relevant = sum(map(len, exact))
    for kind, least in (("ivf", 1.0), ("hnsw", 0.9)):
        # ivf scanning every list is exhaustive; hnsw is a graph walk (approximate even at large k)
        index = build_index(X, kind, nprobe=1000)
        nb = index.within(X[:50], thr, 4)
        assert nb.widened == 50
        got = as_sets(nb, 50)
        found = sum(len(g & e) for g, e in zip(got, exact))
        assert found / relevant >= least, kind


def test_ivf_and_hnsw_builds_are_reproducible(rng, capfd):
    X = unit_rows(rng, 2000, 16, clusters=20)
    a = build_index(X, "ivf", seed=3)
    b = build_index(X, "ivf", seed=3)
    assert a.params == b.params and a.params["nlist"] == min(round(4 * np.sqrt(2000)), 2000 // 39)
    assert np.array_equal(a.search(X[:300], 10)[1], b.search(X[:300], 10)[1])
    with faiss_threads(1):
        h1 = build_index(X, "hnsw", hnsw_m=8)
        h2 = build_index(X, "hnsw", hnsw_m=8)
    assert np.array_equal(h1.search(X[:300], 10)[1], h2.search(X[:300], 10)[1])
    # tiny tables: nlist is capped and faiss stays quiet
    small = build_index(X[:20], "ivf")
    assert small.params["nlist"] == 1
    assert "WARNING" not in capfd.readouterr().err


def test_estimate_recall(rng):
    X = unit_rows(rng, 600, 8, clusters=6)
    labels = rng.integers(0, 30, 600)
    rows = np.repeat(np.arange(40), 2)
    thr = rng.uniform(0.2, 0.8, rows.size)
    found, relevant = estimate_recall(build_index(X, "exact"), X, rows, thr, labels=labels, k=5)
    assert relevant > 0 and found == relevant
    C = X.astype(np.float64) @ X.T.astype(np.float64)
    want = sum(int(np.sum((C[r] > t) & (labels != labels[r]))) for r, t in zip(rows, thr))
    assert relevant == want
    f2, r2 = estimate_recall(build_index(X, "ivf", nprobe=1), X, rows, thr, labels=labels, k=5)
    assert r2 == relevant and 0 <= f2 < relevant


def test_resolve_kind():
    assert resolve_kind("auto", 199_999, 200_000) == "exact"
    assert resolve_kind("auto", 200_000, 200_000) == "ivf"
    assert resolve_kind("hnsw", 10, 200_000) == "hnsw"
    with pytest.raises(TripletkitError, match="index must be one of"):
        resolve_kind("annoy", 10, 5)


def test_faiss_threads_restores():
    before = faiss.omp_get_max_threads()
    with faiss_threads(1):
        assert faiss.omp_get_max_threads() == 1
    assert faiss.omp_get_max_threads() == before
    with faiss_threads(0):
        assert faiss.omp_get_max_threads() == before


def test_count_above(rng):
    desc = -np.sort(-rng.random(60))
    lo = rng.integers(0, 60, 30)
    hi = np.minimum(60, lo + rng.integers(0, 25, 30))
    x = rng.random(30)
    want = [int(np.sum(desc[a:b] > v)) for a, b, v in zip(lo, hi, x)]
    assert _count_above(desc, lo, hi, x).tolist() == want
