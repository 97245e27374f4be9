"""Tests of tripletkit.metrics.clustering: toy tables by hand, k-means behaviour, errors."""

import numpy as np
import pytest

from tripletkit._errors import TripletkitError, TripletkitWarning
from tripletkit.metrics import clustering as C
from _support import clustered_rows


def blobs(rng, k, per, d=16, noise=0.05):
    """``k`` identities of ``per`` rows each, in order."""
    return clustered_rows(rng, k * per, d, k, noise, labels=np.repeat(np.arange(k), per))


def test_contingency_by_hand():
    rows, cols, counts, ca, cb = C.contingency(["a", "a", "b", "b", "b"], [0, 1, 1, 1, 0])
    cells = {(int(r), int(c)): int(n) for r, c, n in zip(rows, cols, counts)}
    assert cells == {(0, 0): 1, (0, 1): 1, (1, 0): 1, (1, 1): 2}
    assert ca.tolist() == [2, 3] and cb.tolist() == [2, 3]


def test_scores_by_hand():
    # classes a a b b, clusters 0 0 0 1: purity (2 + 1) / 4; Rand index: pairs agreeing:
    # (0,1) same/same, (2,3) same class/different cluster -> disagree, (0,2),(1,2) diff/same ->
    # disagree, (0,3),(1,3) diff/diff -> agree: 3 of 6
    t, p = ["a", "a", "b", "b"], [0, 0, 0, 1]
    assert C.purity(t, p) == 0.75
    assert C.rand_index(t, p) == 0.5
    # identical partitions up to renaming
    assert C.nmi(t, ["x", "x", "y", "y"]) == pytest.approx(1.0)
    assert C.ari(t, ["x", "x", "y", "y"]) == 1.0
    # one block each: perfect by convention
    assert C.nmi([1, 1, 1], [5, 5, 5]) == 1.0 and C.ari([1, 1, 1], [5, 5, 5]) == 1.0


def test_scores_are_symmetric_where_they_should_be(rng):
    a, b = rng.integers(0, 5, 200), rng.integers(0, 7, 200)
    assert C.nmi(a, b) == pytest.approx(C.nmi(b, a), abs=1e-12)
    assert C.ari(a, b) == pytest.approx(C.ari(b, a), abs=1e-12)
    assert C.rand_index(a, b) == pytest.approx(C.rand_index(b, a), abs=1e-12)


def test_separated_identities_are_recovered(rng):
    # random initialisation can merge two blobs; restarts keep the best objective
    x, labels = blobs(rng, 5, 20)
    out = C.clustering_metrics(x, labels, seed=1, nredo=10)
    assert out["clusters"] == 5
    assert out["purity"] == 1.0 and out["nmi"] == pytest.approx(1.0) and out["ari"] == pytest.approx(1.0)


def test_kmeans_is_seeded_and_in_range(rng):
    x, labels = blobs(rng, 10, 8, noise=0.6)
    a = C.spherical_kmeans(x, 10, seed=3)
    b = C.spherical_kmeans(x, 10, seed=3)
    assert np.array_equal(a, b) and a.dtype == np.int64
    assert a.min() >= 0 and a.max() < 10 and a.shape == (80,)


def test_nearest_centroid_equals_brute_force_over_exact_cosines(rng):
    # brute-force twin: argmax of the exact cosines (a float64 product of the snapped rows),
    # ties to the lower centroid; centroids 3 and 4 differ only in float32 noise, so the
    # float32 pre-selection cannot tell them apart and must widen
    from tripletkit._exact import snap

    x, _ = blobs(rng, 6, 30, noise=0.8)
    c = x[[0, 40, 80, 100, 100, 150]].copy()
    c[4] += np.float32(3e-8) * rng.standard_normal(c.shape[1]).astype(np.float32)
    c /= np.linalg.norm(c, axis=1, keepdims=True)
    near = x[0] + np.float32(3e-8) * rng.standard_normal((6, x.shape[1])).astype(np.float32)
    near /= np.linalg.norm(near, axis=1, keepdims=True)  # six centroids within float32 noise
    for cents in (c, near):
        assign, score = C._nearest(x, snap(x), cents, chunk=37)
        exact = snap(x) @ snap(cents).T
        assert np.array_equal(assign, np.argmax(exact, axis=1))
        assert np.array_equal(score, exact.max(axis=1))


def test_kmeans_ends_at_a_fixed_point(rng):
    # Lloyd's fixed point (Dhillon and Modha 2001): every row sits with its nearest centroid and
    # every centroid is its rows' re-normalised mean
    x, labels = blobs(rng, 6, 15, noise=0.7)
    assign = C.spherical_kmeans(x, 6, seed=4, niter=200)
    means = np.stack([x[assign == j].astype(np.float64).sum(axis=0) for j in range(6)])
    means /= np.linalg.norm(means, axis=1, keepdims=True)
    again, _ = C._nearest(x, C.snap(x), means.astype(np.float32))
    assert np.array_equal(again, assign)


def test_relabelling_identities_changes_nothing(rng):
    x, labels = blobs(rng, 8, 10, noise=0.5)
    a = C.clustering_metrics(x, labels, seed=2)
    b = C.clustering_metrics(x, np.array([f"seal-{v}" for v in labels]), seed=2)
    assert a == b


def test_one_identity_warns():
    x = np.eye(3, dtype=np.float32)
    with pytest.warns(TripletkitWarning, match="clustering: fewer than 2 identities"):
        out = C.clustering_metrics(x, [4, 4, 4])
    assert out["nmi"] is None and out["clusters"] == 1


def test_errors():
    with pytest.raises(TripletkitError, match="same number of rows"):
        C.purity([1, 2, 3], [1, 2])
    with pytest.raises(TripletkitError, match="are empty"):
        C.nmi([], [])
    with pytest.raises(TripletkitError, match="k must be a whole number between 1 and the 3 rows"):
        C.spherical_kmeans(np.eye(3, dtype=np.float32), 4)
