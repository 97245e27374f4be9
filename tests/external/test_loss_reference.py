"""tripletkit.losses against outside references: the published loss definitions, scipy and
scikit-learn implementations of the pieces, and a dataset bundled with scikit-learn.

Each test names its source in a comment.
"""

import numpy as np
import pytest
import scipy.differentiate
import scipy.special
from scipy.spatial.distance import cdist
from sklearn.datasets import load_digits
from sklearn.metrics.pairwise import (
    cosine_similarity,
    euclidean_distances,
    paired_cosine_distances,
    paired_euclidean_distances,
)
from sklearn.preprocessing import normalize

from tripletkit.batch_losses import batch_all_loss, batch_hard_loss
from tripletkit.losses import pair_distance, triplet_loss, triplet_loss_grad
from tripletkit.mining.regimes import regime_of

FACENET_MARGIN = 0.2  # Schroff et al., FaceNet, CVPR 2015: "the margin alpha is set to 0.2"


def test_facenet_hinge_definition(rng):
    # Schroff, Kalenichenko, Philbin, "FaceNet", CVPR 2015, Sec. 3.1: embeddings live on the unit
    # hypersphere; the constraint (eq. 1) is ||f(a)-f(p)||^2 + alpha < ||f(a)-f(n)||^2 and the loss
    # (eq. 2) sums [||f(a)-f(p)||^2 - ||f(a)-f(n)||^2 + alpha]_+ (equation numbers from memory).
    # Distances here come from scipy's sqeuclidean on scikit-learn-normalised rows.
    A, P, N = (rng.normal(size=(400, 16)) for _ in range(3))
    ua, up, un = normalize(A), normalize(P), normalize(N)
    d_ap = np.diag(cdist(ua, up, "sqeuclidean"))
    d_an = np.diag(cdist(ua, un, "sqeuclidean"))
    expected = np.maximum(d_ap - d_an + FACENET_MARGIN, 0.0)
    got = triplet_loss(A, P, N, margin=FACENET_MARGIN)
    np.testing.assert_allclose(got, expected, rtol=1e-10, atol=1e-12)
    assert np.all(got >= 0)  # a hinge is never negative
    satisfied = d_an >= d_ap + FACENET_MARGIN  # the constraint holds (up to its boundary)
    assert satisfied.any() and (~satisfied).any()
    assert np.all(got[satisfied] == 0.0)
    assert np.all(got[~satisfied] > 0.0)
    # the regime labels follow DESIGN.md: easy exactly where the constraint holds
    assert np.array_equal(regime_of(pair_distance(A, P), pair_distance(A, N), FACENET_MARGIN) == "easy",
                          got == 0.0)


def test_squared_distance_is_two_minus_two_cosine_sklearn(rng):
    # ||a - b||^2 = 2 - 2 cos(a, b) on unit vectors (expansion of the square, stated in
    # Schroff et al. 2015 as the squared L2 distance on the hypersphere); cos from scikit-learn's
    # cosine_similarity, and scikit-learn's paired_cosine_distances = (1 - cos) = ||u - v||^2 / 2.
    a, b = rng.normal(size=(300, 32)), rng.normal(size=(300, 32))
    cos = np.diag(cosine_similarity(a, b))
    np.testing.assert_allclose(pair_distance(a, b), 2.0 - 2.0 * cos, atol=1e-12)
    np.testing.assert_allclose(pair_distance(a, b), 2.0 * paired_cosine_distances(a, b), atol=1e-12)
    np.testing.assert_allclose(pair_distance(a, b, "euclidean"),
                               paired_euclidean_distances(normalize(a), normalize(b)), atol=1e-12)


def test_soft_margin_is_softplus_scipy(rng):
    # Hermans, Beyer, Leibe, arXiv:1703.07737, 2017: the soft margin replaces [m + x]_+ by the
    # softplus ln(1 + exp(x)), x = d_ap - d_an. scipy: ln(1 + exp(x)) = -log_expit(-x).
    A, P, N = (rng.normal(size=(200, 5)) for _ in range(3))
    for distance in ("squared", "euclidean"):
        x = pair_distance(A, P, distance) - pair_distance(A, N, distance)
        np.testing.assert_allclose(triplet_loss(A, P, N, distance=distance, soft=True),
                                   -scipy.special.log_expit(-x), rtol=1e-13)


def test_soft_margin_gradient_against_scipy_differentiate(rng):
    # High-order adaptive finite differences from scipy.differentiate.derivative (an outside
    # reference implementation) on the smooth soft-margin loss, through the L2 normalisation.
    A, P, N = (rng.normal(size=(4, 3)) for _ in range(3))
    _, ga, gp, gn = triplet_loss_grad(A, P, N, distance="euclidean", soft=True, reduction="sum")

    for which, grad in ((0, ga), (1, gp), (2, gn)):
        for i, j in np.ndindex(A.shape):
            def f(t, which=which, i=i, j=j):
                out = np.empty(np.shape(t))
                for k, value in np.ndenumerate(np.asarray(t)):
                    arrays = [A.copy(), P.copy(), N.copy()]
                    arrays[which][i, j] = value
                    out[k] = triplet_loss(*arrays, distance="euclidean", soft=True).sum()
                return out

            x0 = (A, P, N)[which][i, j]
            res = scipy.differentiate.derivative(f, x0, initial_step=1e-2)
            assert res.success
            assert grad[i, j] == pytest.approx(res.df, rel=1e-8, abs=1e-10)


def _digits_batch(per_class=4):
    # scikit-learn's bundled digits (8x8 images, 10 classes): a real labelled batch of
    # per_class images of each digit, pixels as raw vectors.
    X, y = load_digits(return_X_y=True)
    rows = np.concatenate([np.flatnonzero(y == c)[:per_class] for c in range(10)])
    return X[rows], y[rows]


@pytest.mark.parametrize("distance", ["squared", "euclidean"])
def test_batch_hard_on_digits_against_sklearn_distances(distance):
    # Hermans et al. 2017, batch-hard: for each anchor, max over positives and min over negatives
    # of the distance, then the hinge with margin m; averaged over anchors. Distances from
    # scikit-learn's euclidean_distances on normalised rows.
    X, y = _digits_batch()
    U = normalize(X)
    D = euclidean_distances(U, squared=(distance == "squared"))
    same = y[:, None] == y[None, :]
    pos = same & ~np.eye(len(y), dtype=bool)
    hardest_pos = np.where(pos, D, -np.inf).max(axis=1)
    hardest_neg = np.where(~same, D, np.inf).min(axis=1)
    expected = np.maximum(hardest_pos - hardest_neg + 0.2, 0.0)
    res = batch_hard_loss(X, y, 0.2, distance)
    assert res.triplets == len(y)
    assert res.loss == pytest.approx(expected.mean(), rel=1e-9)
    assert res.active == int((expected > 0).sum())


@pytest.mark.parametrize("distance", ["squared", "euclidean"])
def test_batch_all_on_digits_against_sklearn_distances(distance):
    # Hermans et al. 2017, batch-all: every (a, p, n) with a != p of one identity and n of another;
    # they report the plain mean and the mean over non-zero terms ("BA != 0").
    X, y = _digits_batch()
    U = normalize(X)
    D = euclidean_distances(U, squared=(distance == "squared"))
    same = y[:, None] == y[None, :]
    pos = same & ~np.eye(len(y), dtype=bool)
    valid = pos[:, :, None] & ~same[:, None, :]
    terms = np.maximum(D[:, :, None] - D[:, None, :] + 0.2, 0.0)[valid]
    res = batch_all_loss(X, y, 0.2, distance)
    assert res.triplets == terms.size == 10 * 4 * 3 * 36
    assert res.loss == pytest.approx(terms.mean(), rel=1e-9)
    assert res.loss_active == pytest.approx(terms[terms > 0].mean(), rel=1e-9)
    assert res.active == int((terms > 0).sum())
