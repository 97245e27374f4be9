"""tripletkit.mining.run: the run on a validated table, with the hooks the Dask engine uses (its own
index builder and writer), and the warnings of degenerate runs."""

import numpy as np
import pyarrow.parquet as pq
import pytest
from _support import clustered_table

from tripletkit._errors import TripletkitWarning
from tripletkit.config import MiningConfig
from tripletkit.mining import mine
from tripletkit.mining.index import build_index
from tripletkit.mining.run import mine_table

ALL = ("easy", "semi-hard", "hard")


class _Collecting:
    """A writer that keeps what it is given (the hook's contract: add, close, writer)."""

    made = []

    def __init__(self, path, table, metadata):
        self.path, self.metadata, self.arrays, self.closed, self.writer = path, metadata, [], False, None
        _Collecting.made.append(self)

    def add(self, arrays):
        self.arrays.append(arrays)

    def close(self):
        self.closed = True


def test_mine_table_with_its_own_index_builder_and_writer(seed, tmp_path):
    table = clustered_table(seed + 3)
    config = MiningConfig(regimes=ALL, block_rows=40, seed=2)
    built = []

    def build(*args, **kwargs):
        built.append(build_index(*args, **kwargs))
        return built[-1]

    _Collecting.made.clear()
    summary = mine_table(table, config, tmp_path / "ignored.parquet", tmp_path / "d.parquet", quiet=True,
                         build=build, writer_class=_Collecting, return_triplets=True)
    (writer,) = _Collecting.made
    assert len(built) == 1 and writer.closed and writer.path == tmp_path / "ignored.parquet"
    assert len(writer.arrays) > 1  # one call per block with triplets
    assert writer.metadata["tripletkit.seed"] == "2"
    for key in ("anchor", "positive", "negative", "d_ap", "d_an", "violation", "regime"):
        assert np.array_equal(np.concatenate([a[key] for a in writer.arrays]), summary.triplets[key])
    # the same triplets as the verb writes, and the duplicate report where it was asked for
    ref = mine(table, tmp_path / "ref.parquet", config=config, quiet=True)
    assert pq.read_table(tmp_path / "ref.parquet").num_rows == summary.n_triplets == ref.n_triplets
    assert pq.read_table(tmp_path / "d.parquet").equals(pq.read_table(ref.duplicates_out))


def test_mine_table_without_outputs_writes_nothing(seed, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    s = mine_table(clustered_table(seed, identities=6, per=4), MiningConfig(), None, None, quiet=True)
    assert s.n_triplets > 0 and list(tmp_path.iterdir()) == []


def test_degenerate_tables_warn(seed, tmp_path):
    X = np.random.default_rng(seed).standard_normal((5, 4))
    with pytest.warns(TripletkitWarning, match="no anchor"):
        s = mine((np.arange(5), np.arange(5), X), tmp_path / "t.parquet", quiet=True)
    assert s.n_triplets == 0 and s.active_fraction is None and s.singletons_skipped == 5
    assert pq.read_table(tmp_path / "t.parquet").num_rows == 0
    with pytest.warns(TripletkitWarning, match="single identity"):
        s = mine((np.arange(5), np.zeros(5, int), X), quiet=True)
    assert s.n_triplets == 0 and s.pairs_without_negative == {"semi-hard": 20, "hard": 20}


def _far_apart():
    """Two identities on opposite sides of the circle: no hard or semi-hard negative exists."""
    X = np.array([[1.0, 0.0], [1.0, 0.01], [1.0, -0.01], [-1.0, 0.0], [-1.0, 0.01], [-1.0, -0.01]])
    return np.arange(6), np.repeat([0, 1], 3), X


def test_no_triplet_mined_warns():
    with pytest.warns(TripletkitWarning, match=r"^no triplet was mined \(see pairs_without_negative\); "
                                               r"active_fraction is null$"):
        s = mine(_far_apart(), regimes=("hard",), quiet=True)
    assert s.n_triplets == 0 and s.active_fraction is None and s.pairs_without_negative == {"hard": 12}  # 6 anchors x 2 positives


def test_recall_without_candidates_warns_and_is_null():
    with pytest.warns(TripletkitWarning, match=r"^recall is undefined: the sampled anchors have no hard or "
                                               r"semi-hard candidate \(reported as null\)$"):
        s = mine(_far_apart(), regimes=("easy",), index="ivf", quiet=True)
    assert s.index == "ivf" and s.recall is None and s.details["recall_relevant"] == 0
    assert s.n_triplets > 0  # the easy negatives are still mined
