"""Tests of tripletkit.triplet_scores: a triplet table scored on an embedding table."""

import numpy as np
import pytest

from tripletkit._errors import TripletkitError
from tripletkit.losses import DISTANCES, pair_distance, triplet_loss
from tripletkit.mining.regimes import REGIMES, regime_codes
from tripletkit.tables.embeddings import EmbeddingTable
from tripletkit.triplet_scores import score_triplets

VARIANTS = [(d, s) for d in DISTANCES for s in (False, True)]


def _table(rng, ids=None):
    labels = np.repeat(np.array(["north", "reef", "spit"]), 4)
    X = rng.normal(size=(12, 5))
    ids = np.arange(100, 112) if ids is None else ids
    return EmbeddingTable.from_arrays(ids, labels, X), X, labels


def test_score_triplets_matches_triplet_loss(rng):
    table, X, labels = _table(rng)
    a = np.array([0, 1, 4, 5, 8, 9, 0])
    p = np.array([1, 2, 5, 6, 9, 10, 3])
    n = np.array([4, 8, 0, 11, 1, 2, 6])
    for distance, soft in VARIANTS:
        out = score_triplets(table, table.ids[a], table.ids[p], table.ids[n], 0.2, distance, soft)
        assert list(out) == ["triplets", "mean_loss", "active_fraction", "regimes"]
        ref = triplet_loss(X[a], X[p], X[n], 0.2, distance, soft)
        assert out["triplets"] == 7
        # the table stores float32 unit vectors, so agreement is to float32 precision
        assert out["mean_loss"] == pytest.approx(ref.mean(), rel=1e-5)
        codes = regime_codes(pair_distance(X[a], X[p], distance), pair_distance(X[a], X[n], distance), 0.2)
        assert out["regimes"] == {r: int((codes == i).sum()) for i, r in enumerate(REGIMES)}
        assert out["active_fraction"] == pytest.approx(float((codes != 0).mean()))
        assert sum(out["regimes"].values()) == 7
        assert all(type(v) is int for v in out["regimes"].values())


def test_score_triplets_with_string_ids(rng):
    ids = np.array([f"photo-{i:03d}" for i in range(12)], dtype=object)
    table, X, _ = _table(rng, ids)
    out = score_triplets(table, ["photo-000", "photo-004"], ["photo-001", "photo-005"], ["photo-008", "photo-000"])
    ref = triplet_loss(X[[0, 4]], X[[1, 5]], X[[8, 0]])
    assert out["mean_loss"] == pytest.approx(ref.mean(), rel=1e-5)


def test_score_triplets_equals_direct_on_unit_table(rng):
    # when the table's float32 vectors are the input, the score equals triplet_loss exactly
    table, _, _ = _table(rng)
    E = table.embeddings
    a, p, n = np.array([0, 4]), np.array([3, 7]), np.array([9, 10])
    out = score_triplets(table, table.ids[a], table.ids[p], table.ids[n])
    assert out["mean_loss"] == pytest.approx(triplet_loss(E[a], E[p], E[n]).mean(), rel=1e-14)


def test_score_triplets_zero_rows_warns(rng):
    table, _, _ = _table(rng)
    with pytest.warns(RuntimeWarning, match="zero triplets"):
        out = score_triplets(table, np.array([], dtype=np.int64), np.array([], dtype=np.int64),
                             np.array([], dtype=np.int64))
    assert out == {"triplets": 0, "mean_loss": None, "active_fraction": None,
                   "regimes": {"easy": 0, "semi-hard": 0, "hard": 0}}


def test_score_triplets_errors(rng):
    table, _, _ = _table(rng)
    with pytest.raises(TripletkitError, match=r"1 anchor ids are not in the embedding table \(first: 999\)"):
        score_triplets(table, [999], [101], [104])
    with pytest.raises(TripletkitError, match=r"negative ids are not in the embedding table"):
        score_triplets(table, [100], [101], [555])
    with pytest.raises(TripletkitError, match=r"same number of rows, got anchor=2, positive=1, negative=1"):
        score_triplets(table, [100, 101], [101], [104])
    with pytest.raises(TripletkitError, match=r"anchor ids must be a 1-D column of ids, got shape \(1, 1\)"):
        score_triplets(table, [[100]], [101], [104])
    with pytest.raises(TripletkitError, match=r"1 triplets use the same row as anchor and positive \(first: row 0, id 100\)"):
        score_triplets(table, [100], [100], [104])
    with pytest.raises(TripletkitError,
                       match=r"1 of 2 triplets have a wrong positive \(first: row 1, anchor 101 label 'north', "
                             r"positive 104 label 'reef'\); a positive must share the anchor's label"):
        score_triplets(table, [100, 101], [101, 104], [104, 108])
    with pytest.raises(TripletkitError, match=r"wrong negative \(first: row 0, anchor 100 label 'north', "
                                              r"negative 102 label 'north'\); a negative must have a label other"):
        score_triplets(table, [100], [101], [102])
    with pytest.raises(TripletkitError, match="margin must be a finite number >= 0"):
        score_triplets(table, [100], [101], [104], margin=-0.1)


