"""Tests of tripletkit.losses: hand-computed cases, brute-force twins, finite differences, invariances,
and every error message. Checks against outside references live in tests/external/test_loss_reference.py.
"""

import itertools
import math

import numpy as np
import pytest

from tripletkit._errors import TripletkitError
from tripletkit.losses import (
    DISTANCES,
    BatchLoss,
    batch_all_loss,
    batch_hard_loss,
    pair_distance,
    triplet_loss,
    triplet_loss_grad,
)
from tripletkit.mining.regimes import REGIMES, regime_codes, regime_of

VARIANTS = [(d, s) for d in DISTANCES for s in (False, True)]


# -- helpers: slow, obvious twins --------------------------------------------------------------
def _unit(x):
    x = np.asarray(x, dtype=np.float64)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def _dist(u, v, distance):
    sq = float(np.sum((u - v) ** 2))
    return sq if distance == "squared" else math.sqrt(sq)


def _term(d_ap, d_an, margin, soft):
    if soft:
        return math.log1p(math.exp(d_ap - d_an))
    return max(0.0, d_ap - d_an + margin)


def _brute_batch_all(X, labels, margin, distance, soft):
    u = _unit(X)
    losses = []
    for a, p, n in itertools.product(range(len(u)), repeat=3):
        if a != p and labels[a] == labels[p] and labels[n] != labels[a]:
            d_ap, d_an = _dist(u[a], u[p], distance), _dist(u[a], u[n], distance)
            losses.append((_term(d_ap, d_an, margin, soft), d_ap - d_an + margin > 0, (a, p, n)))
    return losses


def _brute_batch_hard(X, labels, margin, distance, soft):
    u = _unit(X)
    out = []
    for a in range(len(u)):
        best_p, best_n = None, None
        for j in range(len(u)):
            d = _dist(u[a], u[j], distance)
            if j != a and labels[j] == labels[a] and (best_p is None or d > best_p[0]):
                best_p = (d, j)
            if labels[j] != labels[a] and (best_n is None or d < best_n[0]):
                best_n = (d, j)
        if best_p is not None and best_n is not None:
            out.append((_term(best_p[0], best_n[0], margin, soft), best_p[0] - best_n[0] + margin > 0,
                        (a, best_p[1], best_n[1])))
    return out


def _central_diff(f, X, eps=1e-6):
    g = np.zeros_like(X)
    for idx in np.ndindex(X.shape):
        up, down = X.copy(), X.copy()
        up[idx] += eps
        down[idx] -= eps
        g[idx] = (f(up) - f(down)) / (2 * eps)
    return g


def _labelled_batch(rng, n=10, d=4, k=3):
    X = rng.normal(size=(n, d)) * rng.uniform(0.5, 3.0, size=(n, 1))
    labels = rng.integers(0, k, size=n)
    return X, labels


def _far_from_kinks(X, labels, margin, distance, hard_only, gap=1e-4):
    """True when no used triplet sits within ``gap`` of the hinge kink and, for batch-hard, no
    anchor has a near-tie for its hardest positive or negative (finite differences need that)."""
    if hard_only:
        terms = _brute_batch_hard(X, labels, margin, distance, False)
        u = _unit(X)
        for a in range(len(u)):
            d = np.array([_dist(u[a], u[j], distance) for j in range(len(u))])
            same = (labels == labels[a]) & (np.arange(len(u)) != a)
            for group, pick in ((same, np.sort), (labels != labels[a], np.sort)):
                vals = pick(d[group])
                if len(vals) > 1 and np.min(np.diff(vals)) < gap:
                    return False
    else:
        terms = _brute_batch_all(X, labels, margin, distance, False)
    u = _unit(X)
    for _, _, (a, p, n) in terms:
        if abs(_dist(u[a], u[p], distance) - _dist(u[a], u[n], distance) + margin) < gap:
            return False
    return True


def _draw_smooth_batch(rng, margin, distance, hard_only, n=9, d=3, k=3):
    for _ in range(50):
        X, labels = _labelled_batch(rng, n, d, k)
        if _far_from_kinks(X, labels, margin, distance, hard_only):
            return X, labels
    raise RuntimeError("could not draw a batch away from the hinge kinks")  # test-data failure


# -- hand-computed example: 2-D unit vectors at chosen angles ---------------------------------
def _at(deg, radius=1.0):
    r = math.radians(deg)
    return [radius * math.cos(r), radius * math.sin(r)]


def test_hand_computed_angles_squared():
    # anchor at 0 deg, positive at 60 deg: d_ap = 2 - 2 cos 60 = 1.
    # negatives at 30, 65, 90 deg: d_an = 2 - 2 cos(theta) = 0.26794919, 1.15476348, 2.
    # margin 0.2: hinge = 1 - d_an + 0.2 = 0.93205081 (hard), 0.04523652 (semi-hard), 0 (easy).
    # Raw vectors get radii 3, 0.5, 2 to exercise the normalisation.
    A = np.array([_at(0, 3.0)] * 3)
    P = np.array([_at(60, 0.5)] * 3)
    N = np.array([_at(30, 2.0), _at(65, 2.0), _at(90, 2.0)])
    np.testing.assert_allclose(pair_distance(A, P), [1.0, 1.0, 1.0], rtol=1e-12)
    np.testing.assert_allclose(pair_distance(A, N), [0.2679491924311227, 1.1547634765186010, 2.0], rtol=1e-12)
    np.testing.assert_allclose(triplet_loss(A, P, N, margin=0.2),
                               [0.9320508075688773, 0.0452365234813990, 0.0], rtol=1e-11, atol=1e-15)
    assert regime_of(pair_distance(A, P), pair_distance(A, N), 0.2).tolist() == ["hard", "semi-hard", "easy"]
    # soft margin: log(1 + exp(1 - d_an)) = 1.12471547, 0.61875643, log(1 + e^-1) = 0.31326169
    np.testing.assert_allclose(triplet_loss(A, P, N, soft=True),
                               [1.1247154719110697, 0.6187564258255531, 0.3132616875182229], rtol=1e-12)


def test_hand_computed_angles_euclidean():
    # Euclidean chord lengths: d = 2 sin(theta / 2): d_ap = 2 sin 30 = 1,
    # d_an = 2 sin 15 = 0.51763809, 2 sin 32.5 = 1.07459922, sqrt(2) = 1.41421356.
    # margin 0.2: hinge 0.68236191 (hard), 0.12540078 (semi-hard: 1 <= 1.0746 < 1.2), 0 (easy).
    A = np.array([_at(0)] * 3)
    P = np.array([_at(60)] * 3)
    N = np.array([_at(30), _at(65), _at(90)])
    np.testing.assert_allclose(pair_distance(A, N, "euclidean"),
                               [0.5176380902050415, 1.0745992166936478, 1.4142135623730951], rtol=1e-12)
    np.testing.assert_allclose(triplet_loss(A, P, N, 0.2, "euclidean"),
                               [0.6823619097949585, 0.1254007833063522, 0.0], rtol=1e-11, atol=1e-15)
    codes = regime_codes(pair_distance(A, P, "euclidean"), pair_distance(A, N, "euclidean"), 0.2)
    assert codes.dtype == np.int8
    assert [REGIMES[c] for c in codes] == ["hard", "semi-hard", "easy"]


def test_exact_boundaries_on_vectors():
    # Axis-aligned vectors give exact distances: anchor (2, 0) and positive (0, 5) -> d_ap = 2.
    # Negative (0, -1): d_an = 2 == d_ap -> semi-hard, hinge = margin exactly.
    # Negative (-3, 0): d_an = 4 == d_ap + 2 -> with margin 2 exactly on the easy boundary, hinge 0.
    A = np.array([[2.0, 0.0], [2.0, 0.0]])
    P = np.array([[0.0, 5.0], [0.0, 5.0]])
    N = np.array([[0.0, -1.0], [-3.0, 0.0]])
    d_ap, d_an = pair_distance(A, P), pair_distance(A, N)
    assert d_ap.tolist() == [2.0, 2.0] and d_an.tolist() == [2.0, 4.0]
    assert regime_of(d_ap, d_an, margin=2.0).tolist() == ["semi-hard", "easy"]
    assert triplet_loss(A, P, N, margin=2.0).tolist() == [2.0, 0.0]
    assert triplet_loss(A, P, N, margin=0.25).tolist() == [0.25, 0.0]
    # The kink itself gets subgradient 0 (documented): loss 0, no gradient.
    value, ga, gp, gn = triplet_loss_grad(A[1:], P[1:], N[1:], margin=2.0)
    assert value == 0.0 and not ga.any() and not gp.any() and not gn.any()


def test_easy_regime_is_exactly_zero_hinge(rng):
    A, P, N = (rng.normal(size=(2000, 3)) for _ in range(3))
    for distance in DISTANCES:
        codes = regime_codes(pair_distance(A, P, distance), pair_distance(A, N, distance), 0.2)
        loss = triplet_loss(A, P, N, 0.2, distance)
        assert set(np.unique(codes)) == {0, 1, 2}
        np.testing.assert_array_equal(codes == 0, loss == 0.0)
        assert np.all(loss[codes == 2] > 0.2)  # hard: d_ap - d_an > 0, so loss > margin
        assert np.all(loss[codes == 1] <= 0.2)


def test_squared_distance_identity_on_unit_vectors(rng):
    # ||a - b||^2 = 2 - 2 cos(a, b) for unit vectors (expand the square; DESIGN.md).
    a, b = _unit(rng.normal(size=(500, 16))), _unit(rng.normal(size=(500, 16)))
    cos = np.sum(a * b, axis=1)
    np.testing.assert_allclose(pair_distance(a, b), 2.0 - 2.0 * cos, rtol=0, atol=1e-13)
    np.testing.assert_allclose(pair_distance(a, b, "euclidean") ** 2, 2.0 - 2.0 * cos, rtol=0, atol=1e-13)
    d = pair_distance(a, b)
    assert np.all((d >= 0) & (d <= 4))


def test_pair_distance_of_identical_directions_is_zero():
    x = np.array([[1.0, 2.0, 2.0]])
    assert pair_distance(x, 3 * x).tolist() == [0.0]
    assert pair_distance(x, 3 * x, "euclidean").tolist() == [0.0]


def test_loss_is_zero_on_easy_and_never_negative(rng):
    # Schroff et al., FaceNet, CVPR 2015, Sec. 3.1: the hinge is zero once the constraint
    # d_ap + alpha < d_an holds and positive otherwise; margin 0.2 as in the paper.
    # (The outside-reference version of this check is in tests/external.)
    A = rng.normal(size=(300, 8))
    P = A + 0.05 * rng.normal(size=A.shape)  # close to the anchor
    N = -A + 0.05 * rng.normal(size=A.shape)  # nearly opposite: d_an close to 4
    assert np.all(triplet_loss(A, P, N, 0.2) == 0.0)
    Z = rng.normal(size=(3, 300, 8))
    for distance, soft in VARIANTS:
        assert np.all(triplet_loss(*Z, 0.2, distance, soft) >= 0)


# -- gradients against central finite differences ---------------------------------------------
def _smooth_triplets(rng, n, d, margin, distance):
    for _ in range(50):
        A, P, N = (rng.normal(size=(n, d)) * rng.uniform(0.5, 3.0, size=(n, 1)) for _ in range(3))
        v = pair_distance(A, P, distance) - pair_distance(A, N, distance) + margin
        if np.min(np.abs(v)) > 1e-4 and (v > 0).any() and (v < 0).any():
            return A, P, N
    raise RuntimeError("could not draw triplets away from the hinge kink")  # test-data failure


@pytest.mark.parametrize("distance,soft", VARIANTS)
@pytest.mark.parametrize("reduction", ["mean", "sum"])
def test_triplet_grad_matches_finite_differences(rng, distance, soft, reduction):
    A, P, N = _smooth_triplets(rng, 6, 4, 0.5, distance)
    value, ga, gp, gn = triplet_loss_grad(A, P, N, 0.5, distance, soft, reduction)
    loss = triplet_loss(A, P, N, 0.5, distance, soft)
    assert value == pytest.approx(loss.mean() if reduction == "mean" else loss.sum(), rel=1e-12)
    f = [lambda Z: triplet_loss_grad(Z, P, N, 0.5, distance, soft, reduction)[0],
         lambda Z: triplet_loss_grad(A, Z, N, 0.5, distance, soft, reduction)[0],
         lambda Z: triplet_loss_grad(A, P, Z, 0.5, distance, soft, reduction)[0]]
    for fn, X, g in zip(f, (A, P, N), (ga, gp, gn)):
        np.testing.assert_allclose(g, _central_diff(fn, X), rtol=1e-5, atol=1e-8)
    assert np.abs(ga).max() > 1e-3  # the check is not vacuous


@pytest.mark.parametrize("distance,soft", VARIANTS)
def test_triplet_grad_reduction_none_is_per_row(rng, distance, soft):
    A, P, N = _smooth_triplets(rng, 5, 3, 0.3, distance)
    losses, ga, gp, gn = triplet_loss_grad(A, P, N, 0.3, distance, soft, "none")
    np.testing.assert_allclose(losses, triplet_loss(A, P, N, 0.3, distance, soft), rtol=1e-14)
    total, sa, sp, sn = triplet_loss_grad(A, P, N, 0.3, distance, soft, "sum")
    assert total == pytest.approx(losses.sum(), rel=1e-14)
    for g, s in ((ga, sa), (gp, sp), (gn, sn)):
        np.testing.assert_allclose(g, s, rtol=1e-14)
    # row i of each gradient is the gradient of loss i alone
    for i in range(len(A)):
        _, gi, _, _ = triplet_loss_grad(A[i:i + 1], P[i:i + 1], N[i:i + 1], 0.3, distance, soft, "sum")
        np.testing.assert_allclose(ga[i], gi[0], rtol=1e-13, atol=1e-16)


@pytest.mark.parametrize("distance,soft", VARIANTS)
@pytest.mark.parametrize("average", ["all", "active"])
def test_batch_all_grad_matches_finite_differences(rng, distance, soft, average):
    X, labels = _draw_smooth_batch(rng, 0.5, distance, hard_only=False)
    res = batch_all_loss(X, labels, 0.5, distance, soft, average=average)
    assert 0 < res.active < res.triplets
    g = _central_diff(lambda Z: batch_all_loss(Z, labels, 0.5, distance, soft, average=average).loss, X)
    np.testing.assert_allclose(res.grad, g, rtol=1e-5, atol=1e-8)
    assert np.abs(res.grad).max() > 1e-3


@pytest.mark.parametrize("distance,soft", VARIANTS)
def test_batch_hard_grad_matches_finite_differences(rng, distance, soft):
    X, labels = _draw_smooth_batch(rng, 0.2, distance, hard_only=True)
    res = batch_hard_loss(X, labels, 0.2, distance, soft)
    assert res.active > 0
    g = _central_diff(lambda Z: batch_hard_loss(Z, labels, 0.2, distance, soft).loss, X)
    np.testing.assert_allclose(res.grad, g, rtol=1e-5, atol=1e-8)
    assert np.abs(res.grad).max() > 1e-3


@pytest.mark.parametrize("distance,soft", VARIANTS)
def test_gradients_are_orthogonal_to_raw_rows(rng, distance, soft):
    # The loss depends on each row only through its direction, so the gradient has no radial part.
    X, labels = _labelled_batch(rng, 12, 5, 3)
    for res in (batch_all_loss(X, labels, 0.2, distance, soft), batch_hard_loss(X, labels, 0.2, distance, soft)):
        np.testing.assert_allclose(np.sum(res.grad * X, axis=1), 0.0, atol=1e-12)


def test_euclidean_zero_distance_has_zero_subgradient():
    # anchor and positive point the same way: d_ap = 0, where sqrt is not differentiable;
    # the documented subgradient of that distance is 0, so only the negative term moves them.
    A = np.array([[1.0, 0.0]])
    P = np.array([[2.0, 0.0]])
    N = np.array([[0.8, 0.6]])
    value, ga, gp, gn = triplet_loss_grad(A, P, N, margin=1.0, distance="euclidean")
    assert np.all(np.isfinite(ga)) and np.all(gp == 0)
    assert value == pytest.approx(1.0 - math.sqrt(0.4), rel=1e-12)  # |(1,0)-(0.8,0.6)| = sqrt(0.4)
    assert np.abs(gn).max() > 0


# -- batch reductions against brute-force loops ------------------------------------------------
@pytest.mark.parametrize("offset", range(4))
@pytest.mark.parametrize("distance,soft", VARIANTS)
def test_batch_all_matches_triple_loop(seed, offset, distance, soft):
    rng = np.random.default_rng(seed + offset)
    X, labels = _labelled_batch(rng, n=int(rng.integers(6, 13)), d=int(rng.integers(2, 6)), k=int(rng.integers(2, 5)))
    brute = _brute_batch_all(X, labels, 0.2, distance, soft)
    res = batch_all_loss(X, labels, 0.2, distance, soft)
    assert res.triplets == len(brute)
    values = np.array([b[0] for b in brute])
    active = np.array([b[1] for b in brute])
    assert res.active == int(active.sum())
    assert res.loss_all == pytest.approx(values.mean(), rel=1e-10)
    assert res.loss == res.loss_all
    assert res.loss_active == pytest.approx(values[active].mean() if active.any() else 0.0, rel=1e-10)
    assert res.active_fraction == pytest.approx(active.mean(), rel=1e-12)
    # gradient twin: the per-triplet gradients of the enumerated triplets, summed into their rows
    idx = np.array([b[2] for b in brute])
    _, ga, gp, gn = triplet_loss_grad(X[idx[:, 0]], X[idx[:, 1]], X[idx[:, 2]], 0.2, distance, soft, "mean")
    grad = np.zeros_like(X)
    for col, g in zip(idx.T, (ga, gp, gn)):
        np.add.at(grad, col, g)
    np.testing.assert_allclose(res.grad, grad, rtol=1e-8, atol=1e-12)


@pytest.mark.parametrize("offset", range(4))
@pytest.mark.parametrize("distance,soft", VARIANTS)
def test_batch_hard_matches_double_loop(seed, offset, distance, soft):
    rng = np.random.default_rng(seed + offset)
    X, labels = _labelled_batch(rng, n=int(rng.integers(6, 16)), d=int(rng.integers(2, 6)), k=int(rng.integers(2, 5)))
    brute = _brute_batch_hard(X, labels, 0.2, distance, soft)
    res = batch_hard_loss(X, labels, 0.2, distance, soft)
    assert res.triplets == len(brute) > 0
    values = np.array([b[0] for b in brute])
    active = np.array([b[1] for b in brute])
    assert res.loss == pytest.approx(values.mean(), rel=1e-10)
    assert res.loss_all == res.loss
    assert res.active == int(active.sum())
    idx = np.array([b[2] for b in brute])
    _, ga, gp, gn = triplet_loss_grad(X[idx[:, 0]], X[idx[:, 1]], X[idx[:, 2]], 0.2, distance, soft, "mean")
    grad = np.zeros_like(X)
    for col, g in zip(idx.T, (ga, gp, gn)):
        np.add.at(grad, col, g)
    np.testing.assert_allclose(res.grad, grad, rtol=1e-8, atol=1e-12)


def test_batch_hard_skips_anchors_without_positive_or_negative():
    # rows 0,1 are identity "a"; row 2 is a singleton "b" (no positive, cannot be an anchor).
    X = np.array([[1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
    res = batch_hard_loss(X, ["a", "a", "b"], margin=0.2)
    assert res.triplets == 2
    # anchor 0: p = 1 (d = 2), n = 2 (d = 2 - sqrt 2); anchor 1 the same by symmetry.
    expected = 2.0 - (2.0 - math.sqrt(2.0)) + 0.2
    assert res.loss == pytest.approx(expected, rel=1e-12)
    assert batch_all_loss(X, ["a", "a", "b"], margin=0.2).triplets == 2


@pytest.mark.parametrize("block_size", [1, 2, 7, 1000])
def test_batch_all_blocked_equals_one_shot(rng, block_size):
    X, labels = _labelled_batch(rng, 20, 6, 4)
    whole = batch_all_loss(X, labels, 0.3, "euclidean", False)
    part = batch_all_loss(X, labels, 0.3, "euclidean", False, block_size=block_size)
    assert (part.triplets, part.active) == (whole.triplets, whole.active)
    assert part.loss == pytest.approx(whole.loss, rel=1e-12)
    assert part.loss_active == pytest.approx(whole.loss_active, rel=1e-12)
    np.testing.assert_allclose(part.grad, whole.grad, rtol=1e-11, atol=1e-15)


def test_batch_result_fields(rng):
    X, labels = _labelled_batch(rng)
    res = batch_all_loss(X, labels)
    assert isinstance(res, BatchLoss)
    assert res.grad.shape == X.shape and res.grad.dtype == np.float64
    assert isinstance(res.loss, float) and isinstance(res.triplets, int)
    assert res.active_fraction == res.active / res.triplets


def test_batch_without_valid_triplet_warns_and_gives_nan():
    X = np.eye(3)
    for fn in (batch_all_loss, batch_hard_loss):
        with pytest.warns(RuntimeWarning, match="no valid triplet"):
            res = fn(X, [7, 7, 7])  # one identity: no negatives
        assert math.isnan(res.loss) and res.triplets == 0 and not res.grad.any()
        with pytest.warns(RuntimeWarning, match="no valid triplet"):
            res = fn(X, [1, 2, 3])  # all singletons: no positives
        assert math.isnan(res.active_fraction)


def test_no_active_triplet_gives_zero_active_mean():
    # two tight, opposite clusters: every triplet is easy at margin 0.2
    X = np.array([[1.0, 0.01], [1.0, -0.01], [-1.0, 0.01], [-1.0, -0.01]])
    res = batch_all_loss(X, [0, 0, 1, 1], 0.2, average="active")
    assert res.active == 0 and res.loss_active == 0.0 and res.loss == 0.0 and not res.grad.any()


def test_mean_over_zero_triplets_warns():
    empty = np.zeros((0, 3))
    assert triplet_loss(empty, empty, empty).shape == (0,)
    with pytest.warns(RuntimeWarning, match="zero triplets"):
        value, ga, _, _ = triplet_loss_grad(empty, empty, empty)
    assert math.isnan(value) and ga.shape == (0, 3)


# -- invariances -------------------------------------------------------------------------------
@pytest.mark.parametrize("fn", [batch_all_loss, batch_hard_loss])
@pytest.mark.parametrize("distance,soft", VARIANTS)
def test_invariances(rng, fn, distance, soft):
    X, labels = _labelled_batch(rng, 14, 5, 4)
    base = fn(X, labels, 0.2, distance, soft)
    # permuting rows permutes the gradient and leaves the loss unchanged
    perm = rng.permutation(len(X))
    res = fn(X[perm], labels[perm], 0.2, distance, soft)
    assert res.loss == pytest.approx(base.loss, rel=1e-12)
    assert (res.triplets, res.active) == (base.triplets, base.active)
    np.testing.assert_allclose(res.grad, base.grad[perm], rtol=1e-9, atol=1e-14)
    # relabelling identities (other integers, or strings) changes nothing
    names = np.array(["seal-%02d" % (9 - v) for v in labels])
    for other in (labels * 7 + 100, names):
        res = fn(X, other, 0.2, distance, soft)
        assert res.loss == pytest.approx(base.loss, rel=1e-14)
        np.testing.assert_allclose(res.grad, base.grad, rtol=1e-12, atol=1e-16)
    # scaling raw rows by positive constants keeps the loss; the gradient scales by 1/c
    c = rng.uniform(0.1, 10.0, size=(len(X), 1))
    res = fn(X * c, labels, 0.2, distance, soft)
    assert res.loss == pytest.approx(base.loss, rel=1e-12)
    np.testing.assert_allclose(res.grad, base.grad / c, rtol=1e-8, atol=1e-13)


def test_triplet_loss_scale_invariant(rng):
    A, P, N = (rng.normal(size=(50, 6)) for _ in range(3))
    base = triplet_loss(A, P, N)
    np.testing.assert_allclose(triplet_loss(5 * A, 0.01 * P, 300 * N), base, rtol=1e-12, atol=1e-15)


def test_float32_input_is_computed_in_float32_within_its_rounding(rng):
    # float32 inputs stay float32 (a training loop's batches): the losses agree with the float64
    # computation to float32 rounding, and the gradients come back in float32
    A, P, N = (rng.normal(size=(20, 4)).astype(np.float32) for _ in range(3))
    out = triplet_loss(A, P, N)
    assert out.dtype == np.float64
    np.testing.assert_allclose(out, triplet_loss(*(v.astype(np.float64) for v in (A, P, N))), atol=2e-6)
    value, ga, gp, gn = triplet_loss_grad(A, P, N)
    ref = triplet_loss_grad(*(v.astype(np.float64) for v in (A, P, N)))
    assert ga.dtype == gp.dtype == gn.dtype == np.float32
    for got, want in zip((ga, gp, gn), ref[1:]):
        np.testing.assert_allclose(got, want, atol=2e-6)
    assert value == pytest.approx(ref[0], abs=2e-6)


def test_unit_float32_rows_are_not_copied(rng):
    # the working set of the per-triplet path is its chunks: on unit float32 rows the loss
    # allocates far less than the inputs and the gradients little more than themselves
    import tracemalloc

    n, d = 60_000, 32
    A, P, N = (rng.normal(size=(n, d)).astype(np.float32) for _ in range(3))
    for x in (A, P, N):
        x /= np.linalg.norm(x, axis=1, keepdims=True)
    inputs = 3 * A.nbytes
    tracemalloc.start()
    try:
        triplet_loss(A, P, N)
        loss_peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.reset_peak()
        triplet_loss_grad(A, P, N)
        grad_peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert loss_peak < 0.1 * inputs, loss_peak  # the (n,) outputs and chunk temporaries
    assert grad_peak < 1.5 * inputs, grad_peak  # the three gradients and chunk temporaries


# -- error messages ----------------------------------------------------------------------------
def test_option_errors(rng):
    A = rng.normal(size=(3, 2))
    with pytest.raises(TripletkitError, match=r"distance must be 'squared' or 'euclidean', got 'cosine'"):
        triplet_loss(A, A, A, distance="cosine")
    with pytest.raises(TripletkitError, match=r"distance must be 'squared' or 'euclidean', got 2"):
        pair_distance(A, A, distance=2)
    with pytest.raises(TripletkitError, match=r"margin must be a finite number >= 0, got -0.5"):
        triplet_loss(A, A, A, margin=-0.5)
    with pytest.raises(TripletkitError, match=r"margin must be a finite number >= 0, got nan"):
        triplet_loss(A, A, A, margin=float("nan"))
    with pytest.raises(TripletkitError, match=r"margin must be a number >= 0, got 'wide'"):
        triplet_loss(A, A, A, margin="wide")
    with pytest.raises(TripletkitError, match=r"margin must be a number >= 0, got True"):
        regime_of([1.0], [1.0], margin=True)
    with pytest.raises(TripletkitError, match=r"soft must be True or False, got 'yes'"):
        triplet_loss(A, A, A, soft="yes")
    with pytest.raises(TripletkitError, match=r"reduction must be one of 'mean', 'sum', 'none', got 'max'"):
        triplet_loss_grad(A, A, A, reduction="max")
    with pytest.raises(TripletkitError, match=r"average must be one of 'all', 'active', got 'hard'"):
        batch_all_loss(A, [0, 0, 1], average="hard")
    for bad in (0, 2.5, True):
        with pytest.raises(TripletkitError, match=r"block_size must be a positive integer or None"):
            batch_all_loss(A, [0, 0, 1], block_size=bad)


def test_array_errors(rng):
    A = rng.normal(size=(3, 2))
    with pytest.raises(TripletkitError, match=r"anchor must be a 2-D array \(rows x dimension\), got shape \(2,\)"):
        triplet_loss([1.0, 2.0], A, A)
    with pytest.raises(TripletkitError, match=r"same number of rows, got anchor=3, positive=2, negative=3"):
        triplet_loss(A, A[:2], A)
    with pytest.raises(TripletkitError, match=r"same dimension, got anchor=2, positive=2, negative=3"):
        triplet_loss(A, A, rng.normal(size=(3, 3)))
    with pytest.raises(TripletkitError, match=r"same number of rows, got a=3, b=1"):
        pair_distance(A, A[:1])
    with pytest.raises(TripletkitError, match=r"same dimension, got a=2, b=4"):
        pair_distance(A, rng.normal(size=(3, 4)))
    bad = A.copy()
    bad[1, 0] = np.nan
    with pytest.raises(TripletkitError, match=r"positive has 1 rows with NaN or Inf \(first row positions: \[1\]\)"):
        triplet_loss(A, bad, A)
    zero = A.copy()
    zero[2] = 0.0
    with pytest.raises(TripletkitError, match=r"negative has 1 zero-norm rows \(first row positions: \[2\]\)"):
        triplet_loss_grad(A, A, zero)
    with pytest.raises(TripletkitError, match=r"X must hold real numbers, got dtype <U1"):
        batch_hard_loss(np.array([["a", "b"]]), [0])
    with pytest.raises(TripletkitError, match=r"X has dimension 0"):
        batch_all_loss(np.zeros((3, 0)), [0, 0, 1])
    with pytest.raises(TripletkitError, match=r"labels has 2 entries but there are 3 rows; give one per row"):
        batch_all_loss(A, [0, 1])
    with pytest.raises(TripletkitError, match=r"labels contains null values"):
        batch_hard_loss(A, np.array([0, None, 1], dtype=object))
    with pytest.raises(TripletkitError, match=r"labels must be 1-D, got shape \(3, 1\)"):
        batch_hard_loss(A, [[0], [0], [1]])


def test_huge_finite_raw_outputs_give_the_loss_of_their_directions(rng):
    # raw outputs of 1e200 overflow a float32 cast and a float64 sum of squares; their unit
    # vectors, all the loss depends on, are those of the rows divided by 1e200
    a, p, n = (rng.normal(size=(6, 4)) for _ in range(3))
    big = 1e200
    np.testing.assert_allclose(triplet_loss(a * big, p * big, n * big), triplet_loss(a, p, n), rtol=1e-12, atol=1e-15)
    loss, g_a, g_p, g_n = triplet_loss_grad(a * big, p * big, n * big, margin=0.5)
    ref = triplet_loss_grad(a, p, n, margin=0.5)
    assert loss == pytest.approx(ref[0], rel=1e-12)
    # d(x/|x|)/dx scales with 1/|x|: the gradients shrink by the same factor
    np.testing.assert_allclose(g_a * big, ref[1], rtol=1e-9, atol=1e-12)


def test_chunks_shared_out_to_threads_give_the_same_bits(rng, monkeypatch):
    # the chunks of a large input run in threads; each writes its own rows, so the split changes
    # nothing (compared with every chunk in this thread)
    import tripletkit.losses as L

    A, P, N = (rng.normal(size=(5000, 16)).astype(np.float32) for _ in range(3))
    monkeypatch.setattr(L, "_CHUNK_BYTES", 4096)  # many chunks
    monkeypatch.setattr(L, "_PARALLEL_CELLS", 1 << 40)
    one = (triplet_loss(A, P, N), *triplet_loss_grad(A, P, N, reduction="none"))
    monkeypatch.setattr(L, "_PARALLEL_CELLS", 1)
    many = (triplet_loss(A, P, N), *triplet_loss_grad(A, P, N, reduction="none"))
    assert all(np.array_equal(x, y) for x, y in zip(one, many))
