"""tripletkit.mining.mine: the verb's outputs (columns, metadata, determinism, ids and sources),
options and config, approximate indexes, the ``dense`` knob, and errors (one line, no output)."""

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from _support import check_every_triplet, clustered_table

from tripletkit._errors import TripletkitError
from tripletkit.config import ComputeConfig, MiningConfig, load_config
from tripletkit.mining import mine
from tripletkit.tables.embeddings import EmbeddingTable
from tripletkit.tables.triplets import TRIPLET_COLUMNS, TripletWriter, duplicates_path

ALL = ("easy", "semi-hard", "hard")


def test_output_table_and_metadata(seed, tmp_path):
    table = clustered_table(seed + 10)
    out = tmp_path / "epoch.parquet"
    s = mine(table, out, regimes=ALL, quiet=True, return_triplets=True, seed=5)
    assert s.out == str(out) and s.duplicates_out == str(tmp_path / "epoch.duplicates.parquet")
    t = pq.read_table(out)
    assert tuple(t.column_names) == TRIPLET_COLUMNS
    assert t.num_rows == s.n_triplets
    assert t.schema.field("regime").type == pa.dictionary(pa.int8(), pa.string())
    for c in ("d_ap", "d_an", "violation"):
        assert t.schema.field(c).type == pa.float32()
    assert set(t.column("regime").to_pylist()) == set(ALL)
    tr = s.triplets
    assert np.array_equal(t.column("anchor").to_numpy(), tr["anchor_id"])
    assert np.array_equal(t.column("negative").to_numpy(), tr["negative_id"])
    assert np.array_equal(t.column("anchor_label").to_numpy(), tr["anchor_label"])
    assert np.array_equal(t.column("d_an").to_numpy(), tr["d_an"])
    meta = {k.decode(): v.decode() for k, v in pq.read_schema(out).metadata.items() if k.startswith(b"tripletkit.")}
    vals = {k[len("tripletkit."):]: json.loads(v) for k, v in meta.items()}
    assert vals["margin"] == 0.2 and vals["distance"] == "squared" and vals["regimes"] == list(ALL)
    assert vals["select"] == "random" and vals["index"] == "exact" and vals["seed"] == 5
    assert vals["rows"] == table.n and vals["fingerprint"] == table.fingerprint
    assert vals["recall"] is None
    import tripletkit
    assert vals["version"] == tripletkit.__version__
    assert set(s.to_dict()) == {"triplets", "anchors", "regimes", "active_fraction", "pairs_without_negative",
                                "singletons_skipped", "suspect_duplicates", "index", "recall", "seconds", "out",
                                "duplicates_out"}
    # the package's triplet reader and loss agree with what was written
    from tripletkit.triplet_scores import loss
    from tripletkit.tables.triplets import read_triplets
    ids = read_triplets(out)
    assert np.array_equal(ids["positive"], tr["positive_id"])
    rep = loss(out, table, margin=0.2)
    assert rep["regimes"] == s.regimes | {r: rep["regimes"][r] for r in rep["regimes"] if r not in s.regimes}
    assert rep["active_fraction"] == pytest.approx(s.active_fraction)


def test_same_seed_same_bytes_other_seed_differs(seed, tmp_path):
    table = clustered_table(seed + 11)
    paths = [tmp_path / f"r{i}.parquet" for i in range(3)]
    for path, sd in zip(paths, (4, 4, 5)):
        mine(table, path, regimes=ALL, positives_per_anchor=3, seed=sd, quiet=True)
    b = [p.read_bytes() for p in paths]
    assert b[0] == b[1]
    assert b[0] != b[2]
    assert duplicates_path(paths[0]).read_bytes() == duplicates_path(paths[1]).read_bytes()


def test_string_ids_and_labels(seed, tmp_path):
    base = clustered_table(seed + 14, identities=8, per=5)
    ids = np.array([f"img-{i:04d}" for i in range(base.n)], dtype=object)
    labels = np.array([f"seal-{c:02d}" for c in base.labels], dtype=object)
    table = EmbeddingTable.from_arrays(ids, labels, base.embeddings)
    out = tmp_path / "s.parquet"
    s = mine(table, out, regimes=ALL, quiet=True, return_triplets=True)
    t = pq.read_table(out)
    assert t.schema.field("anchor").type == pa.string() and t.schema.field("anchor_label").type == pa.string()
    a = table.positions(t.column("anchor").to_numpy(zero_copy_only=False))
    n = table.positions(t.column("negative").to_numpy(zero_copy_only=False))
    assert np.array_equal(a, s.triplets["anchor"]) and np.array_equal(n, s.triplets["negative"])
    assert t.column("anchor_label").to_pylist() == list(labels[a])


def test_in_memory_tuple_and_path_sources(seed, tmp_path):
    table = clustered_table(seed + 15, identities=8, per=5)
    from tripletkit.tables.embeddings import write_table
    src = tmp_path / "emb.parquet"
    write_table(src, table.ids, table.original_labels(), table.embeddings)
    a = mine(src, quiet=True, return_triplets=True)
    b = mine((table.ids, table.original_labels(), table.embeddings), quiet=True, return_triplets=True)
    assert np.array_equal(a.triplets["negative_id"], b.triplets["negative_id"])
    assert a.out is None and a.duplicates_out is None
    with pytest.raises(TripletkitError, match="is the input .*; writing there would destroy the input"):
        mine(src, src, force=True, quiet=True)


def test_config_object_and_options_override(seed):
    table = clustered_table(seed + 16, identities=8, per=5)
    cfg = MiningConfig(margin=0.5, regimes=("hard",))
    s = mine(table, config=cfg, quiet=True)
    assert list(s.regimes) == ["hard"]
    s = mine(table, config=cfg, regimes="easy", quiet=True, return_triplets=True)
    assert list(s.regimes) == ["easy"]
    check_every_triplet(table, s, 0.5, "squared")


def test_progress_bar_is_silent_without_a_terminal(seed, capsys):
    mine(clustered_table(seed + 17, identities=8, per=5), quiet=False)
    assert capsys.readouterr().err == ""


@pytest.mark.parametrize("kind", ["ivf", "hnsw"])
def test_approximate_index_reports_recall(seed, tmp_path, kind):
    table = clustered_table(seed + 18, identities=60, per=20, dim=16, spread=0.7)
    out = tmp_path / "a.parquet"
    s = mine(table, out, index=kind, ivf_nprobe=2, threads=1, quiet=True, return_triplets=True)
    assert s.index == kind
    assert s.recall is not None and 0.0 <= s.recall <= 1.0
    assert s.details["recall_relevant"] > 0
    meta = json.loads(pq.read_schema(out).metadata[b"tripletkit.recall"])
    assert meta == pytest.approx(s.recall)
    check_every_triplet(table, s, 0.2, "squared")
    if kind == "ivf":
        full = mine(table, index="ivf", ivf_nprobe=10_000, quiet=True)
        assert full.recall == 1.0  # scanning every list is exhaustive
        assert s.recall < 1.0  # 2 of 30 lists miss some candidates: the estimate can tell
    else:
        assert s.recall >= 0.95  # clustered data of 1,200 rows: the graph finds almost all


def test_auto_picks_exact_below_the_threshold_and_ivf_above(seed):
    table = clustered_table(seed + 19, identities=20, per=10)
    assert mine(table, quiet=True).index == "exact"
    s = mine(table, exact_below=100, quiet=True)
    assert s.index == "ivf" and s.recall is not None


def _one_line_no_output(exc_info, folder, keep=()):
    msg = str(exc_info.value)
    assert "\n" not in msg and msg
    assert sorted(p.name for p in folder.iterdir()) == sorted(keep)


@pytest.mark.parametrize("options, match", [
    ({"margin": 0}, "margin must be > 0"),
    ({"margin": -1.0}, "margin must be > 0"),
    ({"regimes": ("medium",)}, "regimes.*must be one of easy, semi-hard, hard"),
    ({"select": "hardest-first"}, "select must be one of"),
    ({"bogus": 1}, "unknown option 'bogus'"),
    ({"negatives_per_positive": 0}, "negatives-per-positive must be >= 1"),
    ({"config": {"margin": 1}}, "config must be a MiningConfig"),
])


def test_bad_options(seed, tmp_path, options, match):
    table = clustered_table(seed, identities=5, per=4)
    with pytest.raises(TripletkitError, match=match) as exc:
        mine(table, tmp_path / "t.parquet", quiet=True, **options)
    _one_line_no_output(exc, tmp_path)


def test_unknown_config_key(tmp_path):
    cfg = tmp_path / "mine.toml"
    cfg.write_text("[mining]\nmargin = 0.3\nmargni = 0.2\n")
    with pytest.raises(TripletkitError, match="unknown key 'margni'") as exc:
        load_config(cfg)
    _one_line_no_output(exc, tmp_path, keep=["mine.toml"])


def test_bad_tables(seed, tmp_path):
    out = tmp_path / "t.parquet"
    X = np.random.default_rng(seed).standard_normal((6, 4))
    X[2] = np.nan
    cases = [
        ((np.arange(6), np.zeros(6, int), X), "NaN"),
        ((np.arange(5), np.zeros(6, int), np.ones((6, 4))), "one entry per embedding row"),
        ((np.arange(6), np.zeros(6, int), np.zeros((6, 4))), "zero-norm"),
        (tmp_path / "missing.parquet", "does not exist"),
        ([1, 2, 3], "expected a table path"),
    ]
    for source, match in cases:
        with pytest.raises(TripletkitError, match=match) as exc:
            mine(source, out, quiet=True)
        _one_line_no_output(exc, tmp_path)


def test_existing_output_needs_force(seed, tmp_path):
    table = clustered_table(seed + 20, identities=6, per=4)
    out = tmp_path / "t.parquet"
    mine(table, out, seed=1, quiet=True)
    before = out.read_bytes()
    with pytest.raises(TripletkitError, match="already exists") as exc:
        mine(table, out, seed=2, quiet=True)
    _one_line_no_output(exc, tmp_path, keep=["t.parquet", "t.duplicates.parquet"])
    assert out.read_bytes() == before
    duplicates_path(out).unlink()
    with pytest.raises(TripletkitError, match="already exists"):
        mine(table, out, seed=2, quiet=True)  # the triplet table alone also blocks
    mine(table, out, seed=2, force=True, quiet=True)
    assert out.read_bytes() != before


def test_interrupted_run_leaves_nothing(seed, tmp_path, monkeypatch):
    table = clustered_table(seed + 21, identities=6, per=4)

    def boom(self, arrays):
        raise KeyboardInterrupt

    monkeypatch.setattr(TripletWriter, "add", boom)
    with pytest.raises(KeyboardInterrupt):
        mine(table, tmp_path / "t.parquet", quiet=True)
    assert list(tmp_path.iterdir()) == []


def test_example_config_lists_every_mining_key():
    import dataclasses
    import tomllib
    from pathlib import Path

    path = Path(__file__).resolve().parents[2] / "configs" / "mine.toml"
    keys = set(tomllib.loads(path.read_text())["mining"])
    assert keys == {f.name for f in dataclasses.fields(MiningConfig)}
    cfg = load_config(path).mining
    assert cfg.max_per_identity == 20 and cfg.regimes == ("semi-hard", "hard")


def test_dense_knob(seed, tmp_path):
    table = clustered_table(seed + 16, identities=8, per=5)
    with pytest.raises(TripletkitError, match=r"^dense must be True or False, got 1$") as exc:
        mine(table, tmp_path / "t.parquet", quiet=True, dense=1)
    _one_line_no_output(exc, tmp_path)
    with pytest.raises(TripletkitError, match=r"^dense applies to mining in one process; leave it unset with a "
                                              r"scheduler$") as exc:
        mine(table, tmp_path / "t.parquet", quiet=True, dense=True, compute=ComputeConfig(scheduler="local"))
    _one_line_no_output(exc, tmp_path)
    assert mine(table, quiet=True, dense=True).details["dense_rows"] == table.n
