"""tripletkit.mining.candidates: every mined triplet against an independent numpy brute force
(tests/_support.py: one float64 Gram matrix of the table's unit rows, distances 2 - 2 cos, the
DESIGN.md regime boundaries written out again), on both candidate paths; blocks independent of
their size and of the order they are mined in."""

import numpy as np
import pyarrow.parquet as pq
import pytest
from _support import all_pairs, check_every_triplet, chosen_negatives, clustered_table, distances, regime_candidates

from tripletkit.config import MiningConfig
from tripletkit.mining import mine
from tripletkit.mining.candidates import mine_block
from tripletkit.mining.index import build_index
from tripletkit.mining.plan import make_plan
from tripletkit.mining.regimes import REGIMES
from tripletkit.tables.embeddings import EmbeddingTable

ALL = ("easy", "semi-hard", "hard")
#: The ``dense`` knob of :func:`mine` for each candidate path of an exact index.
DENSE = {"search": False, "dense": True}


@pytest.fixture(params=["search", "dense"])
def path(request):
    """Run the test once on each candidate path of an exact index."""
    return request.param


@pytest.mark.parametrize("distance", ["squared", "euclidean"])
@pytest.mark.parametrize("select", ["hardest", "random", "distance-weighted"])
def test_every_triplet_matches_brute_force(seed, distance, select, path):
    table = clustered_table(seed)
    margin = 0.3 if distance == "squared" else 0.15
    s = mine(table, regimes=ALL, select=select, distance=distance, margin=margin, negatives_per_positive=2,
             quiet=True, dense=DENSE[path], return_triplets=True, seed=3)
    assert s.details["dense_rows"] == (table.n if path == "dense" else 0)
    check_every_triplet(table, s, margin, distance)
    counts = {r: int(np.sum(s.triplets["regime"] == REGIMES.index(r))) for r in ALL}
    assert s.regimes == counts
    assert all(v > 0 for v in counts.values()), counts  # the data exercise every regime
    assert s.n_triplets == len(s.triplets["anchor"])


@pytest.mark.parametrize("regimes", [("hard",), ("semi-hard",), ("easy",), ("semi-hard", "hard")])
def test_each_regime_alone(seed, regimes, path):
    table = clustered_table(seed + 1)
    s = mine(table, regimes=regimes, quiet=True, dense=DENSE[path], return_triplets=True)
    check_every_triplet(table, s, 0.2, "squared")
    assert set(REGIMES[c] for c in np.unique(s.triplets["regime"])) == set(regimes)
    assert list(s.regimes) == list(regimes)
    assert list(s.pairs_without_negative) == list(regimes)


@pytest.mark.parametrize("distance", ["squared", "euclidean"])
def test_hardest_equals_brute_force_and_counts_pairs_without(seed, distance, path):
    table = clustered_table(seed + 2, identities=20, per=8)
    margin = 0.25
    k = 3
    s = mine(table, regimes=ALL, select="hardest", distance=distance, margin=margin, positives_per_anchor=100,
             negatives_per_positive=k, quiet=True, dense=DENSE[path], return_triplets=True)
    D, _ = distances(table.embeddings, distance)
    got = chosen_negatives(s)
    pairs = all_pairs(table.labels)
    assert s.details["pairs"] == len(pairs)
    without = dict.fromkeys(ALL, 0)
    for a, p in pairs:
        for r in ALL:
            want = regime_candidates(table.labels, D, a, p, r, margin)[:k].tolist()
            assert got.get((a, p, r), []) == want, (a, p, r)
            without[r] += not want
    assert s.pairs_without_negative == without
    assert 0 < without["hard"] < len(pairs)  # both kinds of pairs occur


def test_completeness_random_semi_hard(seed, path):
    """Every pair with a semi-hard negative in brute force gets min(k, available) of them."""
    table = clustered_table(seed + 3)
    k = 2
    s = mine(table, regimes=("semi-hard",), select="random", positives_per_anchor=100, negatives_per_positive=k,
             quiet=True, dense=DENSE[path], return_triplets=True)
    D, _ = distances(table.embeddings, "squared")
    got = chosen_negatives(s)
    with_band = 0
    for a, p in all_pairs(table.labels):
        cand = set(regime_candidates(table.labels, D, a, p, "semi-hard", 0.2).tolist())
        mined = got.get((a, p, "semi-hard"), [])
        assert set(mined) <= cand
        assert len(mined) == min(k, len(cand))
        with_band += bool(cand)
    assert with_band > 0
    assert s.pairs_without_negative["semi-hard"] == len(all_pairs(table.labels)) - with_band


def _with_duplicates(seed):
    base = clustered_table(seed + 9, identities=12, per=6)
    rng = np.random.default_rng(seed)
    X = base.embeddings.astype(np.float64).copy()
    labels = base.labels.copy()
    # the same individual filed under another label: near copies of 5 rows, relabelled
    src = rng.choice(base.n, 5, replace=False)
    copies = X[src] + 0.01 * rng.standard_normal((5, X.shape[1]))
    new_labels = (labels[src] + 1) % 12
    X = np.vstack([X, copies])
    labels = np.concatenate([labels, new_labels])
    return EmbeddingTable.from_arrays(np.arange(labels.size), labels, X)


def test_suspect_duplicates_reported_and_excluded(seed, tmp_path, path):
    table = _with_duplicates(seed)
    thr = 0.98
    _, C = distances(table.embeddings, "squared")
    cross = table.labels[:, None] != table.labels[None, :]
    iu = np.triu_indices(table.n, 1)
    want = {(int(i), int(j)) for i, j in zip(*iu) if cross[i, j] and C[i, j] > thr}
    assert len(want) >= 5
    out = tmp_path / "t.parquet"
    s = mine(table, out, regimes=ALL, select="hardest", quiet=True, dense=DENSE[path], return_triplets=True)
    assert s.suspect_duplicates == len(want)
    rep = pq.read_table(s.duplicates_out)
    assert rep.column_names == ["id_a", "id_b", "label_a", "label_b", "cosine"]
    pos_a, pos_b = table.positions(rep.column("id_a").to_numpy()), table.positions(rep.column("id_b").to_numpy())
    assert {(int(min(a, b)), int(max(a, b))) for a, b in zip(pos_a, pos_b)} == want
    np.testing.assert_allclose(rep.column("cosine").to_numpy(), C[pos_a, pos_b], atol=1e-12)
    assert np.all(np.diff(rep.column("cosine").to_numpy()) <= 0)  # most similar first
    used = {(int(a), int(n)) for a, n in zip(s.triplets["anchor"], s.triplets["negative"])}
    dup_directed = want | {(j, i) for i, j in want}
    assert used & dup_directed  # without exclusion they are (very) hard negatives
    ex = mine(table, regimes=ALL, select="hardest", exclude_duplicates=True, quiet=True, dense=DENSE[path], return_triplets=True)
    used = {(int(a), int(n)) for a, n in zip(ex.triplets["anchor"], ex.triplets["negative"])}
    assert not used & dup_directed
    D, _ = distances(table.embeddings, "squared")
    got = chosen_negatives(ex)
    for a, p in list({(int(a), int(p)) for a, p in zip(ex.triplets["anchor"], ex.triplets["positive"])})[:60]:
        for r in ALL:
            want_r = regime_candidates(table.labels, D, a, p, r, 0.2, C=C, exclude_above=thr)[:1].tolist()
            assert got.get((a, p, r), []) == want_r


@pytest.mark.parametrize("select", ["random", "distance-weighted", "hardest"])
def test_block_sizes_do_not_change_the_triplets(seed, tmp_path, select, path):
    """Blocked results equal one-shot results: the draws hang on (anchor, positive, row), not blocks."""
    table = clustered_table(seed + 12)
    ref = tmp_path / "ref.parquet"
    mine(table, ref, regimes=ALL, select=select, seed=9, quiet=True, dense=DENSE[path])
    want = pq.read_table(ref)
    for i, (rows, k) in enumerate([(1, 100), (17, 5), (64, 3), (table.n, 1000)]):
        p = tmp_path / f"b{i}.parquet"
        mine(table, p, regimes=ALL, select=select, seed=9, block_rows=rows, neighbours=k, memory_mb=16, quiet=True, dense=DENSE[path])
        got = pq.read_table(p)
        assert got.equals(want)  # values and schema; only the recorded options differ
        assert pq.ParquetFile(p).metadata.num_row_groups == pq.ParquetFile(ref).metadata.num_row_groups


def test_row_order_and_invariance_to_row_permutation(seed):
    table = clustered_table(seed + 13)
    s = mine(table, regimes=ALL, select="hardest", positives_per_anchor=100, quiet=True, return_triplets=True)
    tr = s.triplets
    order = np.lexsort((tr["positive"], tr["anchor"]))
    assert np.array_equal(order, np.arange(order.size))
    # permuting the rows permutes nothing in the hardest triplets (as sets of ids)
    perm = np.random.default_rng(seed).permutation(table.n)
    t2 = EmbeddingTable.from_arrays(table.ids[perm], table.labels[perm], table.embeddings[perm])
    s2 = mine(t2, regimes=ALL, select="hardest", positives_per_anchor=100, quiet=True, return_triplets=True)
    key = lambda s: sorted(zip(s.triplets["anchor_id"], s.triplets["positive_id"], s.triplets["negative_id"],  # noqa: E731
                               s.triplets["regime"]))
    assert key(s) == key(s2)


@pytest.mark.parametrize("select", ["random", "distance-weighted", "hardest"])
def test_blocks_do_not_depend_on_the_order_they_are_mined_in(seed, select, path):
    """A block's result depends on the plan and its rows only: mined in reverse, the blocks give
    the same triplets and counters as the run."""
    table = clustered_table(seed + 12)
    config = MiningConfig(regimes=ALL, select=select, seed=9, block_rows=23)
    index = build_index(table.embeddings, "exact")
    plan = make_plan(table, config, index, dense=DENSE[path])
    results = {start: mine_block(plan, index, start, min(table.n, start + 23)) for start in range(0, table.n, 23)[::-1]}
    whole = mine(table, config=config, quiet=True, return_triplets=True, dense=DENSE[path])
    blocks = [results[start] for start in sorted(results)]
    for key in ("anchor", "positive", "negative", "d_ap", "d_an", "violation", "regime"):
        got = np.concatenate([b.triplets[key] for b in blocks if b.triplets is not None])
        assert np.array_equal(got, whole.triplets[key]), key
    counts = sum(b.regime_counts for b in blocks)
    assert {r: int(counts[REGIMES.index(r)]) for r in ALL} == whole.regimes
    without = sum(b.without for b in blocks)
    assert {r: int(without[REGIMES.index(r)]) for r in ALL} == whole.pairs_without_negative
    assert sum(b.dense_rows for b in blocks) == whole.details["dense_rows"]
