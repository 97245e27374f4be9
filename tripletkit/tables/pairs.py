"""Pair lists for protocol evaluation: a Parquet file of ``left``, ``right`` ids (and optionally
``same``), mapped to row positions of an embedding table and checked against its labels."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .._errors import TripletkitError
from .._io import read_parquet
from .columns import numpy_of

__all__ = ["read_pair_list"]


# ---------------------------------------------------------------------------------------------
def _show(v):
    return repr(v.item() if isinstance(v, np.generic) else v)


def read_pair_list(path, table):
    """Read a Parquet pair list and map its ids to row positions of ``table``.

    Parameters
    ----------
    path : str or Path
        Parquet file with columns ``left`` and ``right`` (ids of ``table``) and optionally
        ``same`` (boolean: whether the protocol says the pair is genuine).
    table : EmbeddingTable

    Returns
    -------
    left, right : ndarray of int64, shape (p,)
        Row positions.
    same : ndarray of bool, shape (p,) or None
        The ``same`` column, already checked against the labels.

    Raises
    ------
    TripletkitError
        A missing file or column, nulls, an id that is not in the table, a row paired with
        itself, or a ``same`` value that disagrees with the labels (naming the first such pair).
    """
    import pyarrow as pa

    p = Path(path)
    if not p.is_file():
        raise TripletkitError(f"pair list {str(p)!r} does not exist; check the path given as pairs")
    pairs = read_parquet(p, "pair list")
    missing = [c for c in ("left", "right") if c not in pairs.column_names]
    if missing:
        raise TripletkitError(
            f"pair list {str(p)!r} has no column {missing[0]!r} (columns: {', '.join(pairs.column_names)}); "
            "it needs 'left' and 'right' ids and optionally a boolean 'same'"
        )
    if pairs.num_rows == 0:
        raise TripletkitError(f"pair list {str(p)!r} holds no pairs; give at least one (left, right) row")
    cols = {}
    for name in ("left", "right") + (("same",) if "same" in pairs.column_names else ()):
        col = pairs.column(name)
        if pa.types.is_dictionary(col.type):
            col = col.cast(col.type.value_type)
        if col.null_count:
            first = int(np.flatnonzero(numpy_of(col.is_null()))[0])
            raise TripletkitError(
                f"pair list {str(p)!r} column {name!r} has {col.null_count} null values (first at row {first}); "
                "every pair needs both ids" + (" and a same value" if name == "same" else "")
            )
        cols[name] = col
    if "same" in cols and not pa.types.is_boolean(cols["same"].type):
        raise TripletkitError(
            f"pair list {str(p)!r} column 'same' has type {cols['same'].type}; expected boolean (true = same identity)"
        )
    left_ids = numpy_of(cols["left"])
    right_ids = numpy_of(cols["right"])
    left = table.positions(left_ids, what=f"'left' ids of pair list {str(p)!r}")
    right = table.positions(right_ids, what=f"'right' ids of pair list {str(p)!r}")
    selfpair = left == right
    if selfpair.any():
        i = int(np.flatnonzero(selfpair)[0])
        raise TripletkitError(
            f"pair list {str(p)!r} row {i} pairs id {_show(left_ids[i])} with itself; every pair needs two rows"
        )
    same = None
    if "same" in cols:
        same = numpy_of(cols["same"]).astype(bool)
        truth = table.labels[left] == table.labels[right]
        wrong = same != truth
        if wrong.any():
            i = int(np.flatnonzero(wrong)[0])
            la, lb = table.label_values[table.labels[left[i]]], table.label_values[table.labels[right[i]]]
            raise TripletkitError(
                f"pair list {str(p)!r} row {i} (left {_show(left_ids[i])}, right {_show(right_ids[i])}) says "
                f"same={bool(same[i])} but their labels are {_show(la)} and {_show(lb)}; {int(wrong.sum())} pairs "
                "disagree with the labels; fix the pair list or the table"
            )
    return left, right, same
