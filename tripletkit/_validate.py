"""Validation at the public entry points: shapes, dtypes, finiteness, lengths.

Inner functions trust what these helpers return.
"""

from __future__ import annotations

import numpy as np

from ._errors import TripletkitError

__all__ = ["as_embeddings", "as_codes", "check_same_length", "l2_normalise"]


def as_embeddings(x, name="embeddings", *, normalise=False, dtype=np.float32):
    """Return ``x`` as a C-contiguous float32 matrix of shape (n, d) with finite values.

    Parameters
    ----------
    x : array-like of shape (n, d)
    name : str
        Name used in error messages.
    normalise : bool, default False
        L2-normalise every row (zero-norm rows are an error).
    dtype : numpy dtype, default float32
        float32 for faiss and storage; float64 where gradients are computed.
    """
    arr = np.asarray(x)
    if arr.ndim != 2:
        raise TripletkitError(f"{name} must be a 2-D array (rows x dimension), got shape {arr.shape}")
    if arr.shape[1] < 1:
        raise TripletkitError(f"{name} has dimension 0; every row needs at least one value")
    if not np.issubdtype(arr.dtype, np.number) or np.issubdtype(arr.dtype, np.complexfloating):
        raise TripletkitError(f"{name} must hold real numbers, got dtype {arr.dtype}")
    arr = np.ascontiguousarray(arr, dtype=dtype)
    bad = ~np.isfinite(arr).all(axis=1)
    if bad.any():
        first = np.flatnonzero(bad)[:5].tolist()
        raise TripletkitError(
            f"{name} has {int(bad.sum())} rows with NaN or Inf (first row positions: {first}); "
            "remove or repair them"
        )
    if normalise:
        arr = l2_normalise(arr, name=name)
    return arr


def l2_normalise(arr, name="embeddings"):
    """Divide each row of a float32 matrix by its L2 norm (computed in float64)."""
    norms = np.sqrt(np.einsum("ij,ij->i", arr, arr, dtype=np.float64))
    zero = norms == 0
    if zero.any():
        first = np.flatnonzero(zero)[:5].tolist()
        raise TripletkitError(
            f"{name} has {int(zero.sum())} zero-norm rows (first row positions: {first}); "
            "a zero vector has no direction and cannot be normalised"
        )
    return np.ascontiguousarray(arr / norms[:, None].astype(arr.dtype), dtype=arr.dtype)


def as_codes(labels, n=None, name="labels"):
    """Return ``(codes, values)``: dense int64 codes 0..k-1 and the sorted unique label values."""
    arr = np.asarray(labels)
    if arr.ndim != 1:
        raise TripletkitError(f"{name} must be 1-D, got shape {arr.shape}")
    if n is not None and arr.shape[0] != n:
        raise TripletkitError(f"{name} has {arr.shape[0]} entries but there are {n} rows; give one per row")
    if arr.dtype == object:
        if any(v is None for v in arr):
            raise TripletkitError(f"{name} contains null values; every row needs a label")
    elif np.issubdtype(arr.dtype, np.floating) and np.isnan(arr).any():
        raise TripletkitError(f"{name} contains NaN; every row needs a label")
    values, codes = np.unique(arr, return_inverse=True)
    return codes.astype(np.int64).reshape(-1), values


def check_same_length(**arrays):
    """Raise when the given 1-D/2-D arrays do not all have the same number of rows."""
    lengths = {k: len(v) for k, v in arrays.items()}
    if len(set(lengths.values())) > 1:
        desc = ", ".join(f"{k}={v}" for k, v in lengths.items())
        raise TripletkitError(f"inputs must have the same number of rows, got {desc}")
