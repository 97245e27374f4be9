"""Embedding health: signs that a run is collapsing, cheap enough to compute every epoch.

* ``mean_impostor_cosine``: mean cosine similarity over all pairs of rows with different
  identities. Exact and O(n*d), with no pair listed: for unit vectors,
  ``sum_{i<j} x_i . x_j = (||sum_i x_i||^2 - sum_i ||x_i||^2) / 2``, and the same identity per
  identity gives the genuine part, which is subtracted (sums in float64).
* ``effective_dimension``: the participation ratio of the covariance eigenvalues,
  ``(sum l)^2 / sum l^2``. It needs no eigendecomposition: ``sum l = trace(C)`` and
  ``sum l^2 = ||C||_F^2`` for the symmetric covariance matrix ``C`` (computed from the (n, n)
  Gram matrix when there are fewer rows than dimensions). It is 1 when all variance
  lies along one direction and d when it is spread evenly over d directions.
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

import warnings

import numpy as np

from .._errors import TripletkitError, TripletkitWarning
from .._validate import as_codes, as_embeddings

__all__ = ["mean_impostor_cosine", "effective_dimension", "collapsed", "health_metrics",
           "COLLAPSE_MIN_DIMENSION", "COLLAPSE_MAX_IMPOSTOR_COSINE"]

COLLAPSE_MIN_DIMENSION = 2.0
COLLAPSE_MAX_IMPOSTOR_COSINE = 0.9


def _check_unit(x):
    norms = np.sqrt(np.einsum("ij,ij->i", x, x, dtype=np.float64))
    bad = np.abs(norms - 1.0) > 1e-3
    if bad.any():
        raise TripletkitError(
            f"embeddings have {int(bad.sum())} rows whose L2 norm is not 1 (first row positions: "
            f"{np.flatnonzero(bad)[:5].tolist()}); L2-normalise them first"
        )


def _sum_pairs(x64_sum, sq_norm_sum):
    return (float(x64_sum @ x64_sum) - sq_norm_sum) / 2.0


def mean_impostor_cosine(embeddings, labels, *, block_rows=65536):
    """Mean cosine over all pairs of rows with different identities (exact, O(n*d)).

    Parameters
    ----------
    embeddings : array-like of shape (n, d)
        Unit-normalised embeddings.
    labels : array-like of shape (n,)
        Identity of each row.
    block_rows : int, default 65536
        Rows converted to float64 at a time.

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
    total = np.zeros(d)
    per_id = np.zeros((k, d))
    sq = 0.0
    for s in range(0, n, int(block_rows)):
        xb = x[s : s + int(block_rows)].astype(np.float64)
        total += xb.sum(axis=0)
        _add_rows(per_id, codes[s : s + int(block_rows)], xb)
        sq += float(np.einsum("ij,ij->", xb, xb))
    sizes = np.bincount(codes, minlength=k).astype(np.int64)
    n_imp = n * (n - 1) // 2 - int(np.sum(sizes * (sizes - 1) // 2))
    if n_imp == 0:
        warnings.warn("health: no impostor pairs (one identity); mean impostor cosine is undefined",
                      TripletkitWarning, stacklevel=2)
        return None
    all_pairs = _sum_pairs(total, sq)
    genuine = (float(np.einsum("ij,ij->", per_id, per_id)) - sq) / 2.0
    # float32 rounding of unit rows can put the mean a few ulps outside [-1, 1]
    return float(np.clip((all_pairs - genuine) / n_imp, -1.0, 1.0))


def _add_rows(acc, codes, rows):
    """acc[codes[i]] += rows[i], through a sort and segment sums (np.add.at is slow for this)."""
    order = np.argsort(codes, kind="stable")
    c = codes[order]
    starts = np.flatnonzero(np.r_[True, c[1:] != c[:-1]])
    acc[c[starts]] += np.add.reduceat(rows[order], starts, axis=0)


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
    mean = x.mean(axis=0, dtype=np.float64)
    step = int(block_rows)
    if n < d:
        # (n, n) Gram matrix of the centred rows, accumulated over blocks of columns
        m = np.zeros((n, n))
        for s in range(0, d, step):
            xb = x[:, s : s + step].astype(np.float64) - mean[s : s + step]
            m += xb @ xb.T
    else:
        m = np.zeros((d, d))
        for s in range(0, n, step):
            xb = x[s : s + step].astype(np.float64) - mean
            m += xb.T @ xb
    # the 1 / (n - 1) of the covariance cancels in the ratio
    tr = float(np.trace(m))
    fro2 = float(np.einsum("ij,ij->", m, m))
    if fro2 <= 0.0 or tr <= 0.0:
        warnings.warn("health: the embeddings have no variance; effective dimension is undefined",
                      TripletkitWarning, stacklevel=2)
        return None
    return tr * tr / fro2


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
