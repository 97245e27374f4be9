"""The ``check`` verb: describe an embedding table and list what would make ``mine`` or ``score``
refuse it, as a linter lists its findings."""

from __future__ import annotations

import numpy as np

from .embeddings import EveryRowInvalid, as_table, pair_problems

__all__ = ["check"]


def check(source, **options):
    """Describe an embedding table and list the problems that would make ``mine`` or ``score`` refuse it.

    Invalid rows (NaN/Inf/zero norm) are counted, not fatal, so that the check can report them.

    Parameters
    ----------
    source : str, Path, EmbeddingTable or (ids, labels, embeddings)
    **options
        Column names and ``drop_invalid`` as for :meth:`EmbeddingTable.read`; with
        ``drop_invalid`` the invalid rows are not a problem (mine and score would drop them).

    Returns
    -------
    dict
        Keys ``rows`` (rows in the input, valid or not), ``dim``, ``identities``,
        ``samples_per_identity`` (min/median/max), ``singletons``, ``invalid_rows`` (rows with
        NaN/Inf or zero norm), ``unit_norm``, ``groups`` (count or None), all but ``rows`` and
        ``invalid_rows`` counted on the valid rows, and ``problems``: one line per finding that
        would make ``tripletkit mine`` or ``tripletkit score`` refuse the table (invalid rows
        without ``drop_invalid``, no genuine pairs, a single identity); empty when the table is
        usable. The command prints each problem on its own line and exits with code 1.

    Raises
    ------
    TripletkitError
        When the input cannot be read as an embedding table at all (a missing or broken file, a
        missing column, wrong column types, null or duplicate ids, no rows).
    """
    options = dict(options)
    drop_requested = bool(options.get("drop_invalid", False))
    options["drop_invalid"] = True
    try:
        table = as_table(source, **options)
    except EveryRowInvalid as exc:
        return {
            "rows": exc.rows, "dim": exc.dim, "identities": exc.identities, "samples_per_identity": None,
            "singletons": None, "invalid_rows": exc.rows, "unit_norm": None, "groups": None,
            "problems": [f"{exc}: there is nothing to mine or score"],
        }
    sizes = table.identity_sizes()
    problems = []
    if table.dropped and not drop_requested:
        where = f" {table.source!r}" if table.source else ""
        first = ", ".join(repr(v) for v in table.dropped_ids)
        problems.append(f"table{where} has {table.dropped} rows with NaN/Inf or zero norm (first ids: {first}); mine "
                        "and score refuse them: fix them or pass drop_invalid=True")
    problems += pair_problems(table, "mining or scoring")
    return {
        "rows": table.n + table.dropped,
        "dim": table.dim,
        "identities": table.n_identities,
        "samples_per_identity": {"min": int(sizes.min()), "median": float(np.median(sizes)), "max": int(sizes.max())},
        "singletons": int((sizes == 1).sum()),
        "invalid_rows": int(table.dropped),
        "unit_norm": bool(table.unit_norm),
        "groups": None if table.groups is None else int(len(set(table.groups.tolist()))),
        "problems": problems,
    }
