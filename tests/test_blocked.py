"""Tests of tripletkit._blocked: products in row blocks equal the one-shot products."""

import numpy as np
import pytest

from tripletkit._blocked import matmul, matmul_tn, rows_per_block


@pytest.mark.parametrize("rows, k, n", [(5, 4, 3), (700, 64, 16), (3000, 128, 16), (700, 64, 128)])
def test_blocked_products_equal_one_shot(rng, rows, k, n):
    # The head cuts its products into row blocks (to stay single-threaded); the blocked results
    # must equal the one-shot products, for one block and for many.
    A, B, G = rng.normal(size=(rows, k)), rng.normal(size=(k, n)), rng.normal(size=(rows, n))
    np.testing.assert_allclose(matmul(A, B), A @ B, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(matmul_tn(A, G), A.T @ G, rtol=1e-12, atol=1e-10)
    assert (rows > rows_per_block(k, n)) == (rows >= 700)  # both paths are exercised
