"""Embedding health: signs that a run is collapsing, cheap enough to compute every epoch.

* ``mean_impostor_cosine``: mean cosine similarity over all pairs of rows with different
  identities. Exact and O(n*d), with no pair listed: the sum over impostor pairs is
  ``(||sum_i x_i||^2 - sum_c ||sum_{i in c} x_i||^2) / 2``, computed in integers on the grid of
  :mod:`tripletkit._exact` (the exact mean of the exact cosines, rounded once).
* ``effective_dimension``: the participation ratio of the covariance eigenvalues,
  ``(sum l)^2 / sum l^2``. It needs no eigendecomposition: ``sum l = trace(C)`` and
  ``sum l^2 = ||C||_F^2`` for the symmetric covariance matrix ``C`` (computed from the (n, n)
  Gram matrix when there are fewer rows than dimensions). It is 1 when all variance
  lies along one direction and d when it is spread evenly over d directions. Computed in
  integers on rows rounded to multiples of ``2**-20`` (so the same value whatever the BLAS or
  thread count), then rounded once.
* ``collapsed``: our rule of thumb (common practice, no source): a run is flagged as collapsed
  when the effective dimension is below 2 or the mean impostor cosine is above 0.9, i.e. the
  embeddings have shrunk onto a line or into a small cap of the sphere.

References
----------
.. [1] P. Gao, E. Trautmann, B. Yu, G. Santhanam, S. Ryu, K. Shenoy and S. Ganguli, "A theory of
   multineuronal dimensionality, dynamics and measurement", bioRxiv 214262, 2017 (participation
   ratio as a dimension; cited from memory).
"""

from __future__ import annotations

import math
import warnings
from fractions import Fraction

import numpy as np

from .._errors import TripletkitError, TripletkitWarning
from .._exact import GRID_BITS, snap
from .._validate import UNIT_NORM_TOLERANCE, as_codes, as_embeddings

__all__ = ["mean_impostor_cosine", "effective_dimension", "collapsed", "health_metrics",
           "COLLAPSE_MIN_DIMENSION", "COLLAPSE_MAX_IMPOSTOR_COSINE"]

COLLAPSE_MIN_DIMENSION = 2.0
COLLAPSE_MAX_IMPOSTOR_COSINE = 0.9
# Coordinates of the effective dimension's integer arithmetic: multiples of 2**-20 (at most).
_DIM_BITS = 20


def _check_unit(x):
    norms = np.sqrt(np.einsum("ij,ij->i", x, x, dtype=np.float64))
    bad = np.abs(norms - 1.0) > UNIT_NORM_TOLERANCE
    if bad.any():
        raise TripletkitError(
            f"embeddings have {int(bad.sum())} rows whose L2 norm is not 1 (first row positions: "
            f"{np.flatnonzero(bad)[:5].tolist()}); L2-normalise them first"
        )


def mean_impostor_cosine(embeddings, labels, *, block_rows=65536):
    """Mean cosine over all pairs of rows with different identities (exact, O(n*d)).

    Parameters
    ----------
    embeddings : array-like of shape (n, d)
        Unit-normalised embeddings.
    labels : array-like of shape (n,)
        Identity of each row.
    block_rows : int, default 65536
        Rows snapped to the grid at a time.

    Returns
    -------
    float or None
        ``None`` (with a warning) when there are no impostor pairs.
    """
    x = as_embeddings(embeddings)
    _check_unit(x)
    n, d = x.shape
    codes, values = as_codes(labels, n=n)
    k = values.size
    sizes = np.bincount(codes, minlength=k).astype(np.int64)
    n_imp = n * (n - 1) // 2 - int(np.sum(sizes * (sizes - 1) // 2))
    if n_imp == 0:
        warnings.warn("health: no impostor pairs (one identity); mean impostor cosine is undefined",
                      TripletkitWarning, stacklevel=2)
        return None
    # integer coordinates on the grid (multiples of 2**-GRID_BITS): sums are exact in int64
    per_id = np.zeros((k, d), np.int64)
    for s in range(0, n, int(block_rows)):
        q = snap(x[s : s + int(block_rows)], scale=2.0**GRID_BITS).astype(np.int64)
        _add_rows(per_id, codes[s : s + int(block_rows)], q)
    total = per_id.sum(axis=0)
    twice = _square_sum(total[None, :]) - _square_sum(per_id)
    # float rounding of unit rows can put the mean a few ulps outside [-1, 1]
    return float(np.clip(Fraction(twice, 2 * n_imp * 4**GRID_BITS), -1.0, 1.0))


def _add_rows(acc, codes, rows):
    """acc[codes[i]] += rows[i], through a sort and segment sums (np.add.at is slow for this)."""
    order = np.argsort(codes, kind="stable")
    c = codes[order]
    starts = np.flatnonzero(np.r_[True, c[1:] != c[:-1]])
    acc[c[starts]] += np.add.reduceat(rows[order], starts, axis=0)


def _square_sum(a):
    """Exact sum of the squares of an int64 matrix, as a Python int (no overflow)."""
    return int((a.astype(object) ** 2).sum()) if a.size else 0


def effective_dimension(embeddings, *, block_rows=65536):
    """Participation ratio ``(sum l)^2 / sum l^2`` of the covariance eigenvalues ``l``.

    Parameters
    ----------
    embeddings : array-like of shape (n, d), n >= 2
    block_rows : int, default 65536
        Rows (or, when n < d, columns) converted to float64 at a time.

    Returns
    -------
    float
        Between 1 and d; ``None`` (with a warning) when all rows are identical (no variance).

    Notes
    -----
    With ``Xc`` the centred rows, the (d, d) scatter matrix ``Xc^T Xc`` and the (n, n) Gram
    matrix ``Xc Xc^T`` have the same non-zero eigenvalues, hence the same trace and the same
    squared Frobenius norm. The smaller of the two is built, so the working set is
    ``min(n, d)^2`` float64 values and never grows with ``d^2`` for a short table of wide rows.

    References
    ----------
    .. [1] Gao et al., "A theory of multineuronal dimensionality, dynamics and measurement",
       bioRxiv, 2017.
    """
    x = as_embeddings(embeddings)
    n, d = x.shape
    if n < 2:
        raise TripletkitError(f"effective_dimension needs at least 2 rows, got {n}")
    # Coordinates as integers |q| <= 2**bits: a float64 product over 2**(52 - 2 bits) rows (or
    # columns) is exact, and int64 holds the total of n such squares.
    bits = int(min(_DIM_BITS, (62 - math.ceil(math.log2(max(n, d) + 1))) // 2))
    step = int(max(1, min(int(block_rows), 2 ** (52 - 2 * bits))))
    # rows need not be unit: scale by a power of two so that every |coordinate| <= 1
    top = float(np.max(np.abs(x))) if x.size else 0.0
    unit = 2.0 ** (bits - (math.ceil(math.log2(top)) if top > 0 else 0))
    total = np.zeros(d, np.int64)
    if n < d:
        # (n, n) Gram matrix of the rows, accumulated over blocks of columns, exactly
        m = np.zeros((n, n), np.int64)
        for s in range(0, d, step):
            q = _integer_rows(x[:, s : s + step], unit)
            m += (q @ q.T).astype(np.int64)
        # centring, element by element in float64 (no BLAS): H G H with H = I - 1 1^T / n
        r = np.array([math.fsum(row) for row in m.tolist()]) / n
        centred = m.astype(np.float64) - r[:, None] - r[None, :] + math.fsum(r.tolist()) / n
    else:
        m = np.zeros((d, d), np.int64)
        for s in range(0, n, step):
            q = _integer_rows(x[s : s + step], unit)
            m += (q.T @ q).astype(np.int64)
            total += q.sum(axis=0).astype(np.int64)
        # centring, element by element in float64 (no BLAS): M / n - mean mean^T
        mean = total.astype(np.float64) / n
        centred = m.astype(np.float64) / n - np.multiply.outer(mean, mean)
    # exactly rounded sums, whatever their order
    tr = math.fsum(np.diagonal(centred))
    np.multiply(centred, centred, out=centred)
    fro2 = math.fsum(centred.ravel())
    if not (fro2 > 0.0 and tr > 0.0):
        warnings.warn("health: the embeddings have no variance; effective dimension is undefined",
                      TripletkitWarning, stacklevel=2)
        return None
    # the scale (1 / (n - 1), unit**-2) cancels in the ratio
    return tr * tr / fro2


def _integer_rows(x, unit):
    """Rows (or a block of columns) times ``unit`` (a power of two) rounded to integers, as float64."""
    return np.rint(np.multiply(x, unit, dtype=np.float64))


def collapsed(effective_dim, mean_impostor):
    """Our collapse rule (common practice, no source): dimension < 2 or impostor cosine > 0.9.

    Parameters
    ----------
    effective_dim : float or None
    mean_impostor : float or None

    Returns
    -------
    bool or None
        ``None`` when neither input is known.
    """
    flags = []
    if effective_dim is not None:
        flags.append(effective_dim < COLLAPSE_MIN_DIMENSION)
    if mean_impostor is not None:
        flags.append(mean_impostor > COLLAPSE_MAX_IMPOSTOR_COSINE)
    return None if not flags else bool(any(flags))


def health_metrics(embeddings, labels):
    """Health summary: ``mean_impostor_cosine``, ``effective_dimension``, ``collapsed`` and ``rule``."""
    mic = mean_impostor_cosine(embeddings, labels)
    dim = effective_dimension(embeddings)
    return {
        "mean_impostor_cosine": mic,
        "effective_dimension": dim,
        "collapsed": collapsed(dim, mic),
        "rule": (f"collapsed when effective_dimension < {COLLAPSE_MIN_DIMENSION:g} or "
                 f"mean_impostor_cosine > {COLLAPSE_MAX_IMPOSTOR_COSINE:g} (our rule of thumb)"),
    }
