"""Exact float64 cosines of the table's float32 unit rows, and the error bound of float32 scores.

Every decision of the miner (membership of a regime, a duplicate, an order by distance) is made on
:func:`exact_cosine`, a float64 dot product summed dimension by dimension in a fixed order, so a
value does not depend on the batch, block or process it is computed in. Float32 scores (faiss, a
BLAS product) only pre-select, inside the safety band of :func:`score_slack`.
"""

from __future__ import annotations

import numpy as np

__all__ = ["score_slack", "exact_cosine", "exact_cosine_rows", "exact_scores", "cosine_chunk_pairs"]

# Working set of one chunk of exact_cosine: both sides' rows gathered as float32 and copied to
# float64 (24 bytes per pair and dimension); 16 MiB whatever the dimension.
_COSINE_CHUNK_BYTES = 1 << 24
# Cells per tile of exact_cosine_rows (256 KiB of float64: fits a core's L2 cache).
_ROWS_TILE_CELLS = 1 << 15


def cosine_chunk_pairs(d):
    """Pairs per chunk of :func:`exact_cosine` for dimension ``d`` (at least 64)."""
    return int(max(64, _COSINE_CHUNK_BYTES // (24 * max(1, int(d)))))


def score_slack(dim):
    """Bound on |faiss float32 inner product - exact inner product| for unit rows of dimension ``dim``.

    A float32 sum of ``d`` products of unit vectors is off by at most about ``d * 2**-24`` in any
    summation order (the standard rounding-error bound gamma_d * sum |x_i y_i| <= gamma_d for unit
    vectors [1]_). Twice that plus 1e-6 covers the rounding of the stored unit rows and of the
    output.

    References
    ----------
    .. [1] N. J. Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., SIAM 2002,
       Sec. 3.1.
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
    columns = np.ascontiguousarray(embeddings.T) if transposed is None else transposed
    queries = np.asarray(embeddings[np.asarray(rows, dtype=np.int64)], dtype=np.float64)
    m, (d, n) = queries.shape[0], columns.shape
    out = np.empty((m, n), dtype=np.float64)
    # Work in tiles of about _ROWS_TILE_CELLS cells (whole rows, or one row cut into column
    # pieces) so that the d passes over a tile stay in cache: 2-3x faster than whole blocks.
    tile_rows = max(1, _ROWS_TILE_CELLS // max(n, 1))
    tile_columns = n if tile_rows > 1 else _ROWS_TILE_CELLS
    scratch = np.empty(min(tile_rows, m) * min(tile_columns, n), dtype=np.float64)
    for r0 in range(0, m, tile_rows):
        r1 = min(m, r0 + tile_rows)
        for c0 in range(0, n, tile_columns):
            c1 = min(n, c0 + tile_columns)
            tile = out[r0:r1, c0:c1]
            term = scratch[:(r1 - r0) * (c1 - c0)].reshape(r1 - r0, c1 - c0)
            np.multiply(queries[r0:r1, 0:1], columns[0, c0:c1], out=tile, dtype=np.float64)
            for j in range(1, d):
                np.multiply(queries[r0:r1, j:j + 1], columns[j, c0:c1], out=term, dtype=np.float64)
                tile += term
    return out


def exact_scores(embeddings, queries):
    """float32 inner products of ``queries`` (q, d) with every row: a (q, n) matrix (one BLAS call)."""
    return queries @ embeddings.T
