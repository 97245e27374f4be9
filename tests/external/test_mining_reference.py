"""tripletkit.mining (the miner, its index and its samplers) against outside references.

Each test names its source in a comment: scikit-learn's NearestNeighbors as an independent nearest
neighbour implementation, scipy's distance functions, the regime definitions of FaceNet, and the
distance distribution on the sphere that distance-weighted sampling (Wu et al. 2017) inverts.
"""

import numpy as np
import pytest
from scipy import stats
from scipy.spatial.distance import cdist
from sklearn.datasets import load_digits
from sklearn.neighbors import NearestNeighbors

from tripletkit.mining import mine
from tripletkit.mining.index import build_index
from tripletkit.mining.regimes import REGIMES
from tripletkit.mining.select import choose, distance_log_weights
from tripletkit.tables.embeddings import EmbeddingTable


@pytest.fixture
def digits():
    """The handwritten digits bundled with scikit-learn (1,797 rows x 64, 10 classes)."""
    d = load_digits()
    return EmbeddingTable.from_arrays(np.arange(d.target.size), d.target, d.data + 1e-3)


def test_exact_index_neighbours_agree_with_sklearn(digits):
    # Reference: sklearn.neighbors.NearestNeighbors(metric="cosine", algorithm="brute"), an
    # independent brute-force k-NN; cosine distance = 1 - cos, so the orders must agree.
    X = digits.embeddings
    X64 = X.astype(np.float64)
    k = 12
    D, I = build_index(X, "exact").search(X, k)
    ref = NearestNeighbors(n_neighbors=k, metric="cosine", algorithm="brute").fit(X64)
    dist, ind = ref.kneighbors(X64)
    np.testing.assert_allclose(1.0 - D, dist, atol=2e-6)
    # our neighbours are exactly as near as sklearn's (row order may differ only inside ties)
    ours = 1.0 - np.einsum("id,ikd->ik", X64, X64[I])
    np.testing.assert_allclose(ours, dist, atol=1e-6)
    same = np.mean([set(a) == set(b) for a, b in zip(I.tolist(), ind.tolist())])
    assert same > 0.995


def test_widened_search_agrees_with_sklearn_radius_neighbours(digits):
    # Reference: sklearn NearestNeighbors.radius_neighbors(metric="cosine"): rows within cosine
    # distance r, i.e. cosine >= 1 - r. Our within() starts from only 5 neighbours and must widen.
    X = digits.embeddings
    X64 = X.astype(np.float64)
    rows = np.arange(0, X.shape[0], 9)
    r = 0.08
    nb = build_index(X, "exact").within(X[rows], np.full(rows.size, 1.0 - r), 5)
    assert nb.widened > 0
    ref = NearestNeighbors(metric="cosine", algorithm="brute").fit(X64)
    _, inner = ref.radius_neighbors(X64[rows], radius=r - 1e-6)
    _, outer = ref.radius_neighbors(X64[rows], radius=r + 1e-5)  # + the float32 safety band
    sizes = []
    for i in range(rows.size):
        got = set(nb.rows[nb.lims[i]:nb.lims[i + 1]].tolist())
        assert set(inner[i].tolist()) <= got <= set(outer[i].tolist())
        sizes.append(len(inner[i]))
    assert max(sizes) > 5  # the radius reaches beyond the first 5 neighbours


@pytest.mark.parametrize("distance, metric", [("squared", "sqeuclidean"), ("euclidean", "euclidean")])
def test_stored_distances_agree_with_scipy_cdist(digits, distance, metric):
    # Reference: scipy.spatial.distance.cdist on the unit rows (sqeuclidean = ||a - b||^2).
    s = mine(digits, regimes=("easy", "semi-hard", "hard"), distance=distance, positives_per_anchor=2,
             quiet=True, return_triplets=True)
    tr = s.triplets
    U = digits.embeddings.astype(np.float64)
    d_ap = cdist(U[tr["anchor"]][:2000], U[tr["positive"]][:2000], metric).diagonal()
    d_an = cdist(U[tr["anchor"]][:2000], U[tr["negative"]][:2000], metric).diagonal()
    np.testing.assert_allclose(tr["d_ap"][:2000], d_ap, atol=2e-6)
    np.testing.assert_allclose(tr["d_an"][:2000], d_an, atol=2e-6)


def test_facenet_regimes_on_a_hand_computed_example():
    # Source: Schroff, Kalenichenko, Philbin, "FaceNet", CVPR 2015, Sec. 3.2: semi-hard negatives
    # are farther from the anchor than the positive but still inside the margin,
    # ||f(a)-f(p)||^2 < ||f(a)-f(n)||^2 < ||f(a)-f(p)||^2 + alpha; closer ones are hard.
    # Hand-computed: on the unit circle, squared distance = 2 - 2 cos(angle).
    # anchor at 0 deg, positive at 60 deg: d_ap = 2 - 2 * 0.5 = 1.0; margin 0.2.
    # negatives: cos 0.75 -> d 0.5 (hard); cos 0.45 -> d 1.1 (semi-hard); cos 0.25 -> d 1.5 (easy).
    ang = np.arccos([1.0, 0.5, 0.75, 0.45, 0.25])
    X = np.stack([np.cos(ang), np.sin(ang)], axis=1)
    labels = np.array([0, 0, 1, 2, 3])
    s = mine((np.arange(5), labels, X), regimes=("easy", "semi-hard", "hard"), margin=0.2, select="hardest",
             quiet=True, return_triplets=True)
    tr = s.triplets
    first = tr["anchor"] == 0
    got = {REGIMES[r]: (int(n), float(d)) for n, d, r in zip(tr["negative"][first], tr["d_an"][first],
                                                              tr["regime"][first])}
    assert got["hard"][0] == 2 and got["hard"][1] == pytest.approx(0.5, abs=1e-6)
    assert got["semi-hard"][0] == 3 and got["semi-hard"][1] == pytest.approx(1.1, abs=1e-6)
    assert got["easy"][0] == 4 and got["easy"][1] == pytest.approx(1.5, abs=1e-6)
    assert np.all(tr["d_ap"][first] == pytest.approx(1.0, abs=1e-6))


@pytest.mark.parametrize("n", [3, 8, 32])
def test_distance_density_matches_the_beta_law_on_the_sphere(n):
    # Source: for x, y uniform on the unit sphere in R^n, t = (1 + cos(x, y)) / 2 follows
    # Beta((n-1)/2, (n-1)/2) (the marginal of one coordinate of a uniform point on the sphere has
    # density proportional to (1 - t^2)^((n-3)/2); from memory, see e.g. Cai, Fan & Jiang, JMLR
    # 2013). With d = ||x - y|| = 2 sqrt(1 - t), the density of d is beta.pdf(1 - d^2/4) * d / 2;
    # Wu et al. (ICCV 2017) write it as q(d) ∝ d^(n-2) (1 - d^2/4)^((n-3)/2). Their ratio must be
    # constant in d.
    d = np.linspace(0.2, 1.9, 30)
    ref = stats.beta.pdf(1 - d ** 2 / 4, (n - 1) / 2, (n - 1) / 2) * d / 2
    # distance_log_weights is log min(lambda, 1/q); with a cut-off below the grid it is -log q
    ours = np.exp(-distance_log_weights(d, n, cutoff=1e-9))
    ratio = ours / ref
    np.testing.assert_allclose(ratio, ratio[0], rtol=1e-9)
    # and the same density describes sampled points (scipy KS test on 4,000 seeded pairs)
    rng = np.random.default_rng(7)
    x = rng.standard_normal((4000, n))
    y = rng.standard_normal((4000, n))
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    y /= np.linalg.norm(y, axis=1, keepdims=True)
    dist = np.linalg.norm(x - y, axis=1)
    cdf = lambda v: stats.beta.sf(1 - np.minimum(v, 2) ** 2 / 4, (n - 1) / 2, (n - 1) / 2)  # noqa: E731
    assert stats.kstest(dist, cdf).pvalue > 1e-3


def test_distance_weighted_draws_follow_the_target_weights():
    # Source: Wu et al., ICCV 2017, Sec. 4: Pr(n | a) ∝ min(lambda, q(d_an)^-1). Reference test:
    # scipy.stats.chisquare of the counts of 40,000 seeded single draws over 12 candidates against
    # the normalised weights. dim 10 keeps the weights within a factor ~100 of each other.
    dim = 10
    d = np.linspace(0.3, 1.8, 12)  # Euclidean distances; 0.3 is below the cut-off 0.5
    logw = distance_log_weights(d, dim, cutoff=0.5)
    p = np.exp(logw - logw.max())
    p /= p.sum()
    draws = 40_000
    lo = np.zeros(draws, dtype=np.int64)
    hi = np.full(draws, d.size, dtype=np.int64)
    owner, idx = choose("distance-weighted", lo, hi, 1, (np.arange(draws), 0, 1),
                        (np.uint64(11), np.uint64(12)), rows=np.arange(d.size), logw=logw)
    assert np.array_equal(owner, np.arange(draws))
    counts = np.bincount(idx, minlength=d.size)
    assert stats.chisquare(counts, draws * p).pvalue > 1e-3
    # the test has power: the same counts are far from uniform
    assert stats.chisquare(counts).pvalue < 1e-12
    # the cut-off caps the weights: the two distances below 0.5 weigh the same as 0.5 would
    assert logw[0] == pytest.approx(distance_log_weights(0.5, dim, 0.5))
