"""Tests of tripletkit.metrics.retrieval: brute-force twin, blocks, hit-matrix toys, errors."""

import numpy as np
import pytest

from tripletkit._errors import TripletkitError, TripletkitWarning
from tripletkit.metrics import retrieval as R
from tripletkit.metrics import retrieval_metrics
from _support import clustered_rows


def brute_force(x, labels, ks):
    """Every definition spelled out on the full similarity matrix (float64, stable order)."""
    n = len(x)
    s = x.astype(np.float64) @ x.astype(np.float64).T
    rec = {k: [] for k in ks}
    rp, ap = [], []
    for q in range(n):
        others = np.array([j for j in range(n) if j != q])
        order = others[np.lexsort((others, -s[q, others]))]
        rel = labels[order] == labels[q]
        r = int(rel.sum())
        if r == 0:
            continue
        for k in ks:
            rec[k].append(rel[:k].any())
        rp.append(rel[:r].sum() / r)
        prec = np.cumsum(rel[:r]) / np.arange(1, r + 1)
        ap.append((prec * rel[:r]).sum() / r)
    return {str(k): float(np.mean(v)) for k, v in rec.items()}, float(np.mean(rp)), float(np.mean(ap)), len(rp)


def test_matches_brute_force(rng):
    x, labels = clustered_rows(rng, 300, 8, 25)
    labels[0] = 999  # one singleton query, skipped
    out = retrieval_metrics(x, labels, ks=(1, 2, 5, 10))
    rec, rp, ap, q = brute_force(x, labels, (1, 2, 5, 10))
    assert out["queries"] == q == 299 and out["skipped_queries"] == 1
    for k in rec:
        assert out["recall_at_k"][k] == pytest.approx(rec[k], abs=1e-12)
    assert out["r_precision"] == pytest.approx(rp, abs=1e-12)
    assert out["map_at_r"] == pytest.approx(ap, abs=1e-12)


def test_blocked_equals_one_shot(rng):
    x, labels = clustered_rows(rng, 400, 8, 12)  # identities of ~33 rows: deep rankings
    ref = retrieval_metrics(x, labels, block_rows=400)
    for rows in (1, 13, 128):
        assert retrieval_metrics(x, labels, block_rows=rows) == ref
    assert retrieval_metrics(x, labels, memory_budget=4096) == ref


def test_hit_matrix_by_hand():
    # query 1: R = 3, hits at ranks 1 and 3: R-precision 2/3, AP@R = (1/1 + 2/3) / 3 = 5/9
    # query 2: R = 1, miss at rank 1: both 0; recall@2 still 1 (hit at rank 2)
    hits = np.array([[1, 0, 1, 0], [0, 1, 0, 0]], bool)
    rec, rprec, ap = R._hits_metrics(hits, np.array([3, 1]), [1, 2])
    assert rec[1].tolist() == [True, False] and rec[2].tolist() == [True, True]
    assert rprec.tolist() == pytest.approx([2 / 3, 0.0])
    assert ap.tolist() == pytest.approx([5 / 9, 0.0])


def test_ties_rank_by_row_and_self_is_dropped():
    # four identical rows: every score ties, so the ranking is by row position without the query;
    # worked out by hand: queries 0 and 1 find their identity-mate first, 2 and 3 find row 0 first
    x = np.tile(np.array([[1.0, 0.0]], np.float32), (4, 1))
    out = retrieval_metrics(x, [0, 0, 1, 1], ks=(1, 2))
    assert out["queries"] == 4
    assert out["recall_at_k"] == {"1": 0.5, "2": 0.5}
    assert out["r_precision"] == 0.5 and out["map_at_r"] == 0.5
    out = retrieval_metrics(x, [0, 0, 1, 1], ks=(3,))
    assert out["recall_at_k"] == {"3": 1.0}


def test_float32_preselection_is_widened_to_the_exact_ranking(rng):
    # rows that differ in the last float32 bits: the float32 order is noise, the exact cosines
    # decide; the result equals the brute force over exact cosines whatever the block size
    from tripletkit._exact import snap

    base = rng.standard_normal(8)
    x = base + 1e-7 * rng.standard_normal((60, 8))
    x = (x / np.linalg.norm(x, axis=1, keepdims=True)).astype(np.float32)
    labels = rng.integers(0, 6, 60)
    rec, rp, ap, q = brute_force(snap(x), labels, (1, 3))
    for rows in (1, 7, 60):
        out = retrieval_metrics(x, labels, ks=(1, 3), block_rows=rows)
        assert out["recall_at_k"] == rec  # same rankings; the means below differ only in summation order
        assert out["r_precision"] == pytest.approx(rp, abs=1e-12) and out["map_at_r"] == pytest.approx(ap, abs=1e-12)


def test_invariant_to_row_order_and_label_names(rng):
    x, labels = clustered_rows(rng, 200, 6, 20)
    perm = rng.permutation(200)
    a = retrieval_metrics(x, labels)
    b = retrieval_metrics(x[perm], np.array([f"seal-{v}" for v in labels])[perm])
    assert a == b


def test_all_singletons_warn(rng):
    x, _ = clustered_rows(rng, 10, 4, 2)
    with pytest.warns(TripletkitWarning, match="retrieval: no query"):
        out = retrieval_metrics(x, np.arange(10))
    assert out["map_at_r"] is None and out["skipped_queries"] == 10


def test_errors(rng):
    x, labels = clustered_rows(rng, 10, 4, 2)
    with pytest.raises(TripletkitError, match="ks must be whole numbers >= 1"):
        retrieval_metrics(x, labels, ks=(0, 5))
    with pytest.raises(TripletkitError, match="labels has 3 entries but there are 10 rows"):
        retrieval_metrics(x, labels[:3])
    with pytest.raises(TripletkitError, match="block_rows must be"):
        retrieval_metrics(x, labels, block_rows=-2)
