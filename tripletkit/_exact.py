"""Exact cosines: one definition of the score that every part of the package computes.

A score is the inner product of two unit rows after each coordinate is rounded to a multiple of
``2**-26`` (about 1.5e-8, the precision of float32 for coordinates near 0.25). On that grid every
product of two coordinates is a multiple of ``2**-52`` and every partial sum of a row pair is
bounded by the product of the two norms (Cauchy-Schwarz), so below 2 for unit rows: each partial
sum is a multiple of ``2**-52`` smaller than 2, which float64 represents exactly. Hence a float64
matrix product or row-wise sum of snapped rows is *exact*, in any summation order, with or
without FMA, in any BLAS kernel, block shape, thread count or process. Scaling both sides by a
power of two keeps that (the verification counts scaled products; see ``SNAP_SCALE``).

Where a float32 product (faiss) only pre-selects candidates, :func:`slack` bounds how far it can
lie from the exact score, so that a decision taken with the exact score never misses a row that
the float32 filter let through.

References
----------
.. [1] N. J. Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., SIAM 2002,
   Sec. 3.1 (the rounding-error bound of a float sum of products).
"""

from __future__ import annotations

import numpy as np

from ._errors import TripletkitError

__all__ = ["GRID_BITS", "snap", "cosines", "pair_cosines", "slack"]

#: Coordinates are rounded to multiples of 2**-GRID_BITS.
GRID_BITS = 26
_GRID = float(2**GRID_BITS)
# Largest squared norm a snapped row may have: products of two rows stay below 2**53 * 2**-52.
_MAX_SQ_NORM = 1.9
# Pairs per chunk of pair_cosines (two gathered (chunk, d) float64 matrices of 16 MiB at most).
_PAIR_CHUNK_BYTES = 1 << 24


def snap(x, scale=1.0, out=None):
    """Rows of ``x`` rounded to the grid, as float64 multiplied by ``scale`` (a power of two).

    Parameters
    ----------
    x : ndarray of shape (n, d)
        Unit rows (float32 or float64; norms within 1e-3 of 1).
    scale : float, default 1.0
        A power of two. Products of two rows snapped with ``scale`` are the exact cosines times
        ``scale**2`` as long as ``scale**2 * 2**53`` stays a power of two above the partial sums
        (any ``scale`` between ``2**-12`` and ``2**12`` does).
    out : ndarray of float64, shape (n, d), optional
        Where to write the result.

    Returns
    -------
    ndarray of float64, shape (n, d), C-contiguous
    """
    x = np.asarray(x)
    if out is None:
        out = np.empty(x.shape, np.float64)
    np.multiply(x, _GRID, out=out, casting="unsafe")
    np.rint(out, out=out)
    # Rows must stay near unit length, else partial sums could pass 2 and lose exactness.
    if out.size:
        sq = np.einsum("ij,ij->i", out, out) / (_GRID * _GRID)
        if not np.all(sq <= _MAX_SQ_NORM):
            first = int(np.flatnonzero(~(sq <= _MAX_SQ_NORM))[0])
            raise TripletkitError(
                f"row {first} has squared norm {float(sq[first]):.6g}; exact cosines need unit rows, "
                "L2-normalise the embeddings first"
            )
    out *= scale / _GRID
    return out


def cosines(a, b, out=None):
    """Exact cosines of snapped rows: ``a @ b.T`` (float64), shape (len(a), len(b))."""
    return np.matmul(a, b.T, out=out)


def pair_cosines(snapped, left, right):
    """Exact cosines of row pairs ``(left[i], right[i])`` of a snapped matrix, float64 (p,)."""
    left = np.asarray(left, dtype=np.int64)
    right = np.asarray(right, dtype=np.int64)
    out = np.empty(left.size, np.float64)
    chunk = int(max(64, _PAIR_CHUNK_BYTES // (8 * max(1, snapped.shape[1]))))
    for s in range(0, left.size, chunk):
        e = min(left.size, s + chunk)
        out[s:e] = np.einsum("ij,ij->i", snapped[left[s:e]], snapped[right[s:e]])
    return out


def slack(dim):
    """Bound on |float32 inner product - exact cosine| for unit rows of dimension ``dim``.

    A float32 sum of ``d`` products is off the real inner product by at most ``gamma_d * sum
    |x_i y_i| <= d * 2**-24`` for unit rows, in any summation order (Higham 2002, Sec. 3.1); the
    grid moves the inner product by at most ``2 * sqrt(d) * 2**-27``. Twice the first plus 1e-6
    covers both and the rounding of the stored unit rows.
    """
    return 2.0 * dim * 2.0**-24 + 1e-6
