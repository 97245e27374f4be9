"""Embedding tables: read, validate and normalise Parquet; write Parquet atomically.

The contract (see the README): columns ``id`` (int64 or string, unique), ``label`` (int64 or
string, no nulls), ``embedding`` (``fixed_size_list<float32>[d]`` preferred, or a uniform
``list<float32|float64>``), optional ``group``; any other column is kept as metadata.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .._errors import TripletkitError
from .._io import PARQUET_WRITE, atomic_path, parquet_files, read_parquet, read_parquet_files, read_parquet_schema
from .._validate import UNIT_NORM_TOLERANCE
from .columns import (as_float32, embedding_matrix, first_duplicate, first_ids, group_values, id_array,
                      key_values, numpy_of, plain)

__all__ = ["EmbeddingTable", "read_table", "write_table", "to_arrow", "as_table", "arrow_table", "source_path",
           "require_pairs", "pair_problems", "EveryRowInvalid"]

#: Rows processed at once in the finiteness / norm pass (bounds the temporary memory).
_ROW_BLOCK = 65536


class EveryRowInvalid(TripletkitError):
    """Every row has NaN/Inf or zero norm (raised with ``drop_invalid``); carries what check reports."""

    def __init__(self, message, rows, dim, identities):
        super().__init__(message)
        self.rows, self.dim, self.identities = rows, dim, identities


@dataclass(frozen=True, eq=False)
class EmbeddingTable:
    """A validated, L2-normalised embedding table held in memory.

    Attributes
    ----------
    ids : ndarray of shape (n,)
        Row ids, int64 or object (str).
    labels : ndarray of int64, shape (n,)
        Dense identity codes 0..k-1; ``label_values[labels]`` gives the original labels.
    label_values : ndarray of shape (k,)
        Sorted unique original labels.
    embeddings : ndarray of float32, shape (n, d), C-contiguous
        Unit-normalised rows.
    groups : ndarray of shape (n,) or None
        Optional subgroup of each row (for differential error rates).
    unit_norm : bool
        Whether every input row already had unit length (within 1e-3).
    dropped : int
        Rows dropped as invalid (NaN/Inf/zero norm) when ``drop_invalid`` was set.
    dropped_ids : tuple
        The first (at most 5) ids of the dropped rows.
    source : str or None
        Where the table was read from.
    metadata : pyarrow.Table or None
        Other columns of the input, row-aligned with ``ids``.
    """

    ids: np.ndarray
    labels: np.ndarray
    label_values: np.ndarray
    embeddings: np.ndarray
    groups: np.ndarray | None = None
    unit_norm: bool = True
    dropped: int = 0
    dropped_ids: tuple = ()
    source: str | None = None
    metadata: pa.Table | None = None
    _fingerprint: list = field(default_factory=list, repr=False)

    # -- construction -------------------------------------------------------------------------
    @classmethod
    def read(cls, path, *, id_column="id", label_column="label", embedding_column="embedding",
             group_column="group", drop_invalid=False):
        """Read a Parquet file or a folder of Parquet files.

        Parameters
        ----------
        path : str or Path
            A ``.parquet`` file or a folder read as one ``pyarrow.dataset``.
        id_column, label_column, embedding_column, group_column : str
            Column names; ``group_column`` is optional in the file.
        drop_invalid : bool, default False
            Drop rows with NaN/Inf values or zero norm (counted in ``dropped``) instead of failing.
        """
        table = _read_arrow(path)
        return cls.from_arrow(table, id_column=id_column, label_column=label_column,
                              embedding_column=embedding_column, group_column=group_column,
                              drop_invalid=drop_invalid, source=str(path))

    @classmethod
    def from_arrow(cls, table, *, id_column="id", label_column="label", embedding_column="embedding",
                   group_column="group", drop_invalid=False, source=None, described=None):
        """Validate an in-memory ``pyarrow.Table`` that follows the table contract.

        ``source`` is the file it was read from (kept as :attr:`source`); ``described`` names it in
        messages when there is no file (e.g. "the pandas DataFrame given").
        """
        where = f" in {source}" if source else (f" in {described}" if described else "")
        names = table.column_names
        for role, col in (("id", id_column), ("label", label_column), ("embedding", embedding_column)):
            if col not in names:
                raise TripletkitError(
                    f"{role} column {col!r} is missing{where} (columns: {', '.join(names) or 'none'}); "
                    f"name it with {role}_column=..."
                )
        if table.num_rows == 0:
            raise TripletkitError(f"table{where} has no rows; is it the right file?")
        ids = key_values(table.column(id_column), id_column, "id", where)
        if (len(set(ids.tolist())) if ids.dtype == object else np.unique(ids).size) != table.num_rows:
            dup = first_duplicate(ids)
            raise TripletkitError(f"id column {id_column!r}{where} has duplicate ids (first: {dup!r}); ids must be unique")
        labels = key_values(table.column(label_column), label_column, "label", where)
        emb, rescaled = embedding_matrix(table.column(embedding_column), embedding_column, ids, where)
        groups = None
        if group_column and group_column in names:
            groups = group_values(table.column(group_column), group_column, where)
        others = [c for c in names if c not in (id_column, label_column, embedding_column, group_column)]
        metadata = table.select(others) if others else None
        return cls._build(ids, labels, emb, groups, drop_invalid, source, metadata, where, rescaled)

    @classmethod
    def from_arrays(cls, ids, labels, embeddings, groups=None, *, drop_invalid=False):
        """Build a table from in-memory arrays (ids (n,), labels (n,), embeddings (n, d))."""
        emb = np.asarray(embeddings)
        if emb.ndim != 2:
            raise TripletkitError(f"embeddings must be a 2-D array (rows x dimension), got shape {emb.shape}")
        if emb.shape[0] == 0:
            raise TripletkitError("embeddings have no rows")
        if emb.shape[1] == 0:
            raise TripletkitError("embeddings have dimension 0; every row needs at least one value")
        if not np.issubdtype(emb.dtype, np.number):
            raise TripletkitError(f"embeddings must hold real numbers, got dtype {emb.dtype}")
        emb, rescaled = as_float32(emb)
        ids = np.asarray(ids)
        labels = np.asarray(labels)
        for name, arr in (("ids", ids), ("labels", labels)):
            if arr.ndim != 1 or arr.shape[0] != emb.shape[0]:
                raise TripletkitError(
                    f"{name} must be 1-D with one entry per embedding row ({emb.shape[0]}), got shape {arr.shape}"
                )
            if arr.dtype == object and any(v is None for v in arr):
                raise TripletkitError(f"{name} contain null values; every row needs one")
            if np.issubdtype(arr.dtype, np.floating):
                raise TripletkitError(f"{name} must be integers or strings, got dtype {arr.dtype}")
        if ids.dtype.kind in "US":
            ids = ids.astype(object)
        if labels.dtype.kind in "US":
            labels = labels.astype(object)
        if ids.dtype != object:
            ids = ids.astype(np.int64)
        uniq, counts = np.unique(ids, return_counts=True)
        if uniq.shape[0] != ids.shape[0]:
            raise TripletkitError(f"ids have duplicates (first: {plain(uniq[np.argmax(counts > 1)])!r}); ids must be unique")
        if groups is not None:
            groups = np.asarray(groups)
            if groups.shape != ids.shape:
                raise TripletkitError(f"groups must have one entry per row ({ids.shape[0]}), got shape {groups.shape}")
            if groups.dtype == object and any(v is None for v in groups):
                raise TripletkitError("groups contain null values; every row needs a group (e.g. 'unknown')")
        return cls._build(ids, labels, emb, groups, drop_invalid, None, None, "", rescaled)

    @classmethod
    def _build(cls, ids, labels, emb, groups, drop_invalid, source, metadata, where, rescaled=0):
        n = emb.shape[0]
        bad_finite = np.zeros(n, dtype=bool)
        sq = np.empty(n, dtype=np.float64)
        for s in range(0, n, _ROW_BLOCK):
            blk = emb[s:s + _ROW_BLOCK]
            bad_finite[s:s + _ROW_BLOCK] = ~np.isfinite(blk).all(axis=1)
            with np.errstate(over="ignore", invalid="ignore"):
                sq[s:s + _ROW_BLOCK] = np.einsum("ij,ij->i", blk, blk, dtype=np.float64)
        bad_zero = (~bad_finite) & (sq == 0)
        bad = bad_finite | bad_zero
        dropped, dropped_ids = 0, ()
        if bad.any():
            if not drop_invalid:
                parts = []
                if bad_finite.any():
                    parts.append(f"{int(bad_finite.sum())} rows with NaN/Inf (first ids: {first_ids(ids, bad_finite)})")
                if bad_zero.any():
                    parts.append(f"{int(bad_zero.sum())} zero-norm rows (first ids: {first_ids(ids, bad_zero)})")
                raise TripletkitError(
                    f"embeddings{where} have " + " and ".join(parts) + "; fix them or pass drop_invalid=True"
                )
            keep = ~bad
            dropped = int(bad.sum())
            dropped_ids = tuple(plain(ids[p]) for p in np.flatnonzero(bad)[:5])
            if dropped == n:
                raise EveryRowInvalid(f"every row of the table{where} is invalid (NaN/Inf or zero norm)",
                                       rows=n, dim=int(emb.shape[1]), identities=len(np.unique(labels)))
            ids, labels, emb, sq = ids[keep], labels[keep], emb[keep], sq[keep]
            groups = groups[keep] if groups is not None else None
            metadata = metadata.filter(pa.array(keep)) if metadata is not None else None
        norms = np.sqrt(sq)
        # a rescaled row (float64 values outside float32's range) was far from unit length
        unit = not rescaled and bool(np.all(np.abs(norms - 1.0) <= UNIT_NORM_TOLERANCE))
        out = np.empty(emb.shape, dtype=np.float32)
        for s in range(0, emb.shape[0], _ROW_BLOCK):
            np.divide(emb[s:s + _ROW_BLOCK], norms[s:s + _ROW_BLOCK, None], out=out[s:s + _ROW_BLOCK],
                      casting="unsafe")
        values, codes = np.unique(labels, return_inverse=True)
        return cls(ids=ids, labels=codes.astype(np.int64).reshape(-1), label_values=values, embeddings=out,
                   groups=groups, unit_norm=unit, dropped=dropped, dropped_ids=dropped_ids, source=source,
                   metadata=metadata)

    # -- properties ---------------------------------------------------------------------------
    @property
    def n(self):
        """Number of rows."""
        return int(self.embeddings.shape[0])

    @property
    def dim(self):
        """Embedding dimension."""
        return int(self.embeddings.shape[1])

    @property
    def n_identities(self):
        """Number of distinct labels."""
        return int(self.label_values.shape[0])

    @property
    def fingerprint(self):
        """A BLAKE2b digest of ids, labels and embeddings (hex), to tie outputs to their input."""
        if not self._fingerprint:
            h = hashlib.blake2b(digest_size=16)
            if self.ids.dtype == object:
                h.update("\x1f".join(map(str, self.ids)).encode())
            else:
                h.update(np.ascontiguousarray(self.ids).tobytes())
            h.update("\x1f".join(map(str, self.label_values)).encode())
            h.update(self.labels.tobytes())
            h.update(self.embeddings.tobytes())
            self._fingerprint.append(h.hexdigest())
        return self._fingerprint[0]

    def original_labels(self, rows=None):
        """Original label values of ``rows`` (all rows by default)."""
        return self.label_values[self.labels if rows is None else self.labels[rows]]

    def positions(self, ids, what="ids"):
        """Row positions of ``ids`` (int64 or strings, the kind of the table's ids).

        Ids of another kind (floats, integers for a table of string ids and the reverse) and ids
        that are not in the table are errors naming the count and the first few.
        """
        query = id_array(ids, what)
        if len(query) == 0:
            return np.zeros(0, dtype=np.int64)
        table_strings = self.ids.dtype == object
        if pa.types.is_string(query.type) != table_strings:
            kinds = ("strings", "integers") if table_strings else ("integers", "strings")
            raise TripletkitError(
                f"{what} are {kinds[1]} but the ids of the embedding table{_of(self.source)} are {kinds[0]}; "
                "use the ids of the table (the same kind, int64 or string)"
            )
        lookup = pa.array(self.ids.tolist(), type=pa.string()) if table_strings else pa.array(self.ids)
        import pyarrow.compute as pc

        pos = pc.index_in(query, value_set=lookup)
        if pos.null_count:
            missing = pc.unique(query.filter(pos.is_null()))
            first = ", ".join(repr(v) for v in missing.slice(0, 5).to_pylist())
            raise TripletkitError(
                f"{pos.null_count} {what} are not in the embedding table{_of(self.source)} (first: {first}); use "
                "the table the ids come from"
            )
        return numpy_of(pos).astype(np.int64)

    def subset(self, rows):
        """A new table holding ``rows`` (positions), labels re-coded densely."""
        rows = np.asarray(rows, dtype=np.int64)
        values, codes = np.unique(self.labels[rows], return_inverse=True)
        return EmbeddingTable(
            ids=self.ids[rows], labels=codes.astype(np.int64).reshape(-1), label_values=self.label_values[values],
            embeddings=np.ascontiguousarray(self.embeddings[rows]),
            groups=None if self.groups is None else self.groups[rows], unit_norm=self.unit_norm,
            dropped=self.dropped, dropped_ids=self.dropped_ids, source=self.source,
            metadata=None if self.metadata is None else self.metadata.take(pa.array(rows)),
        )

    def with_embeddings(self, embeddings):
        """The same rows with new embeddings (validated and L2-normalised), e.g. a head's output."""
        return EmbeddingTable.from_arrays(self.ids, self.original_labels(), embeddings, self.groups)

    def identity_sizes(self):
        """Number of rows per identity code, int64 of shape (k,)."""
        return np.bincount(self.labels, minlength=self.n_identities).astype(np.int64)


def _of(source):
    return f" {str(source)!r}" if source else ""


# -- reading ----------------------------------------------------------------------------------
def _read_arrow(path):
    p = Path(path)
    if not p.exists():
        raise TripletkitError(f"embedding table {str(p)!r} does not exist; check the path")
    if not p.is_dir():
        return read_parquet(p, "embedding table")
    files = parquet_files(p)
    if not files:
        raise TripletkitError(f"folder {str(p)!r} holds no .parquet files (names starting with '.' or '_' are "
                              "skipped, as by pyarrow's dataset discovery)")
    schemas = {}
    for f in files:
        schema = read_parquet_schema(f, "part", f" of folder {str(p)!r}")
        schemas.setdefault(schema.remove_metadata(), f)
    if len(schemas) > 1:
        a, b = list(schemas.values())[:2]
        raise TripletkitError(
            f"folder {str(p)!r} mixes Parquet files with different schemas "
            f"({Path(a).name} and {Path(b).name}); every part must have the same columns and types"
        )
    return read_parquet_files(files, "part", f" of folder {str(p)!r}", base_dir=p)


def read_table(path, **options):
    """Read an embedding table; shorthand for :meth:`EmbeddingTable.read`."""
    return EmbeddingTable.read(path, **options)


def source_path(source):
    """The file a source of :func:`as_table` is read from: a path, or an EmbeddingTable's
    ``source`` (None for arrays or a table built in memory)."""
    if isinstance(source, (str, Path)):
        return source
    return getattr(source, "source", None)


def as_table(source, **options):
    """An :class:`EmbeddingTable` from anything that holds one.

    Parameters
    ----------
    source : str, Path, EmbeddingTable, tuple, or a table object
        A Parquet file or folder (Hive partition keys become columns); an EmbeddingTable (returned
        as it is); an ``(ids, labels, embeddings[, groups])`` tuple of arrays; or a table object:
        a pyarrow Table, RecordBatch, RecordBatchReader or Dataset, a pandas or polars DataFrame,
        or any object with the Arrow PyCapsule stream interface (``__arrow_c_stream__``). Table
        objects are read through Arrow, without a copy where their layout allows.
    **options
        Column names and ``drop_invalid`` (see :meth:`EmbeddingTable.read`).
    """
    if isinstance(source, EmbeddingTable):
        return source
    if isinstance(source, (str, Path)):
        return EmbeddingTable.read(source, **options)
    if isinstance(source, tuple) and len(source) in (3, 4):
        return EmbeddingTable.from_arrays(*source, drop_invalid=options.get("drop_invalid", False))
    arrow = arrow_table(source)
    if arrow is not None:
        return EmbeddingTable.from_arrow(arrow, **options, source=None,
                                         described=f"the {type(source).__module__.split('.')[0]} "
                                                   f"{type(source).__name__} given")
    raise TripletkitError(
        f"expected a table path, an EmbeddingTable, an (ids, labels, embeddings) tuple, or a table object (an Arrow "
        f"table, a pandas or polars DataFrame, an object with __arrow_c_stream__), got {type(source).__name__}"
    )


def arrow_table(obj):
    """``obj`` as a ``pyarrow.Table`` if it is a table object :func:`as_table` accepts, else None.

    pandas and polars are never imported: a DataFrame of theirs is read through its Arrow stream
    (``__arrow_c_stream__``, pandas >= 2.2, polars >= 1.0) or, for older versions, its own
    conversion to Arrow.
    """
    if isinstance(obj, pa.Table):
        return obj
    if isinstance(obj, pa.RecordBatch):
        return pa.Table.from_batches([obj])
    if isinstance(obj, pa.RecordBatchReader):
        return obj.read_all()
    if type(obj).__module__ == "pyarrow._dataset" and hasattr(obj, "to_table"):
        return obj.to_table()  # a pyarrow Dataset (importing pyarrow.dataset to check would import pandas)
    if hasattr(obj, "__arrow_c_stream__"):
        return pa.RecordBatchReader.from_stream(obj).read_all()
    module = type(obj).__module__.split(".")[0]
    if module == "pandas" and hasattr(obj, "columns"):
        return pa.Table.from_pandas(obj, preserve_index=False)
    if module == "polars" and hasattr(obj, "to_arrow"):
        return obj.to_arrow()
    return None


def pair_problems(table, what, *, genuine=True, impostor=True, hint="is label_column=... the identity column?"):
    """The reasons (one line each) why ``table`` has no genuine or no impostor pairs at all.

    Parameters are those of :func:`require_pairs`; an empty list means the pairs are there.
    """
    where = f" {table.source!r}" if table.source else ""
    problems = []
    if impostor and table.n_identities < 2:
        only = plain(table.label_values[0])
        problems.append(
            f"table{where} has a single identity (label {only!r}), so there are no impostor pairs; {what} needs "
            f"at least 2 identities ({hint})"
        )
    if genuine and not (table.identity_sizes() >= 2).any():
        problems.append(
            f"every identity of table{where} has one row, so there are no genuine pairs; {what} needs identities "
            f"with at least 2 rows ({hint})"
        )
    return problems


def require_pairs(table, what, *, genuine=True, impostor=True, hint="is label_column=... the identity column?"):
    """Raise when a table has no genuine pairs or no impostor pairs at all.

    The Python functions treat such tables as legal but degenerate (a warning and nulls), so a
    training loop can carry on; the commands that would only write nulls call this first and
    stop with one line instead (see ``docs/limits.md``).

    Parameters
    ----------
    table : EmbeddingTable
    what : str
        What needs the pairs, for the message (e.g. ``"mining"``).
    genuine : bool, default True
        Require an identity with at least two rows (an anchor and its positive).
    impostor : bool, default True
        Require at least two identities (negatives).
    hint : str
        What to check, appended to the message in parentheses.
    """
    problems = pair_problems(table, what, genuine=genuine, impostor=impostor, hint=hint)
    if problems:
        raise TripletkitError(problems[0])


# -- writing ----------------------------------------------------------------------------------
def _embedding_array(embeddings):
    emb = np.ascontiguousarray(embeddings, dtype=np.float32)
    return pa.FixedSizeListArray.from_arrays(pa.array(emb.reshape(-1)), emb.shape[1])


def to_arrow(ids, labels, embeddings, groups=None, extra=None, metadata=None):
    """Build a ``pyarrow.Table`` in the table contract (fixed-size float32 embeddings)."""
    cols = {"id": pa.array(np.asarray(ids).tolist() if np.asarray(ids).dtype == object else np.asarray(ids)),
            "label": pa.array(np.asarray(labels).tolist() if np.asarray(labels).dtype == object else np.asarray(labels)),
            "embedding": _embedding_array(embeddings)}
    if groups is not None:
        g = np.asarray(groups)
        cols["group"] = pa.array(g.tolist() if g.dtype == object else g)
    table = pa.table(cols)
    if extra is not None:
        for name in extra.column_names:
            table = table.append_column(name, extra.column(name))
    if metadata:
        table = table.replace_schema_metadata({str(k): str(v) for k, v in metadata.items()})
    return table


def write_table(path, ids, labels, embeddings, groups=None, *, extra=None, metadata=None, force=False):
    """Write an embedding table to Parquet atomically; refuses to overwrite unless ``force``."""
    table = to_arrow(ids, labels, embeddings, groups, extra, metadata)
    with atomic_path(path, force=force) as tmp:
        pq.write_table(table, str(tmp), **PARQUET_WRITE)
    return Path(path)
