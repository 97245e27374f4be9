"""Validation at the public entry points: shapes, dtypes, finiteness, lengths.

Inner functions trust what these helpers return.
"""

from __future__ import annotations

import numpy as np

from ._errors import TripletkitError

__all__ = ["as_embeddings", "as_codes", "check_same_length", "l2_normalise", "float32_rows", "row_norms",
           "UNIT_NORM_TOLERANCE", "MAX_DISTANCE", "DISTANCES", "check_unit", "check_margin", "check_distance",
           "whole_number", "check_choice", "check_flag"]

#: Rows whose L2 norm is within this of 1 count as unit rows.
UNIT_NORM_TOLERANCE = 1e-3
#: Distances between unit vectors.
DISTANCES = ("squared", "euclidean")
#: The largest distance between two unit vectors: ||a - b||^2 <= 4 (squared), ||a - b|| <= 2 (euclidean).
MAX_DISTANCE = {"squared": 4.0, "euclidean": 2.0}

_F32_MAX = float(np.finfo(np.float32).max)
_F32_TINY = float(np.finfo(np.float32).tiny)  # the smallest normal float32
# Rows processed at once when scanning a matrix (bounds the temporary memory).
_ROW_BLOCK = 65536


def float32_rows(x):
    """Float rows as float32 rows pointing the same way, and the number of rows rescaled.

    A row whose largest absolute value lies outside float32's normal range (above about 3.4e38 or
    below about 1.2e-38, as finite float64 values can) is first multiplied by a power of two
    (exact in float64) that brings it to [0.5, 1): cast as it is, it would overflow to Inf or
    flush to zero, and its direction, all that the unit vector keeps, would be lost. Every other
    row is cast as it is, so a float64 table and its float32 copy give the same unit vectors.
    Rows with NaN or Inf are cast as they are (and found by the finiteness check).

    Parameters
    ----------
    x : ndarray of shape (n, d)
        float64 (or another float type wider than float32).

    Returns
    -------
    rows : ndarray of float32, shape (n, d), C-contiguous
    rescaled : int
        How many rows were rescaled (their norms are no longer those of the input).
    """
    out = np.empty(x.shape, dtype=np.float32)
    rescaled = 0
    for s in range(0, x.shape[0], _ROW_BLOCK):
        blk = np.asarray(x[s:s + _ROW_BLOCK], dtype=np.float64)
        with np.errstate(invalid="ignore"):
            scale = np.abs(blk).max(axis=1, initial=0.0)
        wide = np.isfinite(scale) & ((scale > _F32_MAX) | ((scale > 0) & (scale < _F32_TINY)))
        if wide.any():
            blk = blk.copy()
            blk[wide] = np.ldexp(blk[wide], -np.frexp(scale[wide])[1][:, None])
            rescaled += int(wide.sum())
        with np.errstate(over="ignore"):  # only rows that hold Inf already
            out[s:s + _ROW_BLOCK] = blk
    return out, rescaled


def row_norms(arr):
    """L2 norms of the rows of a float matrix, in float64, without overflow or underflow.

    The plain sum of squares is used where it is exact enough (every float32 row, and float64 rows
    of ordinary size); a float64 row whose sum of squares overflows or underflows is scaled by its
    largest absolute value first. Rows with NaN or Inf give NaN or Inf.
    """
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        norms = np.sqrt(np.einsum("ij,ij->i", arr, arr, dtype=np.float64))
        if arr.dtype.itemsize > 4 and arr.size:
            redo = np.flatnonzero(~(norms < 2.0**500) | (norms < 2.0**-450))
            if redo.size:
                rows = np.asarray(arr[redo], dtype=np.float64)
                scale = np.abs(rows).max(axis=1)
                ok = np.isfinite(scale) & (scale > 0)
                scaled = rows[ok] / scale[ok, None]
                norms[redo[ok]] = scale[ok] * np.sqrt(np.einsum("ij,ij->i", scaled, scaled))
    return norms


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
    bad = ~np.isfinite(arr).all(axis=1)
    if bad.any():
        first = np.flatnonzero(bad)[:5].tolist()
        raise TripletkitError(
            f"{name} has {int(bad.sum())} rows with NaN or Inf (first row positions: {first}); "
            "remove or repair them"
        )
    if np.dtype(dtype) == np.float32 and arr.dtype.kind == "f" and arr.dtype.itemsize > 4:
        cast, rescaled = float32_rows(arr)
        if rescaled and not normalise:
            # raw vectors keep their length: rescaling only some rows would change what they say
            wide = np.flatnonzero(_outside_float32(arr))
            raise TripletkitError(
                f"{name} has {wide.size} rows with values outside float32's range (about 1.2e-38 to 3.4e38 in "
                f"absolute value; first row positions: {wide[:5].tolist()}); divide the rows by their norms (in "
                "float64) first"
            )
        arr = cast
    else:
        arr = np.ascontiguousarray(arr, dtype=dtype)
    if normalise:
        arr = l2_normalise(arr, name=name)
    return arr


def _outside_float32(arr):
    scale = np.abs(arr).max(axis=1, initial=0.0)
    return (scale > _F32_MAX) | ((scale > 0) & (scale < _F32_TINY))


def l2_normalise(arr, name="embeddings"):
    """Divide each row of a float matrix by its L2 norm (computed in float64, see :func:`row_norms`)."""
    norms = row_norms(arr)
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


# -- scalars and options ------------------------------------------------------------------------
def check_unit(x, name="embeddings"):
    """Refuse rows whose L2 norm is not 1 within :data:`UNIT_NORM_TOLERANCE`."""
    norms = np.sqrt(np.einsum("ij,ij->i", x, x, dtype=np.float64))
    bad = np.abs(norms - 1.0) > UNIT_NORM_TOLERANCE
    if bad.any():
        first = np.flatnonzero(bad)[:5].tolist()
        raise TripletkitError(
            f"{name} has {int(bad.sum())} rows whose L2 norm is not 1 (first row positions: {first}); "
            "L2-normalise the embeddings first (scores are cosine similarities of unit vectors)"
        )


def check_margin(margin, distance, where="margin"):
    """Refuse a margin that no pair of unit vectors can reach under ``distance``.

    With margin alpha >= the largest distance D, d_an >= d_ap + alpha would need d_an >= D with
    d_ap = 0: no triplet is ever easy and every one is active, so the margin cannot be what was
    meant. ``where`` names the key or option in the message.
    """
    top = MAX_DISTANCE[distance]
    if margin >= top:
        raise TripletkitError(
            f"{where} = {margin!r} cannot be reached with distance = {distance}: distances between unit vectors "
            f"lie in [0, {top:g}], so the margin must lie in (0, {top:g})"
        )


def check_distance(distance, name="distance"):
    """``distance`` if it is one of :data:`DISTANCES`."""
    if not isinstance(distance, str) or distance not in DISTANCES:
        raise TripletkitError(f"{name} must be 'squared' or 'euclidean', got {distance!r}; pick one of those two")
    return distance


def whole_number(value, name, low=0, allow_none=False):
    """``value`` as an int if it is a whole number >= ``low`` (booleans refused), else an error."""
    if value is None and allow_none:
        return None
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or value < low:
        raise TripletkitError(f"{name} must be a whole number >= {low}, got {value!r}")
    return int(value)


def check_choice(value, name, choices):
    """``value`` if it is one of ``choices``, else an error listing them."""
    if not isinstance(value, str) or value not in choices:
        allowed = ", ".join(repr(c) for c in choices)
        raise TripletkitError(f"{name} must be one of {allowed}, got {value!r}")
    return value


def check_flag(value, name):
    """``value`` as a bool if it is True or False."""
    if not isinstance(value, (bool, np.bool_)):
        raise TripletkitError(f"{name} must be True or False, got {value!r}")
    return bool(value)


# -- checks of mining (added by the mining room) ------------------------------------------------
def margin_number(margin):
    """``margin`` as a float if it is a finite number >= 0 (booleans refused), else an error.

    The margin of a loss or a regime; :func:`check_margin` then refuses one that no pair of unit
    vectors can reach.
    """
    if isinstance(margin, (bool, np.bool_)):
        raise TripletkitError(f"margin must be a number >= 0, got {margin!r}")
    try:
        value = float(margin)
    except (TypeError, ValueError):
        raise TripletkitError(f"margin must be a number >= 0, got {margin!r}") from None
    if not np.isfinite(value) or value < 0:
        raise TripletkitError(f"margin must be a finite number >= 0, got {margin!r}")
    return value


# -- checks of metrics (added by the metrics room) ----------------------------------------------
def as_scores(scores, name):
    """``scores`` as a 1-D float64 array of finite real numbers."""
    arr = np.asarray(scores)
    if arr.ndim != 1:
        raise TripletkitError(f"{name} must be a 1-D array of scores, got shape {arr.shape}")
    if arr.size and (not np.issubdtype(arr.dtype, np.number) or np.issubdtype(arr.dtype, np.complexfloating)):
        raise TripletkitError(f"{name} must hold real numbers, got dtype {arr.dtype}")
    arr = arr.astype(np.float64)
    bad = ~np.isfinite(arr)
    if bad.any():
        raise TripletkitError(
            f"{name} has {int(bad.sum())} NaN or Inf scores (first positions: {np.flatnonzero(bad)[:5].tolist()}); "
            "remove or repair them"
        )
    return arr


def as_positions(positions, n, name):
    """``positions`` as a 1-D int64 array of row positions of a table with ``n`` rows."""
    arr = np.asarray(positions)
    if arr.ndim != 1:
        raise TripletkitError(f"{name} must be a 1-D array of row positions, got shape {arr.shape}")
    if arr.size and not np.issubdtype(arr.dtype, np.integer):
        raise TripletkitError(f"{name} must hold integer row positions, got dtype {arr.dtype}")
    arr = arr.astype(np.int64)
    bad = (arr < 0) | (arr >= n)
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        raise TripletkitError(
            f"{name}[{first}] = {int(arr[first])} is not a row position of a table with {n} rows; "
            "positions run from 0 to n-1"
        )
    return arr


def check_fmr_targets(fmr_targets):
    """FMR targets as a sorted list of distinct floats in (0, 1]."""
    try:
        targets = [float(x) for x in fmr_targets]
    except (TypeError, ValueError):
        raise TripletkitError(f"fmr_targets must be a list of numbers, got {fmr_targets!r}") from None
    bad = [x for x in targets if not (0.0 < x <= 1.0) or not np.isfinite(x)]
    if bad:
        raise TripletkitError(f"fmr_targets must lie in (0, 1], got {bad}; give e.g. [0.0001, 0.001, 0.01]")
    if not targets:
        raise TripletkitError("fmr_targets is empty; give at least one FMR target, e.g. [0.001]")
    return sorted(set(targets))


def check_bootstrap(replicates):
    """A number of bootstrap replicates (0: no interval), as an int."""
    if isinstance(replicates, bool) or not isinstance(replicates, (int, np.integer)) or replicates < 0:
        raise TripletkitError(f"bootstrap must be a whole number of replicates >= 0, got {replicates!r}")
    return int(replicates)


def check_confidence(confidence):
    """The coverage of an interval, a float in (0, 1)."""
    if not (0.0 < float(confidence) < 1.0):
        raise TripletkitError(f"confidence must lie in (0, 1), got {confidence!r}; e.g. 0.95")
    return float(confidence)


# -- checks of reports and sweeps (added by the report room) ------------------------------------


def raw_unit_rows(x, name):
    """Validate raw vectors and return them as float64 unit rows plus their norms.

    Shapes, finiteness and zero norms are checked by the shared helper (which works in the
    package's float32 embedding dtype); the arithmetic then uses float64 copies of the input.
    """
    as_embeddings(x, name, normalise=True)
    x64 = np.asarray(x, dtype=np.float64)
    norms = row_norms(x64)  # no overflow for rows of huge finite values
    return x64 / norms[:, None], norms
