"""Triplet tables on disk: the schema, the writer the miner streams its triplets into, the report
of suspect duplicates written beside it, and the reader used by ``tripletkit loss`` (and by anyone
who re-scores last epoch's triplets on new embeddings).

Rows are written in row groups of a fixed size (:data:`ROW_GROUP_ROWS`), so a table's bytes do not
depend on the blocks it was mined in.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .._errors import TripletkitError
from .._io import PARQUET_WRITE, parquet_files, read_parquet, read_parquet_schema
from ..mining.regimes import REGIMES
from .columns import id_array, numpy_of

__all__ = ["iter_triplet_batches", "TRIPLET_COLUMNS", "DUPLICATE_COLUMNS", "ROW_GROUP_ROWS", "triplet_schema", "TripletWriter",
           "write_duplicates", "duplicates_path", "read_triplets"]

#: Columns of the triplet table, in order.
TRIPLET_COLUMNS = ("anchor", "positive", "negative", "anchor_label", "negative_label",
                   "d_ap", "d_an", "violation", "regime")
#: Columns of the suspect-duplicate report.
DUPLICATE_COLUMNS = ("id_a", "id_b", "label_a", "label_b", "cosine")
#: Rows per Parquet row group of a triplet table (the last group holds the rest).
ROW_GROUP_ROWS = 1 << 16

_ID_COLUMNS = ("anchor", "positive", "negative")


def duplicates_path(out):
    """Path of the suspect-duplicate report written beside a triplet table ``out``."""
    out = Path(out)
    stem = out.stem if out.suffix == ".parquet" else out.name
    return out.with_name(f"{stem}.duplicates.parquet")


def triplet_schema(id_type=pa.int64(), label_type=pa.int64(), metadata=None):
    """The Arrow schema of a triplet table, with optional key-value metadata.

    Parameters
    ----------
    id_type, label_type : pyarrow.DataType, default int64
        Type of the id columns (anchor, positive, negative) and of the label columns.
    metadata : dict of str -> str, optional

    Returns
    -------
    pyarrow.Schema
        The columns of :data:`TRIPLET_COLUMNS`: ids, labels, ``d_ap``, ``d_an`` and
        ``violation`` (float32) and ``regime`` (dictionary-encoded names of the regimes).
    """
    fields = [pa.field("anchor", id_type, nullable=False), pa.field("positive", id_type, nullable=False),
              pa.field("negative", id_type, nullable=False),
              pa.field("anchor_label", label_type, nullable=False),
              pa.field("negative_label", label_type, nullable=False),
              pa.field("d_ap", pa.float32(), nullable=False), pa.field("d_an", pa.float32(), nullable=False),
              pa.field("violation", pa.float32(), nullable=False),
              pa.field("regime", pa.dictionary(pa.int8(), pa.string()), nullable=False)]
    return pa.schema(fields, metadata=metadata)


def _arrow_type(values):
    return pa.string() if values.dtype == object else pa.int64()


def _arrow(values, typ):
    if typ == pa.string():
        return pa.array(values, type=pa.string())
    return pa.array(np.asarray(values, dtype=np.int64), type=pa.int64())


class TripletWriter:
    """Writes triplets to a Parquet file as they come, in row groups of a fixed size.

    Parameters
    ----------
    path : str or Path or None
        The file to write (None: a writer that writes nothing).
    table : EmbeddingTable
        The table the row positions of the triplets refer to (ids and labels are written).
    metadata : dict of str -> str
        Key-value metadata of the file.
    row_group_rows : int, optional
        Rows per row group (default :data:`ROW_GROUP_ROWS`).

    Attributes
    ----------
    writer : pyarrow.parquet.ParquetWriter or None
        The open file, until :meth:`close`.
    """

    def __init__(self, path, table, metadata, *, row_group_rows=None):
        self.table = table
        self.id_type = _arrow_type(table.ids)
        self.label_type = _arrow_type(table.label_values)
        self.schema = triplet_schema(self.id_type, self.label_type, metadata)
        self.row_group_rows = int(ROW_GROUP_ROWS if row_group_rows is None else row_group_rows)
        self.writer = pq.ParquetWriter(str(path), self.schema, **PARQUET_WRITE) if path else None
        self.buffer, self.buffered = [], 0

    def add(self, arrays):
        """Append triplets: a dict of ``anchor``, ``positive``, ``negative`` (row positions),
        ``d_ap``, ``d_an``, ``violation`` (float32) and ``regime`` (int8 codes) arrays."""
        if self.writer is None:
            return
        table = self.table
        labels = table.labels
        cols = [
            _arrow(table.ids[arrays["anchor"]], self.id_type),
            _arrow(table.ids[arrays["positive"]], self.id_type),
            _arrow(table.ids[arrays["negative"]], self.id_type),
            _arrow(table.label_values[labels[arrays["anchor"]]], self.label_type),
            _arrow(table.label_values[labels[arrays["negative"]]], self.label_type),
            pa.array(arrays["d_ap"], type=pa.float32()),
            pa.array(arrays["d_an"], type=pa.float32()),
            pa.array(arrays["violation"], type=pa.float32()),
            pa.DictionaryArray.from_arrays(pa.array(arrays["regime"], type=pa.int8()),
                                           pa.array(list(REGIMES), type=pa.string())),
        ]
        self.buffer.append(pa.Table.from_arrays(cols, schema=self.schema))
        self.buffered += len(arrays["anchor"])
        while self.buffered >= self.row_group_rows:
            self._flush(self.row_group_rows)

    def _flush(self, rows):
        whole = pa.concat_tables(self.buffer)
        head = whole.slice(0, rows).combine_chunks()
        self.writer.write_table(head, row_group_size=rows)
        rest = whole.slice(rows)
        self.buffer = [rest] if rest.num_rows else []
        self.buffered = rest.num_rows

    def close(self):
        """Write what is buffered and close the file."""
        if self.writer is None:
            return
        if self.buffered:
            self._flush(self.buffered)
        self.writer.close()
        self.writer = None


def write_duplicates(path, table, rows_a, rows_b, cosines, metadata):
    """Write the suspect-duplicate report: one row per pair of rows, with ids, labels and cosine.

    Parameters
    ----------
    path : str or Path
    table : EmbeddingTable
        The table the row positions refer to.
    rows_a, rows_b : ndarray of int64
        Row positions of each pair.
    cosines : ndarray of float64
        Their cosines.
    metadata : dict of str -> str
        Key-value metadata of the file.
    """
    id_type, label_type = _arrow_type(table.ids), _arrow_type(table.label_values)
    labels = table.labels
    schema = pa.schema([pa.field("id_a", id_type, nullable=False), pa.field("id_b", id_type, nullable=False),
                        pa.field("label_a", label_type, nullable=False),
                        pa.field("label_b", label_type, nullable=False),
                        pa.field("cosine", pa.float64(), nullable=False)], metadata=metadata)
    cols = [_arrow(table.ids[rows_a], id_type), _arrow(table.ids[rows_b], id_type),
            _arrow(table.label_values[labels[rows_a]], label_type),
            _arrow(table.label_values[labels[rows_b]], label_type),
            pa.array(cosines, type=pa.float64())]
    pq.write_table(pa.Table.from_arrays(cols, schema=schema), str(path), **PARQUET_WRITE)


def read_triplets(path):
    """Read the ``anchor``, ``positive`` and ``negative`` id columns of a triplet table.

    Parameters
    ----------
    path : str or Path
        A triplet table, or the folder of part files a cluster run writes (read in order).

    Returns
    -------
    dict of str -> ndarray
        One array of ids per column.
    """
    p = Path(path)
    if not p.exists():
        raise TripletkitError(f"triplet table {str(p)!r} does not exist; check the path")
    files = parquet_files(p) if p.is_dir() else [p]  # a folder: the parts of a cluster run, in order
    if not files:
        raise TripletkitError(f"folder {str(p)!r} holds no .parquet files; give a triplet table or its folder of parts")
    schema = read_parquet_schema(files[0], "triplet table")
    missing = [c for c in _ID_COLUMNS if c not in schema.names]
    if missing:
        raise TripletkitError(
            f"triplet table {str(p)!r} has no column {missing[0]!r}; it needs anchor, positive and negative ids"
        )
    table = pa.concat_tables([read_parquet(f, "triplet table", columns=list(_ID_COLUMNS)) for f in files])
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


def iter_triplet_batches(triplets, table, batch_size, seed=0, *, table_options=None):
    """Triplets in shuffled batches of row positions of the embedding table, for a training loop.

    Every framework can gather its own tensors from row positions (``embeddings[anchor]``), so a
    batch is three int64 arrays: the positions of each triplet's anchor, positive and negative in
    the order of ``table`` (the training dump the triplets were mined from, or the dataset rows in
    that order). Every triplet comes once per pass, in a seeded random order.

    Parameters
    ----------
    triplets : str or Path
        A triplet table (or the folder of parts of a cluster run). Only its id columns are read.
    table : str, Path, EmbeddingTable or table object
        The embedding table whose ids the triplets name (anything
        :func:`tripletkit.tables.embeddings.as_table` accepts); ids missing from it are an error.
    batch_size : int
        Triplets per batch (the last batch may be smaller).
    seed : int or numpy.random.Generator, default 0
        The shuffle; the same seed gives the same batches.
    table_options : dict, optional
        Column names and ``drop_invalid`` for reading ``table``.

    Yields
    ------
    anchor, positive, negative : ndarray of int64, shape (b,)

    Examples
    --------
    >>> for anchor, positive, negative in iter_triplet_batches("triplets.parquet", "dump.parquet", 256):
    ...     loss = train_step(features[anchor], features[positive], features[negative])  # doctest: +SKIP
    """
    from .._validate import whole_number
    from .embeddings import as_table

    batch_size = whole_number(batch_size, "batch_size", low=1)
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(whole_number(seed, "seed"))
    emb = as_table(table, **(table_options or {}))
    ids = read_triplets(triplets)
    name = str(triplets)
    rows = [emb.positions(ids[col], what=f"{col} ids of triplet table {name!r}") for col in _ID_COLUMNS]
    order = rng.permutation(rows[0].size)
    for start in range(0, order.size, batch_size):
        pick = order[start:start + batch_size]
        yield tuple(r[pick] for r in rows)
