"""tripletkit.tables.triplets: the triplet table's schema, its writer (fixed row groups, whatever
the pieces it is given), the suspect-duplicate report, and the reader."""

from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tripletkit._errors import TripletkitError
from tripletkit.mining.regimes import REGIMES
from tripletkit.tables.embeddings import EmbeddingTable
from tripletkit.tables.triplets import (DUPLICATE_COLUMNS, ROW_GROUP_ROWS, TRIPLET_COLUMNS, TripletWriter,
                                        duplicates_path, read_triplets, triplet_schema, write_duplicates)


def _table(rng, string_ids=False):
    ids = np.array([f"img-{i:03d}" for i in range(40)], dtype=object) if string_ids else np.arange(40) * 5 + 1
    labels = np.repeat(np.arange(8), 5)
    return EmbeddingTable.from_arrays(ids, labels, rng.standard_normal((40, 6)))


def _triplets(rng, m):
    d_ap, d_an = rng.random(m).astype(np.float32), rng.random(m).astype(np.float32)
    return {"anchor": rng.integers(0, 40, m), "positive": rng.integers(0, 40, m), "negative": rng.integers(0, 40, m),
            "d_ap": d_ap, "d_an": d_an, "violation": d_ap - d_an + np.float32(0.2),
            "regime": rng.integers(0, 3, m).astype(np.int8)}


def _write(path, table, arrays, pieces, row_group_rows):
    writer = TripletWriter(path, table, {"tripletkit.test": "1"}, row_group_rows=row_group_rows)
    edges = np.linspace(0, len(arrays["anchor"]), pieces + 1).astype(int)
    for a, b in zip(edges[:-1], edges[1:]):
        writer.add({k: v[a:b] for k, v in arrays.items()})
    writer.close()
    return Path(path).read_bytes()


def test_schema_columns_and_types():
    schema = triplet_schema(pa.string(), pa.int64(), {"k": "v"})
    assert tuple(schema.names) == TRIPLET_COLUMNS
    assert schema.field("anchor").type == pa.string() and schema.field("anchor_label").type == pa.int64()
    assert all(schema.field(c).type == pa.float32() for c in ("d_ap", "d_an", "violation"))
    assert schema.field("regime").type == pa.dictionary(pa.int8(), pa.string())
    assert not any(f.nullable for f in schema)
    assert schema.metadata == {b"k": b"v"}


@pytest.mark.parametrize("string_ids", [False, True])
def test_writer_rows_and_row_groups_do_not_depend_on_the_pieces(rng, tmp_path, string_ids):
    table = _table(rng, string_ids)
    arrays = _triplets(rng, 300)
    one = _write(tmp_path / "one.parquet", table, arrays, 1, 64)
    assert _write(tmp_path / "many.parquet", table, arrays, 7, 64) == one
    assert _write(tmp_path / "tiny.parquet", table, arrays, 300, 64) == one
    meta = pq.ParquetFile(tmp_path / "one.parquet").metadata
    assert [meta.row_group(i).num_rows for i in range(meta.num_row_groups)] == [64, 64, 64, 64, 44]
    t = pq.read_table(tmp_path / "one.parquet")
    assert tuple(t.column_names) == TRIPLET_COLUMNS
    assert t.column("anchor").to_pylist() == table.ids[arrays["anchor"]].tolist()
    assert t.column("negative_label").to_pylist() == table.label_values[table.labels[arrays["negative"]]].tolist()
    assert t.column("regime").to_pylist() == [REGIMES[c] for c in arrays["regime"]]
    assert np.array_equal(t.column("violation").to_numpy(), arrays["violation"])
    assert t.schema.metadata[b"tripletkit.test"] == b"1"
    # the reader returns the id columns
    ids = read_triplets(tmp_path / "one.parquet")
    assert ids["positive"].tolist() == table.ids[arrays["positive"]].tolist()


def test_default_row_groups_and_empty_tables(rng, tmp_path):
    table = _table(rng)
    assert ROW_GROUP_ROWS == 1 << 16
    writer = TripletWriter(tmp_path / "empty.parquet", table, {})
    assert writer.row_group_rows == ROW_GROUP_ROWS
    writer.close()
    empty = pq.read_table(tmp_path / "empty.parquet")
    assert empty.num_rows == 0 and tuple(empty.column_names) == TRIPLET_COLUMNS
    # without a path nothing is written
    quiet = TripletWriter(None, table, {})
    quiet.add(_triplets(rng, 5))
    quiet.close()
    assert quiet.writer is None and sorted(p.name for p in tmp_path.iterdir()) == ["empty.parquet"]


def test_duplicate_report(rng, tmp_path):
    table = _table(rng, string_ids=True)
    path = duplicates_path(tmp_path / "t.parquet")
    write_duplicates(path, table, np.array([3, 0]), np.array([17, 9]), np.array([0.995, 0.99]), {"k": "v"})
    rep = pq.read_table(path)
    assert tuple(rep.column_names) == DUPLICATE_COLUMNS
    assert rep.column("id_a").to_pylist() == ["img-003", "img-000"]
    assert rep.column("label_b").to_pylist() == [3, 1]
    assert rep.column("cosine").to_pylist() == [0.995, 0.99]
    assert rep.schema.field("cosine").type == pa.float64()


def test_duplicates_path():
    assert duplicates_path("runs/epoch3.parquet") == Path("runs/epoch3.duplicates.parquet")
    assert duplicates_path("runs/epoch3") == Path("runs/epoch3.duplicates.parquet")


# ---------------------------------------------------------------------------------------------
# iter_triplet_batches: shuffled batches of row positions for a training loop
# ---------------------------------------------------------------------------------------------
def test_batches_hold_every_triplet_once_as_row_positions(tmp_path, rng):
    from tripletkit import iter_triplet_batches, mine
    from tripletkit.tables.embeddings import EmbeddingTable

    labels = np.repeat(np.arange(10), 6)
    table = EmbeddingTable.from_arrays(np.arange(60) * 7 + 3, labels, rng.standard_normal((60, 8)))
    summary = mine(table, tmp_path / "t.parquet", quiet=True, regimes=("hard", "semi-hard"))
    tr = pq.read_table(tmp_path / "t.parquet")
    batches = list(iter_triplet_batches(tmp_path / "t.parquet", table, batch_size=7, seed=3))
    assert [len(b[0]) for b in batches[:-1]] == [7] * (len(batches) - 1) and 1 <= len(batches[-1][0]) <= 7
    got = np.stack([np.concatenate([b[i] for b in batches]) for i in range(3)], axis=1)
    assert got.dtype == np.int64 and got.shape == (summary.n_triplets, 3)
    # the positions name the triplets of the file: the same multiset of (anchor, positive, negative) ids
    want = sorted(zip(*(tr.column(c).to_pylist() for c in ("anchor", "positive", "negative"))))
    assert sorted(map(tuple, table.ids[got].tolist())) == want
    # shuffled, and the same seed gives the same batches
    assert not np.array_equal(got[:, 0], table.positions(tr.column("anchor").to_pylist()))
    again = list(iter_triplet_batches(tmp_path / "t.parquet", table, batch_size=7, seed=3))
    assert all(np.array_equal(x, y) for a, b in zip(batches, again) for x, y in zip(a, b))


def test_batches_refuse_ids_missing_from_the_table_and_bad_sizes(tmp_path, rng):
    from tripletkit import iter_triplet_batches
    from tripletkit.tables.embeddings import EmbeddingTable

    table = EmbeddingTable.from_arrays(np.arange(6), [0, 0, 1, 1, 2, 2], rng.standard_normal((6, 3)))
    pq.write_table(pa.table({"anchor": [0, 2], "positive": [1, 3], "negative": [99, 4]}), tmp_path / "t.parquet")
    with pytest.raises(TripletkitError, match=r"negative ids of triplet table .* are not in the embedding table"):
        list(iter_triplet_batches(tmp_path / "t.parquet", table, batch_size=2))
    with pytest.raises(TripletkitError, match=r"^batch_size must be a whole number >= 1, got 0"):
        list(iter_triplet_batches(tmp_path / "t.parquet", table, batch_size=0))
