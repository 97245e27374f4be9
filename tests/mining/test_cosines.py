"""tripletkit.mining.cosines: exact float64 cosines (batch-independent, symmetric, bit for bit the
same in their dense twin), their bounded working set, and the float32 error bound."""

import tracemalloc

import numpy as np
import pytest

from tripletkit.mining.cosines import exact_cosine, exact_cosine_rows, exact_scores, score_slack


def unit_rows(rng, n, d):
    X = rng.standard_normal((n, d))
    return np.ascontiguousarray(X / np.linalg.norm(X, axis=1, keepdims=True), dtype=np.float32)


def test_exact_cosine_is_float64_exact_symmetric_and_batch_independent(rng):
    X = unit_rows(rng, 300, 24)
    a = rng.integers(0, 300, 5000)
    b = rng.integers(0, 300, 5000)
    c = exact_cosine(X, a, b)
    X64 = X.astype(np.float64)
    np.testing.assert_allclose(c, np.sum(X64[a] * X64[b], axis=1), rtol=0, atol=1e-14)
    assert np.array_equal(c, exact_cosine(X, b, a))  # bit for bit
    assert np.array_equal(c[1234:1300], exact_cosine(X, a[1234:1300], b[1234:1300]))
    assert exact_cosine(X, a[:0], b[:0]).shape == (0,)


@pytest.mark.parametrize("n, d", [(300, 24), (40_000, 3), (5, 1)])
def test_exact_cosine_rows_equals_exact_cosine_bit_for_bit(rng, n, d):
    """The dense twin: every (row, column) value identical to exact_cosine's, across its tiles
    (whole rows when a row is short, column pieces of one row when it is long)."""
    X = unit_rows(rng, n, d)
    rows = rng.integers(0, n, 9)
    C = exact_cosine_rows(X, rows)
    want = exact_cosine(X, np.repeat(rows, n), np.tile(np.arange(n), rows.size)).reshape(rows.size, n)
    assert C.dtype == np.float64 and C.shape == (rows.size, n)
    assert np.array_equal(C, want)
    assert np.array_equal(exact_cosine_rows(X, rows[3:4], np.ascontiguousarray(X.T)), want[3:4])
    # and close to a float64 matrix product (a different summation order)
    X64 = X.astype(np.float64)
    np.testing.assert_allclose(C, X64[rows] @ X64.T, rtol=0, atol=1e-14)


@pytest.mark.parametrize("d", [3, 64, 512])
def test_float32_scores_stay_within_the_slack(rng, d):
    # the bound holds in any summation order, so whatever BLAS kernel computes the product
    X = unit_rows(rng, 200, d)
    S = exact_scores(X, X[:50])
    assert S.dtype == np.float32
    exact = exact_cosine(X, np.repeat(np.arange(50), 200), np.tile(np.arange(200), 50)).reshape(50, 200)
    assert np.abs(S.astype(np.float64) - exact).max() <= score_slack(d)


def test_exact_cosine_working_set_is_bounded(rng):
    X = rng.normal(size=(300, 256)).astype(np.float32)
    a = rng.integers(0, 300, size=20_000)
    b = rng.integers(0, 300, size=20_000)
    tracemalloc.start()
    try:
        got = exact_cosine(X, a, b)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    ref = np.einsum("ij,ij->i", X[a].astype(np.float64), X[b].astype(np.float64))
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-12)
    assert peak < 32 * 2**20  # in one piece the gathered rows would take about 100 MB at d = 256
