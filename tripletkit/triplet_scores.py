"""Triplet tables scored on an embedding table: :func:`score_triplets` and the ``loss`` verb.

``tripletkit loss TRIPLETS TABLE`` reads a triplet table (ids), looks the ids up in an embedding
table and reports the mean loss, the active fraction and the count per regime, with the losses of
:mod:`tripletkit.losses` recomputed in float64 from the table's rows.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np

from ._errors import TripletkitError
from ._validate import check_distance, check_flag, check_same_length, margin_number
from .losses import unit_triplet_terms
from .mining.regimes import REGIMES, classify

__all__ = ["score_triplets", "loss"]

# Bytes of one block of gathered rows (three float32 row blocks).
_BLOCK_BYTES = 32 * 2**20


def _py(value):
    """A numpy scalar as the plain Python value (for messages)."""
    return value.item() if isinstance(value, np.generic) else value


def _as_id_column(ids, name):
    arr = np.asarray(ids)
    if arr.ndim != 1:
        raise TripletkitError(f"{name} must be a 1-D column of ids, got shape {arr.shape}")
    return arr


def _label_check(table, rows_a, rows_b, same, a_ids, b_ids, role):
    la, lb = table.labels[rows_a], table.labels[rows_b]
    bad = (la != lb) if same else (la == lb)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        rule = "must share the anchor's label" if same else "must have a label other than the anchor's"
        raise TripletkitError(
            f"{int(bad.sum())} of {bad.shape[0]} triplets have a wrong {role} (first: row {i}, anchor "
            f"{_py(a_ids[i])!r} label {_py(table.label_values[la[i]])!r}, {role} {_py(b_ids[i])!r} "
            f"label {_py(table.label_values[lb[i]])!r}); a {role} {rule}"
        )


def score_triplets(table, anchor_ids, positive_ids, negative_ids, margin=0.2, distance="squared",
                   soft=False):
    """Score a triplet table against an embedding table: mean loss, active fraction, regimes.

    Parameters
    ----------
    table : tripletkit.table.EmbeddingTable
        Supplies ``positions(ids)``, integer ``labels``, ``label_values`` and unit ``embeddings``.
    anchor_ids, positive_ids, negative_ids : array-like of shape (t,)
        Ids of ``table``; row i forms triplet i.
    margin, distance, soft
        As in :func:`triplet_loss`.

    Returns
    -------
    dict
        ``triplets`` (int), ``mean_loss`` (float or None), ``active_fraction`` (float or None) and
        ``regimes`` (``{"easy": int, "semi-hard": int, "hard": int}``). With zero triplets the two
        means are None and a RuntimeWarning says why.

    Notes
    -----
    Distances come from the cosines of the table's unit float32 rows, gathered in blocks of
    triplets (memory O(block * d) beyond the table): the numbers equal :func:`triplet_loss` on
    the same rows.
    """
    distance = check_distance(distance)
    margin = margin_number(margin)
    soft = check_flag(soft, "soft")
    a_ids = _as_id_column(anchor_ids, "anchor ids")
    p_ids = _as_id_column(positive_ids, "positive ids")
    n_ids = _as_id_column(negative_ids, "negative ids")
    check_same_length(anchor=a_ids, positive=p_ids, negative=n_ids)
    rows_a = table.positions(a_ids, what="anchor ids")
    rows_p = table.positions(p_ids, what="positive ids")
    rows_n = table.positions(n_ids, what="negative ids")
    same_row = rows_a == rows_p
    if same_row.any():
        i = int(np.flatnonzero(same_row)[0])
        raise TripletkitError(
            f"{int(same_row.sum())} triplets use the same row as anchor and positive (first: row {i}, id "
            f"{_py(a_ids[i])!r}); a positive must be another sample of the anchor's identity"
        )
    _label_check(table, rows_a, rows_p, True, a_ids, p_ids, "positive")
    _label_check(table, rows_a, rows_n, False, a_ids, n_ids, "negative")
    t = rows_a.shape[0]
    counts = np.zeros(len(REGIMES), dtype=np.int64)
    if t == 0:
        warnings.warn("score_triplets got zero triplets; mean_loss and active_fraction are undefined (None)",
                      RuntimeWarning, stacklevel=2)
        return {"triplets": 0, "mean_loss": None, "active_fraction": None,
                "regimes": dict(zip(REGIMES, counts.tolist()))}
    emb = table.embeddings  # unit float32 rows: gathered and used as they are
    step = max(1, _BLOCK_BYTES // (3 * 4 * emb.shape[1]))
    total = 0.0
    active = 0
    for start in range(0, t, step):
        blk = slice(start, start + step)
        a, p, q = (emb[rows[blk]] for rows in (rows_a, rows_p, rows_n))
        _, _, d_ap, d_an, loss, _ = unit_triplet_terms(a, p, q, distance, margin, soft)
        total += float(loss.sum())
        active += int(np.count_nonzero((d_ap + margin) - d_an > 0))
        counts += np.bincount(classify(d_ap, d_an, margin), minlength=len(REGIMES))
    return {"triplets": int(t), "mean_loss": total / t, "active_fraction": active / t,
            "regimes": dict(zip(REGIMES, counts.tolist()))}


# -- public: the `loss` verb ------------------------------------------------------------------
def loss(triplets, table, *, margin=0.2, distance="squared", soft=False, table_options=None):
    """Mean loss, active fraction and regime counts of a triplet table on an embedding table.

    Parameters
    ----------
    triplets : str, Path or dict
        A triplet table path, or a dict with ``anchor``, ``positive``, ``negative`` id arrays.
    table : str, Path, EmbeddingTable or (ids, labels, embeddings)
        The embeddings the ids refer to.
    margin, distance, soft
        As in :func:`triplet_loss`.

    Returns
    -------
    dict
        Keys ``triplets``, ``mean_loss``, ``active_fraction``, ``regimes``.
    """
    from ._validate import MAX_DISTANCE, check_margin
    from .tables.embeddings import as_table
    from .tables.triplets import read_triplets

    if not soft and distance in MAX_DISTANCE and isinstance(margin, (int, float)):
        check_margin(margin, distance, "margin")
    trip = read_triplets(triplets) if isinstance(triplets, (str, Path)) else triplets
    emb = as_table(table, **(table_options or {}))
    if len(trip["anchor"]) == 0:
        raise TripletkitError("the triplet table has no rows; there is nothing to score")
    return score_triplets(emb, np.asarray(trip["anchor"]), np.asarray(trip["positive"]),
                          np.asarray(trip["negative"]), margin=margin, distance=distance, soft=soft)
