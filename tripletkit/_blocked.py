"""Matrix products cut into row blocks small enough for OpenBLAS to run each on one thread.

OpenBLAS runs a product single-threaded below about 2**18 multiply-adds (its GEMM threading
threshold) and with every core above it. For small products, such as the projection head's (a
minibatch of a few hundred rows times d_in x dim), the threads' start-up and synchronisation
dominate: about 10x slower than one thread on an idle 2-core machine and up to 100x on a loaded
one (measured, see docs/benchmarks_head.md). The blocks depend only on the shapes, so results
stay deterministic.
"""

from __future__ import annotations

import numpy as np

__all__ = ["BLOCK_MACS", "rows_per_block", "matmul", "matmul_tn"]

#: Multiply-adds per matrix product call.
BLOCK_MACS = 1 << 18


def rows_per_block(k, n):
    """Rows of a (rows x k) @ (k x n) product that stay within :data:`BLOCK_MACS`."""
    return max(1, BLOCK_MACS // max(1, k * n))


def matmul(A, B):
    """``A @ B`` computed in row blocks of ``A``."""
    r = rows_per_block(A.shape[1], B.shape[1])
    if A.shape[0] <= r:
        return A @ B
    out = np.empty((A.shape[0], B.shape[1]), dtype=np.result_type(A, B))
    for s in range(0, A.shape[0], r):
        np.matmul(A[s:s + r], B, out=out[s:s + r])
    return out


def matmul_tn(A, G):
    """``A.T @ G`` accumulated over row blocks of ``A`` and ``G``."""
    r = rows_per_block(A.shape[1], G.shape[1])
    if A.shape[0] <= r:
        return A.T @ G
    out = np.zeros((A.shape[1], G.shape[1]), dtype=np.result_type(A, G))
    for s in range(0, A.shape[0], r):
        out += A[s:s + r].T @ G[s:s + r]
    return out
