"""Triplet tables on disk: read one and score it against an embedding table.

The writer lives with the miner (``mining.py``); this module is the reader used by
``tripletkit loss`` and by anyone who wants to re-score last epoch's triplets on new embeddings.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ._errors import TripletkitError
from ._io import read_parquet, read_parquet_schema
from .config import MAX_DISTANCE, check_margin
from .table import as_table, id_array

__all__ = ["read_triplets", "triplet_loss_report"]

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
        out[col] = ids.to_numpy(zero_copy_only=False)
    if len(kinds) > 1:
        raise TripletkitError(f"triplet table {str(p)!r} mixes integer and string ids across anchor, positive and "
                              "negative; all three hold ids of one embedding table")
    return out


def triplet_loss_report(triplets, table, *, margin=0.2, distance="squared", soft=False, table_options=None):
    """Mean loss, active fraction and regime counts of a triplet table on an embedding table.

    Parameters
    ----------
    triplets : str, Path or dict
        A triplet table path, or a dict with ``anchor``, ``positive``, ``negative`` id arrays.
    table : str, Path, EmbeddingTable or (ids, labels, embeddings)
        The embeddings the ids refer to.
    margin, distance, soft
        As in :func:`tripletkit.loss.triplet_loss`.

    Returns
    -------
    dict
        Keys ``triplets``, ``mean_loss``, ``active_fraction``, ``regimes``.
    """
    from .loss import score_triplets

    if not soft and distance in MAX_DISTANCE and isinstance(margin, (int, float)):
        check_margin(margin, distance, "margin")
    trip = read_triplets(triplets) if isinstance(triplets, (str, Path)) else triplets
    emb = as_table(table, **(table_options or {}))
    if len(trip["anchor"]) == 0:
        raise TripletkitError("the triplet table has no rows; there is nothing to score")
    return score_triplets(emb, np.asarray(trip["anchor"]), np.asarray(trip["positive"]),
                          np.asarray(trip["negative"]), margin=margin, distance=distance, soft=soft)
