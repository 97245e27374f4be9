"""tripletkit.mining: every output triplet against an independent numpy brute force.

The brute force here shares nothing with the miner: one float64 Gram matrix of the table's unit
rows, distances 2 - 2 cos (clipped at 0; square root for Euclidean), and the DESIGN.md regime
boundaries written out again.
"""

import json
import warnings

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tripletkit import mining
from tripletkit._errors import TripletkitError, TripletkitWarning
from tripletkit.config import MiningConfig, load_config
from tripletkit.index import exact_cosine, exact_cosine_rows
from tripletkit.mining import (REGIMES, TRIPLET_COLUMNS, _choose, _count_below, _floyd, _top_in_groups,
                               _uniform, duplicates_path, mine)
from tripletkit.tables.embeddings import EmbeddingTable

ALL = ("easy", "semi-hard", "hard")


# ---------------------------------------------------------------------------------------------
# data and the brute force
# ---------------------------------------------------------------------------------------------
def clustered(seed, identities=30, per=10, dim=16, spread=0.9, family=3, family_spread=1.0, singletons=0):
    """Identities as clusters; identities of one family share a nearby centre (so they overlap)."""
    rng = np.random.default_rng(seed)
    fam = rng.standard_normal((max(1, identities // family), dim))
    fam /= np.linalg.norm(fam, axis=1, keepdims=True)
    centres = fam[np.arange(identities) % fam.shape[0]] + family_spread * rng.standard_normal((identities, dim)) / np.sqrt(dim)
    sizes = np.full(identities, per)
    labels = np.repeat(np.arange(identities), sizes)
    X = centres[labels] + spread * rng.standard_normal((labels.size, dim)) / np.sqrt(dim)
    if singletons:
        labels = np.concatenate([labels, identities + np.arange(singletons)])
        X = np.vstack([X, rng.standard_normal((singletons, dim))])
    return EmbeddingTable.from_arrays(np.arange(labels.size) * 3 + 7, labels, X)


def brute(table, distance):
    U = table.embeddings.astype(np.float64)
    C = U @ U.T
    D = np.maximum(2.0 - 2.0 * C, 0.0)
    return (D if distance == "squared" else np.sqrt(D)), C


def regime_name(d_ap, d_an, margin):
    if d_an < d_ap:
        return "hard"
    if d_an < d_ap + margin:
        return "semi-hard"
    return "easy"


def brute_candidates(table, D, a, p, regime, margin, C=None, exclude_above=None):
    """Rows of another identity in ``regime`` for pair (a, p), sorted by (distance, row)."""
    other = np.flatnonzero(table.labels != table.labels[a])
    d = D[a, other]
    if regime == "hard":
        ok = d < D[a, p]
    elif regime == "semi-hard":
        ok = (d >= D[a, p]) & (d < D[a, p] + margin)
    else:
        ok = d >= D[a, p] + margin
    if exclude_above is not None:
        ok &= ~(C[a, other] > exclude_above)
    rows = other[ok]
    return rows[np.lexsort((rows, D[a, rows]))]


def rows_of(table, ids):
    return table.positions(ids)


def check_every_triplet(table, s, margin, distance):
    """Labels, stored distances, violation and regime of every triplet, by brute force."""
    D, _ = brute(table, distance)
    tr = s.triplets
    a, p, n = tr["anchor"], tr["positive"], tr["negative"]
    assert np.array_equal(table.ids[a], tr["anchor_id"])
    assert np.all(table.labels[a] == table.labels[p])
    assert np.all(table.labels[a] != table.labels[n])
    assert np.all(a != p)
    np.testing.assert_allclose(tr["d_ap"], D[a, p], rtol=0, atol=2e-6)
    np.testing.assert_allclose(tr["d_an"], D[a, n], rtol=0, atol=2e-6)
    np.testing.assert_allclose(tr["violation"], D[a, p] - D[a, n] + margin, rtol=0, atol=4e-6)
    want = [regime_name(x, y, margin) for x, y in zip(D[a, p], D[a, n])]
    assert [REGIMES[c] for c in tr["regime"]] == want
    # no negative twice for one (pair, regime)
    key = np.stack([a, p, n, tr["regime"]], axis=1)
    assert np.unique(key, axis=0).shape[0] == key.shape[0]
    return D


def all_pairs(table):
    """Every ordered same-label pair (what the miner draws when positives_per_anchor is large)."""
    out = []
    for lab in np.unique(table.labels):
        rows = np.flatnonzero(table.labels == lab)
        for a in rows:
            for p in rows:
                if a != p:
                    out.append((a, p))
    return out


def chosen(s):
    """{(a, p, regime name): [negative rows in output order]}."""
    tr = s.triplets
    res = {}
    for a, p, n, r in zip(tr["anchor"], tr["positive"], tr["negative"], tr["regime"]):
        res.setdefault((int(a), int(p), REGIMES[r]), []).append(int(n))
    return res


def force_path(monkeypatch, which):
    """Pin the candidate search to the search path (top-k + widening) or the dense path."""
    monkeypatch.setattr(mining, "_DENSE_SHARE", float("inf") if which == "search" else 0.0)


@pytest.fixture(params=["search", "dense"])
def path(request, monkeypatch):
    """Run the test once on each candidate path of an exact index."""
    force_path(monkeypatch, request.param)
    return request.param


# ---------------------------------------------------------------------------------------------
# every triplet, every regime, both distances, every policy
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("distance", ["squared", "euclidean"])
@pytest.mark.parametrize("select", ["hardest", "random", "distance-weighted"])
def test_every_triplet_matches_brute_force(seed, distance, select, path):
    table = clustered(seed)
    margin = 0.3 if distance == "squared" else 0.15
    s = mine(table, regimes=ALL, select=select, distance=distance, margin=margin, negatives_per_positive=2,
             quiet=True, return_triplets=True, seed=3)
    assert s.details["dense_rows"] == (table.n if path == "dense" else 0)
    check_every_triplet(table, s, margin, distance)
    counts = {r: int(np.sum(s.triplets["regime"] == REGIMES.index(r))) for r in ALL}
    assert s.regimes == counts
    assert all(v > 0 for v in counts.values()), counts  # the data exercise every regime
    assert s.n_triplets == len(s.triplets["anchor"])


@pytest.mark.parametrize("regimes", [("hard",), ("semi-hard",), ("easy",), ("semi-hard", "hard")])
def test_each_regime_alone(seed, regimes, path):
    table = clustered(seed + 1)
    s = mine(table, regimes=regimes, quiet=True, return_triplets=True)
    check_every_triplet(table, s, 0.2, "squared")
    assert set(REGIMES[c] for c in np.unique(s.triplets["regime"])) == set(regimes)
    assert list(s.regimes) == list(regimes)
    assert list(s.pairs_without_negative) == list(regimes)


# ---------------------------------------------------------------------------------------------
# hardest = brute-force hardest; completeness; pairs without negatives
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("distance", ["squared", "euclidean"])
def test_hardest_equals_brute_force_and_counts_pairs_without(seed, distance, path):
    table = clustered(seed + 2, identities=20, per=8)
    margin = 0.25
    k = 3
    s = mine(table, regimes=ALL, select="hardest", distance=distance, margin=margin, positives_per_anchor=100,
             negatives_per_positive=k, quiet=True, return_triplets=True)
    D, _ = brute(table, distance)
    got = chosen(s)
    pairs = all_pairs(table)
    assert s.details["pairs"] == len(pairs)
    without = dict.fromkeys(ALL, 0)
    for a, p in pairs:
        for r in ALL:
            want = brute_candidates(table, D, a, p, r, margin)[:k].tolist()
            assert got.get((a, p, r), []) == want, (a, p, r)
            without[r] += not want
    assert s.pairs_without_negative == without
    assert 0 < without["hard"] < len(pairs)  # both kinds of pairs occur


def test_completeness_random_semi_hard(seed, path):
    """Every pair with a semi-hard negative in brute force gets min(k, available) of them."""
    table = clustered(seed + 3)
    k = 2
    s = mine(table, regimes=("semi-hard",), select="random", positives_per_anchor=100, negatives_per_positive=k,
             quiet=True, return_triplets=True)
    D, _ = brute(table, "squared")
    got = chosen(s)
    with_band = 0
    for a, p in all_pairs(table):
        cand = set(brute_candidates(table, D, a, p, "semi-hard", 0.2).tolist())
        mined = got.get((a, p, "semi-hard"), [])
        assert set(mined) <= cand
        assert len(mined) == min(k, len(cand))
        with_band += bool(cand)
    assert with_band > 0
    assert s.pairs_without_negative["semi-hard"] == len(all_pairs(table)) - with_band


def test_widening_finds_semi_hard_beyond_first_neighbours(seed, monkeypatch):
    """Tight identities fill the first k neighbours; the semi-hard band lies beyond them."""
    force_path(monkeypatch, "search")  # the widening of the search path is what is tested
    table = clustered(seed + 4, identities=24, per=12, spread=0.5, family=4, family_spread=0.6)
    D, _ = brute(table, "squared")
    k_first = 4
    # the premise: for many anchors the k-th neighbour is a same-identity row, yet brute force
    # finds semi-hard negatives
    nearest = np.argsort(D, axis=1, kind="stable")[:, 1:k_first + 1]
    assert np.mean(np.all(table.labels[nearest] == table.labels[:, None], axis=1)) > 0.5
    s = mine(table, regimes=("semi-hard", "hard"), select="hardest", neighbours=k_first, positives_per_anchor=100,
             negatives_per_positive=2, quiet=True, return_triplets=True)
    assert s.details["widened_queries"] > 0
    got = chosen(s)
    found = 0
    for a, p in all_pairs(table):
        for r in ("semi-hard", "hard"):
            want = brute_candidates(table, D, a, p, r, 0.2)[:2].tolist()
            assert got.get((a, p, r), []) == want
            found += bool(want)
    assert found > 0
    wide = mine(table, regimes=("semi-hard", "hard"), select="hardest", neighbours=10_000, positives_per_anchor=100,
                negatives_per_positive=2, quiet=True, return_triplets=True)
    assert wide.details["widened_queries"] == 0
    for key in ("anchor", "positive", "negative", "regime"):
        assert np.array_equal(wide.triplets[key], s.triplets[key])


def test_hnsw_widens_by_doubling_and_agrees(seed):
    table = clustered(seed + 4, identities=24, per=12, spread=0.5, family=4, family_spread=0.6)
    ex = mine(table, index="exact", select="hardest", neighbours=4, quiet=True, return_triplets=True)
    hn = mine(table, index="hnsw", select="hardest", neighbours=4, threads=1, quiet=True, return_triplets=True)
    assert hn.details["widened_queries"] > 0
    assert hn.recall is not None and 0.99 <= hn.recall <= 1.0
    check_every_triplet(table, hn, 0.2, "squared")
    # on 288 rows with ef_search 128 the graph walk sees everything: same triplets as exact
    assert np.array_equal(ex.triplets["negative"], hn.triplets["negative"])


# ---------------------------------------------------------------------------------------------
# easy negatives: rejection sampling, its exact fallback, and hardest-easy from the top-k
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("select", ["random", "hardest", "distance-weighted"])
def test_easy_when_rare_falls_back_to_exact_scan(seed, select):
    table = clustered(seed + 5, identities=20, per=6, dim=8)
    margin = 2.6  # easy needs d_an >= d_ap + 2.6 on [0, 4]: rare, often impossible
    s = mine(table, regimes=("easy",), select=select, margin=margin, positives_per_anchor=100,
             negatives_per_positive=2, neighbours=5, quiet=True, return_triplets=True)
    check_every_triplet(table, s, margin, "squared")
    D, _ = brute(table, "squared")
    got = chosen(s)
    without = 0
    for a, p in all_pairs(table):
        cand = brute_candidates(table, D, a, p, "easy", margin)
        mined = got.get((a, p, "easy"), [])
        assert len(mined) == min(2, cand.size)
        assert set(mined) <= set(cand.tolist())
        if select == "hardest":
            assert mined == cand[:2].tolist()
        without += cand.size == 0
    assert 0 < without < len(all_pairs(table))
    assert s.pairs_without_negative["easy"] == without
    assert s.details["easy_scanned_pairs"] > 0


def test_easy_hardest_from_top_k_equals_brute_force(seed):
    table = clustered(seed + 6)
    s = mine(table, regimes=("easy",), select="hardest", margin=0.1, positives_per_anchor=100,
             negatives_per_positive=2, quiet=True, return_triplets=True)
    D, _ = brute(table, "squared")
    got = chosen(s)
    for a, p in all_pairs(table):
        assert got.get((a, p, "easy"), []) == brute_candidates(table, D, a, p, "easy", 0.1)[:2].tolist()
    # with 100 neighbours of 300 rows the top-k holds the nearest easy rows: little scanning
    assert s.details["easy_scanned_pairs"] < s.details["pairs"]


# ---------------------------------------------------------------------------------------------
# anchors, positives, singletons
# ---------------------------------------------------------------------------------------------
def test_positives_and_singletons(seed):
    table = clustered(seed + 7, identities=15, per=6, singletons=9)
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
    table = clustered(seed + 8, identities=10, per=9)
    s1 = mine(table, max_per_identity=3, quiet=True, return_triplets=True, seed=1)
    s2 = mine(table, max_per_identity=3, quiet=True, return_triplets=True, seed=2)
    assert s1.anchors == 30
    for s in (s1, s2):
        anchors = np.unique(s.triplets["anchor"])
        assert np.bincount(table.labels[anchors]).max() <= 3
    assert not np.array_equal(np.unique(s1.triplets["anchor"]), np.unique(s2.triplets["anchor"]))


# ---------------------------------------------------------------------------------------------
# label noise: suspect duplicates
# ---------------------------------------------------------------------------------------------
def _with_duplicates(seed):
    base = clustered(seed + 9, identities=12, per=6)
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
    _, C = brute(table, "squared")
    cross = table.labels[:, None] != table.labels[None, :]
    iu = np.triu_indices(table.n, 1)
    want = {(int(i), int(j)) for i, j in zip(*iu) if cross[i, j] and C[i, j] > thr}
    assert len(want) >= 5
    out = tmp_path / "t.parquet"
    s = mine(table, out, regimes=ALL, select="hardest", quiet=True, return_triplets=True)
    assert s.suspect_duplicates == len(want)
    rep = pq.read_table(s.duplicates_out)
    assert rep.column_names == ["id_a", "id_b", "label_a", "label_b", "cosine"]
    pos_a, pos_b = rows_of(table, rep.column("id_a").to_numpy()), rows_of(table, rep.column("id_b").to_numpy())
    assert {(int(min(a, b)), int(max(a, b))) for a, b in zip(pos_a, pos_b)} == want
    np.testing.assert_allclose(rep.column("cosine").to_numpy(), C[pos_a, pos_b], atol=1e-12)
    assert np.all(np.diff(rep.column("cosine").to_numpy()) <= 0)  # most similar first
    used = {(int(a), int(n)) for a, n in zip(s.triplets["anchor"], s.triplets["negative"])}
    dup_directed = want | {(j, i) for i, j in want}
    assert used & dup_directed  # without exclusion they are (very) hard negatives
    ex = mine(table, regimes=ALL, select="hardest", exclude_duplicates=True, quiet=True, return_triplets=True)
    used = {(int(a), int(n)) for a, n in zip(ex.triplets["anchor"], ex.triplets["negative"])}
    assert not used & dup_directed
    D, _ = brute(table, "squared")
    got = chosen(ex)
    for a, p in list({(int(a), int(p)) for a, p in zip(ex.triplets["anchor"], ex.triplets["positive"])})[:60]:
        for r in ALL:
            want_r = brute_candidates(table, D, a, p, r, 0.2, C=C, exclude_above=thr)[:1].tolist()
            assert got.get((a, p, r), []) == want_r


# ---------------------------------------------------------------------------------------------
# output file: columns, metadata, determinism, atomicity
# ---------------------------------------------------------------------------------------------
def test_output_table_and_metadata(seed, tmp_path):
    table = clustered(seed + 10)
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
    from tripletkit.losses import loss
    from tripletkit.tables.triplets import read_triplets
    ids = read_triplets(out)
    assert np.array_equal(ids["positive"], tr["positive_id"])
    rep = loss(out, table, margin=0.2)
    assert rep["regimes"] == s.regimes | {r: rep["regimes"][r] for r in rep["regimes"] if r not in s.regimes}
    assert rep["active_fraction"] == pytest.approx(s.active_fraction)


def test_same_seed_same_bytes_other_seed_differs(seed, tmp_path):
    table = clustered(seed + 11)
    paths = [tmp_path / f"r{i}.parquet" for i in range(3)]
    for path, sd in zip(paths, (4, 4, 5)):
        mine(table, path, regimes=ALL, positives_per_anchor=3, seed=sd, quiet=True)
    b = [p.read_bytes() for p in paths]
    assert b[0] == b[1]
    assert b[0] != b[2]
    assert duplicates_path(paths[0]).read_bytes() == duplicates_path(paths[1]).read_bytes()


@pytest.mark.parametrize("select", ["random", "distance-weighted", "hardest"])
def test_block_sizes_do_not_change_the_triplets(seed, tmp_path, select, path):
    """Blocked results equal one-shot results: the draws hang on (anchor, positive, row), not blocks."""
    table = clustered(seed + 12)
    ref = tmp_path / "ref.parquet"
    mine(table, ref, regimes=ALL, select=select, seed=9, quiet=True)
    want = pq.read_table(ref)
    for i, (rows, k) in enumerate([(1, 100), (17, 5), (64, 3), (table.n, 1000)]):
        p = tmp_path / f"b{i}.parquet"
        mine(table, p, regimes=ALL, select=select, seed=9, block_rows=rows, neighbours=k, memory_mb=16, quiet=True)
        got = pq.read_table(p)
        assert got.equals(want)  # values and schema; only the recorded options differ
        assert pq.ParquetFile(p).metadata.num_row_groups == pq.ParquetFile(ref).metadata.num_row_groups


# ---------------------------------------------------------------------------------------------
# the dense path (poorly separated tables) writes what the search path writes
# ---------------------------------------------------------------------------------------------
def _exact_ties(seed):
    """30 rows repeated exactly under another label: distances 0 and other exact ties that only
    the row order breaks, plus suspect duplicates."""
    base = clustered(seed + 20, identities=15, per=6, spread=1.5)
    rng = np.random.default_rng(seed)
    src = rng.choice(base.n, 30, replace=False)
    labels = np.concatenate([base.labels, (base.labels[src] + rng.integers(1, 15, 30)) % 15])
    X = base.embeddings.astype(np.float64)
    return EmbeddingTable.from_arrays(np.arange(labels.size), labels, np.vstack([X, X[src]]))


@pytest.mark.parametrize("n, d", [(300, 24), (40_000, 3), (5, 1)])
def test_exact_cosine_rows_equals_exact_cosine_bit_for_bit(rng, n, d):
    """The dense twin: every (row, column) value identical to exact_cosine's, across its tiles
    (whole rows when a row is short, column pieces of one row when it is long)."""
    X = rng.standard_normal((n, d))
    X = np.ascontiguousarray(X / np.linalg.norm(X, axis=1, keepdims=True), dtype=np.float32)
    rows = rng.integers(0, n, 9)
    C = exact_cosine_rows(X, rows)
    want = exact_cosine(X, np.repeat(rows, n), np.tile(np.arange(n), rows.size)).reshape(rows.size, n)
    assert C.dtype == np.float64 and C.shape == (rows.size, n)
    assert np.array_equal(C, want)
    assert np.array_equal(exact_cosine_rows(X, rows[3:4], np.ascontiguousarray(X.T)), want[3:4])
    # and close to a float64 matrix product (a different summation order)
    X64 = X.astype(np.float64)
    np.testing.assert_allclose(C, X64[rows] @ X64.T, rtol=0, atol=1e-14)


@pytest.mark.parametrize("distance", ["squared", "euclidean"])
@pytest.mark.parametrize("select", ["hardest", "random", "distance-weighted"])
@pytest.mark.parametrize("data", ["overlapping", "ties", "ties-excluded"])
def test_dense_path_writes_the_same_bytes(seed, tmp_path, monkeypatch, select, distance, data):
    table = clustered(seed + 21, identities=20, per=8, spread=1.5) if data == "overlapping" else _exact_ties(seed)
    opts = dict(regimes=ALL, select=select, distance=distance, margin=0.3 if distance == "squared" else 0.15,
                negatives_per_positive=3, seed=7, exclude_duplicates=data == "ties-excluded")
    outs = {}
    for which in ("search", "dense"):
        force_path(monkeypatch, which)
        out = tmp_path / f"{which}.parquet"
        s = mine(table, out, quiet=True, **opts)
        assert s.details["dense_rows"] == (table.n if which == "dense" else 0)
        outs[which] = (out.read_bytes(), duplicates_path(out).read_bytes(), s.to_dict()["regimes"],
                       s.pairs_without_negative, s.suspect_duplicates)
    assert all(v > 0 for v in outs["search"][2].values())
    if data != "overlapping":
        assert outs["search"][4] >= 30
    assert outs["dense"] == outs["search"]


def test_poorly_separated_table_takes_the_dense_path(seed, tmp_path, monkeypatch):
    # labels unrelated to the vectors: the extreme of a first epoch on a random projection
    rng = np.random.default_rng(seed)
    X, y = rng.standard_normal((600, 8)), rng.integers(0, 30, 600)
    auto = mine((np.arange(600), y, X), tmp_path / "auto.parquet", quiet=True)
    assert auto.details["dense_share"] >= mining._DENSE_SHARE
    assert auto.details["dense_rows"] == 600
    assert auto.details["widened_queries"] == 0
    default = mining._DENSE_SHARE
    force_path(monkeypatch, "search")
    ref = mine((np.arange(600), y, X), tmp_path / "search.parquet", quiet=True)
    assert ref.details["widened_queries"] > 500  # what the dense path saves: nearly every anchor widens
    assert (tmp_path / "auto.parquet").read_bytes() == (tmp_path / "search.parquet").read_bytes()
    # a well separated table stays on the search path; an approximate index always does
    monkeypatch.setattr(mining, "_DENSE_SHARE", default)
    tight = mine(clustered(seed, identities=60, per=10, spread=0.3, family=1), quiet=True)
    assert tight.details["dense_share"] < default
    assert tight.details["dense_rows"] == 0
    ivf = mine((np.arange(600), y, X), index="ivf", quiet=True)
    assert ivf.details["dense_share"] is None and ivf.details["dense_rows"] == 0


def test_row_order_and_invariance_to_row_permutation(seed):
    table = clustered(seed + 13)
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


def test_string_ids_and_labels(seed, tmp_path):
    base = clustered(seed + 14, identities=8, per=5)
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
    table = clustered(seed + 15, identities=8, per=5)
    from tripletkit.tables.embeddings import write_table
    src = tmp_path / "emb.parquet"
    write_table(src, table.ids, table.original_labels(), table.embeddings)
    a = mine(src, quiet=True, return_triplets=True)
    b = mine((table.ids, table.original_labels(), table.embeddings), quiet=True, return_triplets=True)
    assert np.array_equal(a.triplets["negative_id"], b.triplets["negative_id"])
    assert a.out is None and a.duplicates_out is None
    with pytest.raises(TripletkitError, match="overwrite the input"):
        mine(src, src, force=True, quiet=True)


def test_config_object_and_options_override(seed):
    table = clustered(seed + 16, identities=8, per=5)
    cfg = MiningConfig(margin=0.5, regimes=("hard",))
    s = mine(table, config=cfg, quiet=True)
    assert list(s.regimes) == ["hard"]
    s = mine(table, config=cfg, regimes="easy", quiet=True, return_triplets=True)
    assert list(s.regimes) == ["easy"]
    check_every_triplet(table, s, 0.5, "squared")


def test_progress_bar_is_silent_without_a_terminal(seed, capsys):
    mine(clustered(seed + 17, identities=8, per=5), quiet=False)
    assert capsys.readouterr().err == ""


# ---------------------------------------------------------------------------------------------
# approximate indexes report recall
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("kind", ["ivf", "hnsw"])
def test_approximate_index_reports_recall(seed, tmp_path, kind):
    table = clustered(seed + 18, identities=60, per=20, dim=16, spread=0.7)
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
    table = clustered(seed + 19, identities=20, per=10)
    assert mine(table, quiet=True).index == "exact"
    s = mine(table, exact_below=100, quiet=True)
    assert s.index == "ivf" and s.recall is not None


# ---------------------------------------------------------------------------------------------
# errors: one line, no output
# ---------------------------------------------------------------------------------------------
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
    table = clustered(seed, identities=5, per=4)
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
    table = clustered(seed + 20, identities=6, per=4)
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
    import tripletkit.mining as mining
    table = clustered(seed + 21, identities=6, per=4)

    def boom(self, arrays):
        raise KeyboardInterrupt

    monkeypatch.setattr(mining._TripletWriter, "add", boom)
    with pytest.raises(KeyboardInterrupt):
        mine(table, tmp_path / "t.parquet", quiet=True)
    assert list(tmp_path.iterdir()) == []


def test_degenerate_tables_warn(seed, tmp_path):
    X = np.random.default_rng(seed).standard_normal((5, 4))
    with pytest.warns(TripletkitWarning, match="no anchor"):
        s = mine((np.arange(5), np.arange(5), X), tmp_path / "t.parquet", quiet=True)
    assert s.n_triplets == 0 and s.active_fraction is None and s.singletons_skipped == 5
    assert pq.read_table(tmp_path / "t.parquet").num_rows == 0
    with pytest.warns(TripletkitWarning, match="single identity"):
        s = mine((np.arange(5), np.zeros(5, int), X), quiet=True)
    assert s.n_triplets == 0 and s.pairs_without_negative == {"semi-hard": 20, "hard": 20}


# ---------------------------------------------------------------------------------------------
# samplers and small helpers
# ---------------------------------------------------------------------------------------------
def test_floyd_is_uniform_over_subsets(seed):
    from itertools import combinations

    from scipy.stats import chisquare

    m, k, draws = 5, 2, 20_000
    off = _floyd(np.full(draws, m), k, np.uint64(seed), np.arange(draws))
    assert np.all((off >= 0) & (off < m))
    assert np.all(off[:, 0] != off[:, 1])
    subsets = {c: i for i, c in enumerate(combinations(range(m), k))}
    idx = [subsets[tuple(sorted(r))] for r in off.tolist()]
    counts = np.bincount(idx, minlength=len(subsets))
    assert chisquare(counts).pvalue > 1e-3
    # short rows take everything, padded with -1
    assert _floyd(np.array([1, 0]), 3, np.uint64(1), np.arange(2)).tolist() == [[0, -1, -1], [-1, -1, -1]]


def test_uniform_hash_is_uniform_and_counter_driven(seed):
    from scipy.stats import kstest

    u = _uniform(np.uint64(seed), np.arange(50_000), 3)
    assert np.all((u > 0) & (u < 1))
    assert kstest(u, "uniform").pvalue > 1e-3
    assert np.array_equal(u[100:200], _uniform(np.uint64(seed), np.arange(100, 200), 3))
    assert not np.array_equal(u[:100], _uniform(np.uint64(seed + 1), np.arange(100), 3))


def test_hardest_and_random_choose_inside_ranges():
    lo, hi = np.array([0, 3, 3]), np.array([3, 3, 7])
    owner, idx = _choose("hardest", lo, hi, 2, (np.arange(3), 0, 1), (np.uint64(1), np.uint64(2)))
    assert owner.tolist() == [0, 0, 2, 2] and idx.tolist() == [0, 1, 3, 4]
    owner, idx = _choose("random", lo, hi, 2, (np.arange(3), 0, 1), (np.uint64(1), np.uint64(2)))
    assert owner.tolist() == [0, 0, 2, 2]
    assert np.all((idx >= lo[owner]) & (idx < hi[owner]))


@pytest.mark.parametrize("k", [1, 3, 40])
def test_top_in_groups_equals_a_full_sort(rng, k):
    """The k best of each group by (-score, row) equal the head of a lexsort of every entry,
    with tied scores (rounded values, -0.0 against 0.0), -inf entries and groups shorter than k."""
    sizes = rng.integers(1, 30, 200)
    groups = np.repeat(np.arange(sizes.size), sizes)
    rows = np.concatenate([rng.permutation(1000)[:m] for m in sizes])
    score = np.round(rng.standard_normal(groups.size), 1)
    score[rng.random(groups.size) < 0.05] = -0.0
    score[rng.random(groups.size) < 0.05] = -np.inf
    order = np.lexsort((rows, -score, groups))
    order = order[np.isfinite(score[order])]
    want = order[np.concatenate([np.arange(m) for m in np.bincount(groups[order], minlength=sizes.size)]) < k]
    assert np.array_equal(_top_in_groups(groups, score, rows, k), want)
    assert _top_in_groups(groups[:0], score[:0], rows[:0], k).size == 0


def test_count_below_matches_searchsorted(rng):
    values = np.sort(rng.random(50))
    lo = rng.integers(0, 50, 40)
    hi = np.minimum(50, lo + rng.integers(0, 20, 40))
    x = rng.random(40)
    want = [int(np.searchsorted(values[a:b], v, side="left")) for a, b, v in zip(lo, hi, x)]
    assert _count_below(values, lo, hi, x).tolist() == want


def test_example_config_lists_every_mining_key():
    import dataclasses
    import tomllib
    from pathlib import Path

    path = Path(__file__).resolve().parents[1] / "configs" / "mine.toml"
    keys = set(tomllib.loads(path.read_text())["mining"])
    assert keys == {f.name for f in dataclasses.fields(MiningConfig)}
    cfg = load_config(path).mining
    assert cfg.max_per_identity == 20 and cfg.regimes == ("semi-hard", "hard")
