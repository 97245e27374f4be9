"""Tests of tripletkit.batch_losses: the batch-all and batch-hard reductions against brute-force
loops (every triplet of the batch), finite differences, invariances and their error messages.
"""

import itertools
import math

import numpy as np
import pytest

from _support import central_difference, triplet_term, unit64, unit_distance
from tripletkit._errors import TripletkitError
from tripletkit.batch_losses import BatchLoss, batch_all_loss, batch_hard_loss
from tripletkit.losses import DISTANCES, triplet_loss_grad

VARIANTS = [(d, s) for d in DISTANCES for s in (False, True)]


def _brute_batch_all(X, labels, margin, distance, soft):
    u = unit64(X)
    losses = []
    for a, p, n in itertools.product(range(len(u)), repeat=3):
        if a != p and labels[a] == labels[p] and labels[n] != labels[a]:
            d_ap, d_an = unit_distance(u[a], u[p], distance), unit_distance(u[a], u[n], distance)
            losses.append((triplet_term(d_ap, d_an, margin, soft), d_ap - d_an + margin > 0, (a, p, n)))
    return losses


def _brute_batch_hard(X, labels, margin, distance, soft):
    u = unit64(X)
    out = []
    for a in range(len(u)):
        best_p, best_n = None, None
        for j in range(len(u)):
            d = unit_distance(u[a], u[j], distance)
            if j != a and labels[j] == labels[a] and (best_p is None or d > best_p[0]):
                best_p = (d, j)
            if labels[j] != labels[a] and (best_n is None or d < best_n[0]):
                best_n = (d, j)
        if best_p is not None and best_n is not None:
            out.append((triplet_term(best_p[0], best_n[0], margin, soft), best_p[0] - best_n[0] + margin > 0,
                        (a, best_p[1], best_n[1])))
    return out


def _labelled_batch(rng, n=10, d=4, k=3):
    X = rng.normal(size=(n, d)) * rng.uniform(0.5, 3.0, size=(n, 1))
    labels = rng.integers(0, k, size=n)
    return X, labels


def _far_from_kinks(X, labels, margin, distance, hard_only, gap=1e-4):
    """True when no used triplet sits within ``gap`` of the hinge kink and, for batch-hard, no
    anchor has a near-tie for its hardest positive or negative (finite differences need that)."""
    if hard_only:
        terms = _brute_batch_hard(X, labels, margin, distance, False)
        u = unit64(X)
        for a in range(len(u)):
            d = np.array([unit_distance(u[a], u[j], distance) for j in range(len(u))])
            same = (labels == labels[a]) & (np.arange(len(u)) != a)
            for group, pick in ((same, np.sort), (labels != labels[a], np.sort)):
                vals = pick(d[group])
                if len(vals) > 1 and np.min(np.diff(vals)) < gap:
                    return False
    else:
        terms = _brute_batch_all(X, labels, margin, distance, False)
    u = unit64(X)
    for _, _, (a, p, n) in terms:
        if abs(unit_distance(u[a], u[p], distance) - unit_distance(u[a], u[n], distance) + margin) < gap:
            return False
    return True


def _draw_smooth_batch(rng, margin, distance, hard_only, n=9, d=3, k=3):
    for _ in range(50):
        X, labels = _labelled_batch(rng, n, d, k)
        if _far_from_kinks(X, labels, margin, distance, hard_only):
            return X, labels
    raise RuntimeError("could not draw a batch away from the hinge kinks")  # test-data failure


@pytest.mark.parametrize("distance,soft", VARIANTS)
@pytest.mark.parametrize("average", ["all", "active"])
def test_batch_all_grad_matches_finite_differences(rng, distance, soft, average):
    X, labels = _draw_smooth_batch(rng, 0.5, distance, hard_only=False)
    res = batch_all_loss(X, labels, 0.5, distance, soft, average=average)
    assert 0 < res.active < res.triplets
    g = central_difference(lambda Z: batch_all_loss(Z, labels, 0.5, distance, soft, average=average).loss, X)
    np.testing.assert_allclose(res.grad, g, rtol=1e-5, atol=1e-8)
    assert np.abs(res.grad).max() > 1e-3


@pytest.mark.parametrize("distance,soft", VARIANTS)
def test_batch_hard_grad_matches_finite_differences(rng, distance, soft):
    X, labels = _draw_smooth_batch(rng, 0.2, distance, hard_only=True)
    res = batch_hard_loss(X, labels, 0.2, distance, soft)
    assert res.active > 0
    g = central_difference(lambda Z: batch_hard_loss(Z, labels, 0.2, distance, soft).loss, X)
    np.testing.assert_allclose(res.grad, g, rtol=1e-5, atol=1e-8)
    assert np.abs(res.grad).max() > 1e-3


@pytest.mark.parametrize("distance,soft", VARIANTS)
def test_gradients_are_orthogonal_to_raw_rows(rng, distance, soft):
    # The loss depends on each row only through its direction, so the gradient has no radial part.
    X, labels = _labelled_batch(rng, 12, 5, 3)
    for res in (batch_all_loss(X, labels, 0.2, distance, soft), batch_hard_loss(X, labels, 0.2, distance, soft)):
        np.testing.assert_allclose(np.sum(res.grad * X, axis=1), 0.0, atol=1e-12)


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


def test_option_and_array_errors(rng):
    A = rng.normal(size=(3, 2))
    with pytest.raises(TripletkitError, match=r"average must be one of 'all', 'active', got 'hard'"):
        batch_all_loss(A, [0, 0, 1], average="hard")
    for bad in (0, 2.5, True):
        with pytest.raises(TripletkitError, match=r"block_size must be a positive integer or None"):
            batch_all_loss(A, [0, 0, 1], block_size=bad)
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
