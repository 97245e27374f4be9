"""Triplet tables on disk: the reader used by ``tripletkit loss`` and by anyone who re-scores
last epoch's triplets on new embeddings."""

from __future__ import annotations

from pathlib import Path

from .._errors import TripletkitError
from .._io import read_parquet, read_parquet_schema
from .columns import id_array, numpy_of

__all__ = ["read_triplets"]

_ID_COLUMNS = ("anchor", "positive", "negative")


def read_triplets(path):
    """Read the ``anchor``, ``positive`` and ``negative`` id columns of a triplet table.

    Returns
    -------
    dict of str -> ndarray
        One array of ids per column.
    """
    p = Path(path)
    if not p.is_file():
        raise TripletkitError(f"triplet table {str(p)!r} does not exist; check the path")
    schema = read_parquet_schema(p, "triplet table")
    missing = [c for c in _ID_COLUMNS if c not in schema.names]
    if missing:
        raise TripletkitError(
            f"triplet table {str(p)!r} has no column {missing[0]!r}; it needs anchor, positive and negative ids"
        )
    table = read_parquet(p, "triplet table", columns=list(_ID_COLUMNS))
    out = {}
    kinds = set()
    for col in _ID_COLUMNS:
        ids = id_array(table.column(col), f"{col} ids of triplet table {str(p)!r} (column {col!r})")
        kinds.add(ids.type)
        out[col] = numpy_of(ids)
    if len(kinds) > 1:
        raise TripletkitError(f"triplet table {str(p)!r} mixes integer and string ids across anchor, positive and "
                              "negative; all three hold ids of one embedding table")
    return out
