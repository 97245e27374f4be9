"""Columns of an embedding table: Arrow columns -> validated numpy arrays (ids, labels, groups,
the embedding matrix), with one-line errors that name the column and the first offending rows."""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from .._errors import TripletkitError
from .._validate import float32_rows

__all__ = ["numpy_of", "id_array", "key_values", "group_values", "embedding_matrix", "first_duplicate", "first_ids", "plain",
           "as_float32"]


# numpy dtypes of Arrow's fixed-width number types
_NUMPY_TYPES = {pa.int8(): np.int8, pa.int16(): np.int16, pa.int32(): np.int32, pa.int64(): np.int64,
                pa.uint8(): np.uint8, pa.uint16(): np.uint16, pa.uint32(): np.uint32, pa.uint64(): np.uint64,
                pa.float16(): np.float16, pa.float32(): np.float32, pa.float64(): np.float64}


def numpy_of(arr):
    """A numpy array holding an Arrow array's values (nulls must have been refused before).

    pyarrow's own ``to_numpy`` imports pandas when pandas is installed (about a third of a second
    at every start); reading the buffers directly does not, and is zero-copy for numbers.
    Numbers come back in their numpy type, booleans as bool, strings as an object array.
    """
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks() if arr.num_chunks != 1 else arr.chunk(0)
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    if pa.types.is_boolean(arr.type):  # bit-packed, least significant bit first
        bits = np.unpackbits(np.frombuffer(arr.buffers()[1], np.uint8), bitorder="little")
        return bits[arr.offset:arr.offset + len(arr)].astype(bool)
    dtype = _NUMPY_TYPES.get(arr.type)
    if dtype is not None:
        return np.frombuffer(arr.buffers()[1], dtype=dtype, count=len(arr), offset=arr.offset * np.dtype(dtype).itemsize)
    return np.array(arr.to_pylist(), dtype=object)


def first_ids(ids, mask, k=5):
    """The first ``k`` ids where ``mask`` holds, formatted for a message."""
    pos = np.flatnonzero(mask)[:k]
    return ", ".join(repr(plain(ids[p])) for p in pos)


def plain(v):
    return v.item() if isinstance(v, np.generic) else v


def id_array(ids, what="ids"):
    """``ids`` as an Arrow array of int64 or strings, the id kinds of the table contract.

    Parameters
    ----------
    ids : array-like of shape (n,), pyarrow.Array or ChunkedArray
    what : str
        What the ids are, for messages (e.g. ``"anchor ids of triplet table 't.parquet'"``).

    Floats (0.7 is no id, and 1.0 would silently become 1), booleans, nulls and mixed kinds are
    errors.
    """
    if isinstance(ids, (pa.Array, pa.ChunkedArray)):
        arr = ids
    else:
        values = np.asarray(ids)
        if values.ndim != 1:
            raise TripletkitError(f"{what} must be a 1-D column of ids, got shape {values.shape}")
        if values.size == 0:
            return pa.array([], type=pa.string() if values.dtype.kind in "OUS" else pa.int64())
        try:
            arr = pa.array(values.tolist() if values.dtype == object else values)
        except (pa.ArrowInvalid, pa.ArrowTypeError):
            raise TripletkitError(f"{what} mix integers and strings; ids are all int64 or all strings") from None
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    t = arr.type
    if pa.types.is_dictionary(t):
        arr = arr.cast(t.value_type)
        t = arr.type
    if pa.types.is_null(t) or arr.null_count:
        first = int(np.flatnonzero(numpy_of(arr.is_null()))[0])
        raise TripletkitError(f"{what} have {arr.null_count} null values (first at row {first}); every row needs an id")
    if pa.types.is_integer(t):
        try:
            return arr.cast(pa.int64())
        except pa.ArrowInvalid:
            raise TripletkitError(f"{what} have {t} values above {np.iinfo(np.int64).max}; ids are int64 or "
                                  "strings") from None
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        return arr.cast(pa.string())
    raise TripletkitError(f"{what} have type {t}; ids are int64 or strings (as in the embedding table)")


def key_values(col, name, role, where):
    t = col.type
    if pa.types.is_dictionary(t):
        col = col.cast(t.value_type)
        t = col.type
    if col.null_count:
        first = int(np.flatnonzero(numpy_of(col.is_null()))[0])
        raise TripletkitError(
            f"{role} column {name!r}{where} has {col.null_count} null values (first at row {first}); "
            f"every row needs an {role}" if role == "id" else
            f"{role} column {name!r}{where} has {col.null_count} null values (first at row {first}); "
            f"every row needs a {role}"
        )
    if pa.types.is_integer(t):
        values = numpy_of(col)
        if t == pa.uint64() and values.size and values.max() > np.iinfo(np.int64).max:
            # uint64 values above 2**63 - 1 do not fit the int64 the contract asks for
            raise TripletkitError(
                f"{role} column {name!r}{where} has {t} values above {np.iinfo(np.int64).max}; store the {role}s "
                "as int64 or string"
            )
        return values.astype(np.int64, copy=False)
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        return numpy_of(col)
    raise TripletkitError(f"{role} column {name!r}{where} has type {t}; expected int64 or string")


def group_values(col, name, where):
    """The optional subgroup column as a numpy array: integers, strings, booleans or numbers, no nulls."""
    t = col.type
    if pa.types.is_dictionary(t):
        col = col.cast(t.value_type)
        t = col.type
    if not (pa.types.is_integer(t) or pa.types.is_string(t) or pa.types.is_large_string(t)
            or pa.types.is_boolean(t) or pa.types.is_floating(t)):
        raise TripletkitError(
            f"group column {name!r}{where} has type {t}; expected strings or integers (name another column "
            "with group_column=...)"
        )
    if col.null_count:
        first = int(np.flatnonzero(numpy_of(col.is_null()))[0])
        raise TripletkitError(
            f"group column {name!r}{where} has {col.null_count} null values (first at row {first}); fill them "
            "(e.g. with 'unknown') or name another column with group_column=..."
        )
    values = numpy_of(col)
    if pa.types.is_floating(t) and np.isnan(values).any():
        first = int(np.flatnonzero(np.isnan(values))[0])
        raise TripletkitError(
            f"group column {name!r}{where} has NaN values (first at row {first}); every row needs a group"
        )
    return values


def first_duplicate(ids):
    uniq, counts = np.unique(ids, return_counts=True)
    return plain(uniq[np.argmax(counts > 1)])


def embedding_matrix(col, name, ids, where):
    """Convert an embedding column to a float32 (n, d) matrix without a per-row Python loop."""
    t = col.type
    arr = col.combine_chunks() if isinstance(col, pa.ChunkedArray) else col
    if not (pa.types.is_fixed_size_list(t) or pa.types.is_list(t) or pa.types.is_large_list(t)):
        raise TripletkitError(
            f"embedding column {name!r}{where} has type {t}; expected fixed_size_list<float32>[d] or list<float32>"
        )
    vt = t.value_type
    if not pa.types.is_floating(vt) or pa.types.is_float16(vt):
        raise TripletkitError(f"embedding column {name!r}{where} holds {vt} values; expected float32 or float64")
    if arr.null_count:
        mask = numpy_of(arr.is_null())
        raise TripletkitError(
            f"embedding column {name!r}{where} has {int(mask.sum())} null rows (first ids: {first_ids(ids, mask)}); "
            "every row needs a vector, remove those rows"
        )
    n = len(arr)
    if pa.types.is_fixed_size_list(t):
        d = t.list_size
        first = arr.offset * d  # the child values of this (possibly sliced) array start here
    else:
        offsets = np.frombuffer(arr.buffers()[1], np.int64 if pa.types.is_large_list(t) else np.int32,
                                count=n + 1, offset=arr.offset * (8 if pa.types.is_large_list(t) else 4))
        lengths = np.diff(offsets)
        lo, hi = int(lengths.min()), int(lengths.max())
        if lo != hi:
            ragged = lengths != lengths[0]
            raise TripletkitError(
                f"embedding column {name!r}{where} has rows of length {int(lengths[0])} and "
                f"{int(lengths[ragged][0])} (first ragged id: {first_ids(ids, ragged, 1)}); every row must have the same length"
            )
        d = lo
        first = int(offsets[0])
    if d == 0:
        raise TripletkitError(f"embedding column {name!r}{where} has rows of length 0; every row needs at least one value")
    # the child values directly (flatten() would load pyarrow.compute, a tenth of a second)
    values = arr.values.slice(first, n * d)
    if values.null_count:
        raise TripletkitError(
            f"embedding column {name!r}{where} has {values.null_count} null values inside rows; every value must be a number"
        )
    return as_float32(numpy_of(values).reshape(n, d))


def as_float32(matrix):
    """``(float32 matrix, rows rescaled)``: float64 rows outside float32's range keep their direction."""
    if matrix.dtype.kind == "f" and matrix.dtype.itemsize > 4:
        return float32_rows(matrix)
    return np.ascontiguousarray(matrix, dtype=np.float32), 0
