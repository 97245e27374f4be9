"""tripletkit.mining.plan: anchors, positives, radii and thresholds against a brute force, the
choice of the candidate path, block sizes, and the memory estimate (hand-computed sums of its
terms, and the allocations traced during real runs)."""

import numpy as np
import pytest
from _support import clustered_table, distances, grouped_rows, traced_peak

from tripletkit._errors import TripletkitError
from tripletkit.config import MiningConfig
from tripletkit.mining import mine
from tripletkit.mining.index import build_index
from tripletkit.mining.plan import (DENSE_SHARE, Streams, dense_block_rows, make_plan, mining_bytes,
                                    query_block_rows)
from tripletkit.tables.embeddings import EmbeddingTable

ALL = ("easy", "semi-hard", "hard")


# ---------------------------------------------------------------------------------------------
# anchors, positives, radii, thresholds
# ---------------------------------------------------------------------------------------------
def test_positives_and_singletons(seed):
    table = clustered_table(seed + 7, identities=15, per=6, singletons=9)
    s = mine(table, regimes=ALL, positives_per_anchor=3, quiet=True, return_triplets=True)
    assert s.singletons_skipped == 9
    assert s.anchors == 15 * 6
    assert s.details["pairs"] == 15 * 6 * 3
    tr = s.triplets
    sizes = table.identity_sizes()
    assert np.all(sizes[table.labels[tr["anchor"]]] >= 2)
    pairs = np.unique(np.stack([tr["anchor"], tr["positive"]], 1), axis=0)
    per_anchor = np.bincount(pairs[:, 0], minlength=table.n)
    assert per_anchor.max() == 3
    # singletons are never anchors but can be negatives
    single_rows = np.flatnonzero(sizes[table.labels] == 1)
    assert not np.isin(tr["anchor"], single_rows).any()
    assert np.isin(tr["negative"], single_rows).any()


def test_max_per_identity(seed):
    table = clustered_table(seed + 8, identities=10, per=9)
    s1 = mine(table, max_per_identity=3, quiet=True, return_triplets=True, seed=1)
    s2 = mine(table, max_per_identity=3, quiet=True, return_triplets=True, seed=2)
    assert s1.anchors == 30
    for s in (s1, s2):
        anchors = np.unique(s.triplets["anchor"])
        assert np.bincount(table.labels[anchors]).max() <= 3
    assert not np.array_equal(np.unique(s1.triplets["anchor"]), np.unique(s2.triplets["anchor"]))


@pytest.mark.parametrize("distance, regimes", [("squared", ALL), ("euclidean", ("hard",)), ("squared", ("easy",))])
def test_plan_against_brute_force(seed, distance, regimes):
    table = clustered_table(seed, identities=12, per=5, singletons=3)
    config = MiningConfig(distance=distance, regimes=regimes, margin=0.3, positives_per_anchor=2)
    plan = make_plan(table, config, build_index(table.embeddings, "exact"))
    D, C = distances(table.embeddings, distance)
    sizes = table.identity_sizes()
    assert plan.anchors.tolist() == np.flatnonzero(sizes[table.labels] >= 2).tolist()
    assert plan.singletons == 3
    assert np.array_equal(plan.anchor_of_row[plan.anchors], np.arange(plan.anchors.size))
    assert np.all(np.delete(plan.anchor_of_row, plan.anchors) == -1)
    # pairs: sorted by (anchor, positive), distinct positives of the anchor's identity
    a, p = plan.pair_anchors, plan.pair_positives
    assert np.all(table.labels[a] == table.labels[p]) and np.all(a != p)
    assert np.array_equal(np.lexsort((p, a)), np.arange(a.size))
    assert np.unique(np.stack([a, p], 1), axis=0).shape[0] == a.size
    assert np.array_equal(plan.pair_anchors, plan.anchors[plan.pair_owner])
    assert np.all(np.diff(plan.pair_limits) == np.minimum(2, sizes[table.labels[plan.anchors]] - 1))
    np.testing.assert_allclose(plan.d_ap, D[a, p], rtol=0, atol=1e-12)
    owner, pairs = plan.pairs_of(np.array([3, 0]))
    assert owner.tolist() == [0, 0, 1, 1] and plan.pair_owner[pairs].tolist() == [3, 3, 0, 0]
    # radius: the loosest bound of an anchor's pairs; thresholds: every row at the duplicate
    # cosine, anchors lowered to just below the cosine of their radius
    if regimes == ("easy",):
        assert plan.searched == () and np.all(plan.radius == -np.inf)
        assert np.all(plan.thresholds == config.duplicate_cosine)
        return
    bound = plan.d_ap + (0.3 if "semi-hard" in regimes else 0.0)
    for i in range(plan.anchors.size):
        assert plan.radius[i] == bound[plan.pair_owner == i].max()
    within = D[plan.anchors] < plan.radius[:, None]
    assert np.all(C[plan.anchors][within] > plan.thresholds[plan.anchors][:, None].repeat(table.n, 1)[within])
    rest = np.delete(np.arange(table.n), plan.anchors)
    assert np.all(plan.thresholds[rest] == config.duplicate_cosine)


def test_streams_come_from_the_seed():
    assert Streams.from_seed(4) == Streams.from_seed(4)
    assert Streams.from_seed(4).random != Streams.from_seed(5).random
    assert len(set(vars(Streams.from_seed(4)).values())) == 7


# ---------------------------------------------------------------------------------------------
# the candidate path
# ---------------------------------------------------------------------------------------------
def test_poorly_separated_table_takes_the_dense_path(seed, tmp_path):
    # labels unrelated to the vectors: the extreme of a first epoch on a random projection
    rng = np.random.default_rng(seed)
    X, y = rng.standard_normal((600, 8)), rng.integers(0, 30, 600)
    auto = mine((np.arange(600), y, X), tmp_path / "auto.parquet", quiet=True)
    assert auto.details["dense_share"] >= DENSE_SHARE
    assert auto.details["dense_rows"] == 600
    assert auto.details["widened_queries"] == 0
    ref = mine((np.arange(600), y, X), tmp_path / "search.parquet", quiet=True, dense=False)
    assert ref.details["widened_queries"] > 500  # what the dense path saves: nearly every anchor widens
    assert (tmp_path / "auto.parquet").read_bytes() == (tmp_path / "search.parquet").read_bytes()
    # a well separated table stays on the search path; an approximate index always does
    tight = mine(clustered_table(seed, identities=60, per=10, spread=0.3, family=1), quiet=True)
    assert tight.details["dense_share"] < DENSE_SHARE
    assert tight.details["dense_rows"] == 0
    ivf = mine((np.arange(600), y, X), index="ivf", quiet=True)
    assert ivf.details["dense_share"] is None and ivf.details["dense_rows"] == 0


def test_forcing_a_path(seed):
    table = clustered_table(seed, identities=60, per=10, spread=0.3, family=1)
    config = MiningConfig()
    exact = build_index(table.embeddings, "exact")
    assert make_plan(table, config, exact).dense is False  # well separated
    forced = make_plan(table, config, exact, dense=True)
    assert forced.dense is True and forced.dense_share is None
    assert forced.block_rows == dense_block_rows(table.n, config.select, config.memory_mb)
    searched = make_plan(table, config, exact, dense=False)
    assert searched.dense is False and searched.dense_share is None
    assert searched.block_rows == query_block_rows(table.n, config.neighbours, config.memory_mb)
    # where the dense path does not apply, forcing it changes nothing
    ivf = build_index(table.embeddings, "ivf")
    assert make_plan(table, config, ivf, dense=True).dense is False
    assert make_plan(table, MiningConfig(regimes=("easy",)), exact, dense=True).dense is False
    weighted = make_plan(table, MiningConfig(select="distance-weighted"), exact, dense=True)
    assert np.array_equal(weighted.transposed, table.embeddings.T) and weighted.transposed.flags.c_contiguous


# ---------------------------------------------------------------------------------------------
# block sizes and the memory estimate
# ---------------------------------------------------------------------------------------------
def test_block_rows():
    assert query_block_rows(1000, 100, 1024, requested=7) == 7
    assert query_block_rows(100, 100, 1024) == 100
    assert 256 <= query_block_rows(10**6, 100, 16) <= 16384
    # dense: a quarter of 16 MiB over 1,000 columns of 56 (216 distance-weighted) bytes
    assert dense_block_rows(1000, "random", 16) == 4 * 2**20 // 56_000
    assert dense_block_rows(1000, "distance-weighted", 16) == 4 * 2**20 // 216_000
    assert dense_block_rows(1000, "random", 16, requested=5) == 5
    assert dense_block_rows(10**8, "random", 16) == 1  # at least one row


def test_mining_bytes_hand_computed():
    # n=1000, d=10, 100 anchors per block, k=10, exact, memory_mb=16, 4 positives per anchor:
    # table 40,000 + flat index 40,000 + miner state 48,000 + block 100*10*64 = 64,000
    # + widened searches (or one dense block) 16 MiB / 4 = 4,194,304 + the dense path's transposed
    # copy 40,000 + cosines 2 * min(16384, 4000) * 10 * 12 = 960,000
    assert mining_bytes(1000, 10, 100, 10, "exact", memory_mb=16) == 40_000 + 40_000 + 48_000 + 64_000 \
        + 4_194_304 + 40_000 + 960_000
    # 1,000 returned triplets add 80 bytes each
    assert mining_bytes(1000, 10, 100, 10, "exact", memory_mb=16, triplets=1000) == \
        mining_bytes(1000, 10, 100, 10, "exact", memory_mb=16) + 80_000
    # n=100,000, d=8, 10 anchors per block: one dense row (216 bytes a cell with distance-weighted
    # selection) against every row, 21,600,000, is more than the quarter of 16 MiB and counts instead:
    # table 3,200,000 + index 3,200,000 + miner 4,800,000 + block 10*10*64 = 6,400 + dense row
    # 21,600,000 + transposed copy 3,200,000 + cosines 2 * 87,381 * 8 * 12 = 16,777,152
    assert mining_bytes(100_000, 8, 10, 10, "exact", memory_mb=16) == 3_200_000 + 3_200_000 + 4_800_000 \
        + 6_400 + 21_600_000 + 3_200_000 + 16_777_152


def test_mining_bytes_index_kinds_and_auto():
    n, d = 300_000, 128
    exact = mining_bytes(n, d, 0, 100, "exact")
    # hnsw adds 2*M int32 links per node (+1/M for the upper levels): 300,000 * 256 * (33/32), and
    # does without the exact index's dense-path copy of the vectors (300,000 * 128 * 4)
    assert mining_bytes(n, d, 0, 100, "hnsw", hnsw_m=32) - exact == int(n * 2 * 32 * 4 * (1 + 1 / 32)) - n * d * 4
    assert mining_bytes(n, d, 0, 100, "ivf") > exact
    # auto is exact below exact_below rows, ivf from there on
    assert mining_bytes(n, d, 0, 100, "auto", exact_below=n + 1) == exact
    assert mining_bytes(n, d, 0, 100, "auto", exact_below=n) == mining_bytes(n, d, 0, 100, "ivf")


def test_mining_bytes_grows_with_the_table():
    small = mining_bytes(100_000, 128, 0, 100, "exact")
    big = mining_bytes(1_000_000, 128, 0, 100, "exact")
    # the two float32 copies of the matrix (table and index) grow by 2 * 900,000 * 128 * 4
    assert big - small >= 2 * 900_000 * 128 * 4


def test_mining_bytes_rejects_bad_sizes():
    with pytest.raises(TripletkitError, match=r"^n must be a whole number >= 0, got -1$"):
        mining_bytes(-1, 4, 0, 5, "exact")
    with pytest.raises(TripletkitError, match=r"^n must be a whole number >= 0, got 2\.5$"):
        mining_bytes(2.5, 4, 0, 5, "exact")


# Tolerance: the estimate is a planning figure, not an accounting; within a factor of 2.5 of
# the traced numpy allocations either way (our choice; measured ratios were 0.7 to 2.0).
@pytest.mark.parametrize("n, d", [(4000, 64), (2000, 256)])
def test_mining_estimate_tracks_traced_allocations(rng, n, d):
    ids, labels, X = grouped_rows(rng, n, d)
    table = EmbeddingTable.from_arrays(ids, labels, X)
    mined = traced_peak(lambda: mine(table, config=MiningConfig(memory_mb=16), quiet=True))
    est = mining_bytes(n, d, 0, 100, "exact", memory_mb=16)
    assert mined / 2.5 <= est <= 2.5 * mined, (mined, est)
