"""tripletkit.tables.embeddings: reading, validating, normalising and writing embedding tables; check."""

import os
import re
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tripletkit import TripletkitError
from tripletkit.tables.check import check
from tripletkit.tables.embeddings import EmbeddingTable, as_table, to_arrow, write_table


def _write(path, table):
    pq.write_table(table, str(path))
    return path


def _arrow(n=6, d=3, rng=None, ids=None, labels=None, emb=None):
    rng = rng or np.random.default_rng(0)
    ids = np.arange(n) if ids is None else ids
    labels = (np.arange(n) % 3) if labels is None else labels
    emb = rng.normal(size=(n, d)).astype(np.float32) if emb is None else emb
    return to_arrow(ids, labels, emb)


def test_round_trip_fixed_size_list(tmp_path, rng):
    emb = rng.normal(size=(20, 5)).astype(np.float32)
    ids = np.array([f"p-{i:03d}" for i in range(20)], dtype=object)
    labels = np.array([f"seal-{i % 4}" for i in range(20)], dtype=object)
    write_table(tmp_path / "t.parquet", ids, labels, emb, groups=np.array(["a", "b"] * 10, dtype=object))
    t = EmbeddingTable.read(tmp_path / "t.parquet")
    assert t.n == 20 and t.dim == 5 and t.n_identities == 4
    assert t.embeddings.dtype == np.float32 and t.embeddings.flags.c_contiguous
    np.testing.assert_allclose(np.linalg.norm(t.embeddings, axis=1), 1.0, atol=1e-6)
    np.testing.assert_allclose(t.embeddings, emb / np.linalg.norm(emb, axis=1, keepdims=True), rtol=1e-6)
    assert list(t.original_labels()) == list(labels)
    assert list(t.groups) == ["a", "b"] * 10
    assert not t.unit_norm


def test_uniform_list_float64_and_folder(tmp_path, rng):
    emb = rng.normal(size=(8, 4))
    emb /= np.linalg.norm(emb, axis=1, keepdims=True)
    folder = tmp_path / "parts"
    folder.mkdir()
    for k in range(2):
        rows = slice(4 * k, 4 * k + 4)
        tab = pa.table({"id": pa.array(np.arange(8)[rows]), "label": pa.array(np.arange(8)[rows] % 2),
                        "embedding": pa.array(emb[rows].tolist(), type=pa.list_(pa.float64()))})
        _write(folder / f"part-{k}.parquet", tab)
    t = EmbeddingTable.read(folder)
    assert t.n == 8 and t.dim == 4 and t.unit_norm
    order = np.argsort(t.ids)
    np.testing.assert_allclose(t.embeddings[order], emb.astype(np.float32), rtol=1e-6)


def test_column_names_overridable_and_metadata_kept(tmp_path, rng):
    tab = pa.table({"pid": pa.array([1, 2, 3]), "who": pa.array(["x", "x", "y"]),
                    "vec": pa.FixedSizeListArray.from_arrays(pa.array(rng.normal(size=6).astype(np.float32)), 2),
                    "site": pa.array(["n", "s", "n"])})
    _write(tmp_path / "t.parquet", tab)
    t = EmbeddingTable.read(tmp_path / "t.parquet", id_column="pid", label_column="who", embedding_column="vec")
    assert t.metadata.column_names == ["site"]
    assert t.positions([3, 1]).tolist() == [2, 0]


def _expect_error(tmp_path, table, match, **kw):
    path = _write(tmp_path / "bad.parquet", table)
    with pytest.raises(TripletkitError, match=match):
        EmbeddingTable.read(path, **kw)


def test_missing_file(tmp_path):
    with pytest.raises(TripletkitError, match="does not exist"):
        EmbeddingTable.read(tmp_path / "nope.parquet")


def test_broken_file(tmp_path):
    path = tmp_path / "broken.parquet"
    _write(path, _arrow())
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(TripletkitError, match="cannot read .* as Parquet"):
        EmbeddingTable.read(path)


def test_missing_column(tmp_path):
    _expect_error(tmp_path, _arrow().drop_columns(["label"]), "label column 'label' is missing")


def test_wrong_column_types(tmp_path):
    t = _arrow()
    _expect_error(tmp_path, t.set_column(1, "label", pa.array(np.linspace(0, 1, 6))), "label column .* has type double")
    _expect_error(tmp_path, t.set_column(2, "embedding", pa.array(np.ones(6))), "embedding column .* has type double")
    bad = pa.array([[1, 2, 3]] * 6, type=pa.list_(pa.int32()))
    _expect_error(tmp_path, t.set_column(2, "embedding", bad), "holds int32 values")


def test_ragged_lengths(tmp_path):
    t = _arrow()
    ragged = pa.array([[1.0, 2.0, 3.0]] * 5 + [[1.0, 2.0]], type=pa.list_(pa.float32()))
    _expect_error(tmp_path, t.set_column(2, "embedding", ragged),
                  r"rows of length 3 and 2 \(first ragged id: 5\)")


def test_duplicate_and_null_ids_and_labels(tmp_path):
    t = _arrow()
    _expect_error(tmp_path, t.set_column(0, "id", pa.array([0, 1, 2, 3, 3, 5])), r"duplicate ids \(first: 3\)")
    _expect_error(tmp_path, t.set_column(0, "id", pa.array([0, 1, None, 3, 4, 5])), "id column 'id' .*has 1 null values \\(first at row 2\\)")
    _expect_error(tmp_path, t.set_column(1, "label", pa.array(["a", None, "b", "a", "b", "a"])),
                  "label column 'label' .*has 1 null values")


def test_nan_inf_and_zero_rows(tmp_path):
    emb = np.ones((6, 3), dtype=np.float32)
    emb[1, 0] = np.nan
    emb[4, 2] = np.inf
    emb[5] = 0
    t = _arrow(emb=emb)
    _expect_error(tmp_path, t, r"2 rows with NaN/Inf \(first ids: 1, 4\) and 1 zero-norm rows \(first ids: 5\)")
    path = _write(tmp_path / "ok.parquet", t)
    kept = EmbeddingTable.read(path, drop_invalid=True)
    assert kept.n == 3 and kept.dropped == 3 and kept.ids.tolist() == [0, 2, 3]


def test_empty_table(tmp_path):
    _expect_error(tmp_path, _arrow().slice(0, 0), "has no rows")


def test_mixed_schema_folder(tmp_path, rng):
    folder = tmp_path / "mixed"
    folder.mkdir()
    _write(folder / "a.parquet", _arrow(d=3))
    _write(folder / "b.parquet", _arrow(d=4, ids=np.arange(6, 12)))
    with pytest.raises(TripletkitError, match="different schemas"):
        EmbeddingTable.read(folder)


def test_from_arrays_validation(rng):
    emb = rng.normal(size=(4, 2))
    with pytest.raises(TripletkitError, match="duplicates"):
        EmbeddingTable.from_arrays([1, 1, 2, 3], [0, 0, 1, 1], emb)
    with pytest.raises(TripletkitError, match="one entry per embedding row"):
        EmbeddingTable.from_arrays([1, 2, 3], [0, 0, 1, 1], emb)
    with pytest.raises(TripletkitError, match="2-D"):
        EmbeddingTable.from_arrays([1], [0], np.ones(3))
    t = as_table((np.arange(4), np.array(["a", "a", "b", "b"]), emb))
    assert t.n_identities == 2 and t.labels.tolist() == [0, 0, 1, 1]


def test_invariance_of_normalised_rows_to_scale(rng):
    # Scaling a row by a positive constant must not change its unit vector.
    emb = rng.normal(size=(5, 3))
    a = EmbeddingTable.from_arrays(np.arange(5), np.zeros(5, int), emb)
    b = EmbeddingTable.from_arrays(np.arange(5), np.zeros(5, int), emb * rng.uniform(0.1, 10, size=(5, 1)))
    np.testing.assert_allclose(a.embeddings, b.embeddings, rtol=1e-6)
    assert a.fingerprint == EmbeddingTable.from_arrays(np.arange(5), np.zeros(5, int), emb).fingerprint


def test_write_refuses_overwrite_and_is_atomic(tmp_path, rng):
    path = tmp_path / "out.parquet"
    write_table(path, np.arange(3), np.arange(3), rng.normal(size=(3, 2)))
    before = path.read_bytes()
    with pytest.raises(TripletkitError, match="already exists; pass force=True"):
        write_table(path, np.arange(3), np.arange(3), rng.normal(size=(3, 2)))
    assert path.read_bytes() == before
    write_table(path, np.arange(4), np.arange(4), rng.normal(size=(4, 2)), force=True)
    assert EmbeddingTable.read(path).n == 4
    assert sorted(os.listdir(tmp_path)) == ["out.parquet"]


def test_write_into_missing_folder(tmp_path, rng):
    with pytest.raises(TripletkitError, match="does not exist; create it first"):
        write_table(tmp_path / "no" / "out.parquet", np.arange(3), np.arange(3), rng.normal(size=(3, 2)))
    assert not (tmp_path / "no").exists()


def test_check_summary(tmp_path, rng):
    emb = rng.normal(size=(7, 3)).astype(np.float32)
    emb[6] = np.nan
    write_table(tmp_path / "t.parquet", np.arange(7), np.array([0, 0, 0, 1, 1, 2, 2]), emb)
    out = check(tmp_path / "t.parquet")
    # rows counts every row of the file; the other counts are of the valid rows. Row 6 (label 2)
    # is invalid, so label 2 is left with one sample: a singleton.
    assert out["rows"] == 7 and out["dim"] == 3 and out["identities"] == 3
    assert out["singletons"] == 1 and out["invalid_rows"] == 1 and out["unit_norm"] is False
    assert out["samples_per_identity"] == {"min": 1, "median": 2.0, "max": 3}
    # mine and score would refuse the NaN row: a problem, unless the rows are dropped
    assert len(out["problems"]) == 1
    assert re.match(r"table '.*t\.parquet' has 1 rows with NaN/Inf or zero norm \(first ids: 6\); mine and score "
                    r"refuse them: fix them or pass drop_invalid=True$", out["problems"][0])
    assert check(tmp_path / "t.parquet", drop_invalid=True)["problems"] == []


@pytest.mark.parametrize("labels, problem", [
    (np.zeros(6, np.int64), r"has a single identity \(label 0\), so there are no impostor pairs; mining or scoring "
                            r"needs at least 2 identities"),
    (np.arange(6), r"every identity of table .* has one row, so there are no genuine pairs; mining or scoring needs"),
])
def test_check_lists_what_mine_and_score_refuse(tmp_path, rng, labels, problem):
    write_table(tmp_path / "t.parquet", np.arange(6), labels, rng.normal(size=(6, 3)))
    out = check(tmp_path / "t.parquet")
    assert out["rows"] == 6 and out["invalid_rows"] == 0
    assert len(out["problems"]) == 1 and re.search(problem, out["problems"][0])


def test_check_of_a_table_with_every_row_invalid(tmp_path):
    write_table(tmp_path / "t.parquet", np.arange(4), np.array([0, 0, 1, 1]), np.zeros((4, 3)))
    out = check(tmp_path / "t.parquet")
    assert out["rows"] == 4 and out["invalid_rows"] == 4 and out["identities"] == 2
    assert out["problems"] == [f"every row of the table in {tmp_path / 't.parquet'} is invalid (NaN/Inf or zero "
                               "norm): there is nothing to mine or score"]


def test_positions_take_ids_of_the_table_kind_only():
    t = EmbeddingTable.from_arrays(np.array([1, 3, 5]), np.array([0, 0, 1]), np.eye(3))
    assert t.positions(np.array([5, 1])).tolist() == [2, 0]
    # a float is no id: 0.7 must not become 0, nor 5.0 become 5
    with pytest.raises(TripletkitError, match=r"^anchor ids have type double; ids are int64 or strings"):
        t.positions(np.array([0.7, 1.2]), what="anchor ids")
    with pytest.raises(TripletkitError, match=r"type double"):
        t.positions(np.array([5.0]))
    with pytest.raises(TripletkitError, match=r"^ids are strings but the ids of the embedding table are integers"):
        t.positions(["5"])
    with pytest.raises(TripletkitError, match=r"mix integers and strings"):
        t.positions(np.array([5, "a"], dtype=object))
    s = EmbeddingTable.from_arrays(np.array(["a", "b", "c"]), np.array([0, 0, 1]), np.eye(3))
    assert s.positions(["c", "a"]).tolist() == [2, 0]
    with pytest.raises(TripletkitError, match=r"^ids are integers but the ids of the embedding table are strings"):
        s.positions([1])
    with pytest.raises(TripletkitError, match=r"^3 ids are not in the embedding table \(first: 'x', 'y'\)"):
        s.positions(["x", "a", "y", "x"])


# ---------------------------------------------------------------------------------------------
# page checksums: written into every file, verified on every read
# ---------------------------------------------------------------------------------------------
def damage_page(path, row_group=0, column=0):
    """Flip a byte near the end of a column chunk (inside its last data page's values); the footer
    stays intact, so only the page's checksum can tell."""
    meta = pq.ParquetFile(path).metadata
    chunk = meta.row_group(row_group).column(column)
    start = chunk.dictionary_page_offset if chunk.has_dictionary_page else chunk.data_page_offset
    data = bytearray(Path(path).read_bytes())
    data[start + chunk.total_compressed_size - 2] ^= 0x5A
    Path(path).write_bytes(bytes(data))


def test_written_tables_carry_checksums_that_reading_verifies(tmp_path, rng):
    path = tmp_path / "t.parquet"
    X = rng.normal(size=(40, 8))
    write_table(path, np.arange(40), np.repeat(np.arange(8), 5), X)
    before = EmbeddingTable.read(path).embeddings
    damage_page(path, column=2)  # the embedding column
    with pytest.raises(TripletkitError, match=r"^embedding table '.*t\.parquet' is damaged: row group 0 fails its "
                                              r"page checksum \(the data changed after it was written\); restore "
                                              r"the file from a copy or write it again$"):
        EmbeddingTable.read(path)
    assert before.shape == (40, 8)


def test_a_damaged_part_of_a_folder_is_named_with_its_row_group(tmp_path, rng):
    (tmp_path / "dump").mkdir()
    for i in range(3):
        write_table(tmp_path / "dump" / f"part-{i}.parquet", np.arange(10) + 10 * i, np.repeat(np.arange(5), 2) + 5 * i,
                    rng.normal(size=(10, 4)))
    damage_page(tmp_path / "dump" / "part-1.parquet", column=2)
    with pytest.raises(TripletkitError, match=r"^part '.*dump/part-1\.parquet' of folder '.*dump' is damaged: row "
                                              r"group 0 fails its page checksum"):
        EmbeddingTable.read(tmp_path / "dump")


def test_a_file_written_without_checksums_is_still_read(tmp_path, rng):
    # other tools may not write page checksums: verification only checks the pages that carry one
    X = rng.normal(size=(12, 3)).astype(np.float32)
    pq.write_table(to_arrow(np.arange(12), np.repeat(np.arange(4), 3), X), tmp_path / "plain.parquet",
                   write_page_checksum=False)
    assert EmbeddingTable.read(tmp_path / "plain.parquet").n == 12


def test_files_starting_with_dot_or_underscore_are_not_parts(tmp_path, rng):
    # pyarrow's dataset discovery skips them (hidden files, _SUCCESS markers, _temporary/ of writers)
    folder = tmp_path / "dump"
    (folder / "site=a").mkdir(parents=True)
    (folder / "_temporary" / "0").mkdir(parents=True)
    write_table(folder / "site=a" / "part-0.parquet", np.arange(6), np.repeat(np.arange(3), 2), rng.normal(size=(6, 4)))
    write_table(folder / "part-1.parquet", np.arange(6, 12), np.repeat(np.arange(3), 2), rng.normal(size=(6, 4)))
    for hidden in (folder / ".part-2.parquet", folder / "_part-3.parquet", folder / "_temporary" / "0" / "p.parquet"):
        write_table(hidden, np.arange(100, 106), np.zeros(6, np.int64), rng.normal(size=(6, 4)))
    (folder / "site=a" / ".part-0.parquet.crc").write_bytes(b"\x00\x01")
    table = EmbeddingTable.read(folder)
    assert sorted(table.ids.tolist()) == list(range(12))
    import pyarrow.dataset as ds

    assert ds.dataset(str(folder), format="parquet").count_rows() == 12  # the same files as pyarrow's discovery


# ---------------------------------------------------------------------------------------------
# finite float64 values beyond float32's range keep their direction
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("scale", [1e300, 1e-300, 1e39, 1e-39])
def test_float64_rows_beyond_float32_range_are_normalised_not_refused(tmp_path, rng, scale):
    import warnings

    X = rng.normal(size=(12, 5))
    labels = np.repeat(np.arange(4), 3)
    reference = EmbeddingTable.from_arrays(np.arange(12), labels, X)
    wide = X.copy()
    wide[[2, 7]] *= scale  # two rows far outside float32's range, the others ordinary
    path = tmp_path / "wide.parquet"
    pq.write_table(pa.table({"id": np.arange(12), "label": labels,
                             "embedding": pa.array(list(wide), pa.list_(pa.float64()))}), path)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no RuntimeWarning about overflow in a cast
        from_file = EmbeddingTable.read(path)
        from_arrays = EmbeddingTable.from_arrays(np.arange(12), labels, wide)
    for t in (from_file, from_arrays):
        assert t.dropped == 0 and not t.unit_norm
        # the same unit vectors up to float32 rounding (scaling by 1e300 is itself rounded in float64)
        np.testing.assert_allclose(t.embeddings, reference.embeddings, rtol=0, atol=2e-7)
        # rows inside float32's range are the bytes of the ordinary table
        keep = np.setdiff1d(np.arange(12), [2, 7])
        assert np.array_equal(t.embeddings[keep], reference.embeddings[keep])
    assert np.array_equal(from_file.embeddings, from_arrays.embeddings)


def test_float64_rows_beyond_float32_range_pass_check(tmp_path, capsys, rng):
    from tripletkit.cli import main

    X = rng.normal(size=(12, 4)) * 1e300
    path = tmp_path / "wide.parquet"
    pq.write_table(pa.table({"id": np.arange(12), "label": np.repeat(np.arange(4), 3),
                             "embedding": pa.array(list(X), pa.list_(pa.float64()))}), path)
    assert main(["check", str(path), "--json"]) == 0
    out, err = capsys.readouterr()
    assert err == "" and '"invalid_rows": 0' in out


# ---------------------------------------------------------------------------------------------
# tables from anything a data scientist holds
# ---------------------------------------------------------------------------------------------
def _arrow_source(rng, n=60, k=6, d=5):
    labels = np.repeat(np.arange(k), n // k)
    x = rng.standard_normal((n, d)).astype(np.float32) + 2 * np.eye(d, dtype=np.float32)[labels % d]
    return pa.table({"id": np.arange(n) + 100, "label": labels,
                     "embedding": pa.FixedSizeListArray.from_arrays(pa.array(x.reshape(-1)), d)})


class _CapsuleOnly:
    """An object that offers nothing but the Arrow PyCapsule stream interface."""

    def __init__(self, table):
        self._table = table

    def __arrow_c_stream__(self, requested_schema=None):
        return self._table.__arrow_c_stream__(requested_schema)


def test_table_objects_give_the_same_table_as_the_file(tmp_path, rng):
    import pyarrow.dataset as ds

    from tripletkit.tables.embeddings import as_table

    arrow = _arrow_source(rng)
    pq.write_table(arrow, tmp_path / "t.parquet")
    ref = as_table(tmp_path / "t.parquet")
    sources = {
        "arrow table": arrow,
        "record batch": arrow.combine_chunks().to_batches()[0],
        "record batch reader": pa.RecordBatchReader.from_batches(arrow.schema, arrow.to_batches()),
        "dataset": ds.dataset(tmp_path / "t.parquet"),
        "capsule": _CapsuleOnly(arrow),
    }
    for name, source in sources.items():
        got = as_table(source)
        assert got.fingerprint == ref.fingerprint, name
        assert np.array_equal(got.embeddings, ref.embeddings), name


def test_pandas_and_polars_dataframes_are_read_without_importing_them_in_the_package(rng):
    import pandas as pd
    import polars as pl

    from tripletkit.tables.embeddings import as_table

    arrow = _arrow_source(rng)
    ref = as_table(arrow)
    rows = arrow.column("embedding").to_pylist()
    frame = pd.DataFrame({"id": arrow.column("id").to_numpy(), "label": arrow.column("label").to_numpy(),
                          "embedding": [np.asarray(r, np.float32) for r in rows]})
    assert as_table(frame).fingerprint == ref.fingerprint
    assert as_table(pl.from_arrow(arrow)).fingerprint == ref.fingerprint
    # the same column options and messages as for files
    renamed = frame.rename(columns={"label": "seal"})
    assert as_table(renamed, label_column="seal").fingerprint == ref.fingerprint
    with pytest.raises(TripletkitError, match=r"^label column 'label' is missing in the pandas DataFrame given"):
        as_table(renamed)


def test_verbs_take_a_dataframe(rng):
    import pandas as pd

    from tripletkit import check, mine, score
    from tripletkit.config import EvaluationConfig

    arrow = _arrow_source(rng, n=120, k=12, d=6)
    frame = arrow.to_pandas()
    assert check(frame)["rows"] == 120
    summary = mine(frame, regimes=("hard", "semi-hard"), quiet=True)
    assert summary.anchors == 120
    report = score(frame, config=EvaluationConfig(bootstrap=0, plots=False, clustering=False), quiet=True)
    assert report["input"]["rows"] == 120 and report["verification"]["genuine_pairs"] == 12 * 45
    assert isinstance(frame, pd.DataFrame)


def test_hive_partitioned_folder_reads_its_keys_back_as_columns(tmp_path, rng):
    from tripletkit.tables.embeddings import as_table

    arrow = _arrow_source(rng)
    pq.write_to_dataset(arrow, tmp_path / "by_label", partition_cols=["label"])
    got = as_table(tmp_path / "by_label")
    ref = as_table(arrow)
    order = np.argsort(got.ids)
    assert np.array_equal(got.ids[order], ref.ids)
    assert np.array_equal(got.original_labels()[order], ref.original_labels())
    assert np.array_equal(got.embeddings[order], ref.embeddings)


def test_reading_tables_never_imports_pandas_or_polars(tmp_path, rng):
    import subprocess
    import sys

    pq.write_table(_arrow_source(rng), tmp_path / "t.parquet")
    code = ("import sys; from tripletkit import check, score; from tripletkit.config import EvaluationConfig; "
            f"check({str(tmp_path / 't.parquet')!r}); "
            f"score({str(tmp_path / 't.parquet')!r}, config=EvaluationConfig(bootstrap=0, plots=False), quiet=True); "
            "print(sorted(m for m in ('pandas', 'polars') if m in sys.modules))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[]"
