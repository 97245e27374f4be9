"""Tests of tripletkit.losses: hand-computed cases, brute-force twins, finite differences, invariances,
and every error message. Checks against outside references live in tests/external/test_loss_reference.py.
"""

import math

import numpy as np
import pytest

from tripletkit._errors import TripletkitError
from tripletkit.losses import (
    DISTANCES,
    pair_distance,
    triplet_loss,
    triplet_loss_grad,
)
from _support import central_difference, unit64
from tripletkit.mining.regimes import REGIMES, regime_codes, regime_of

VARIANTS = [(d, s) for d in DISTANCES for s in (False, True)]


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
    a, b = unit64(rng.normal(size=(500, 16))), unit64(rng.normal(size=(500, 16)))
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
        np.testing.assert_allclose(g, central_difference(fn, X), rtol=1e-5, atol=1e-8)
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


def test_mean_over_zero_triplets_warns():
    empty = np.zeros((0, 3))
    assert triplet_loss(empty, empty, empty).shape == (0,)
    with pytest.warns(RuntimeWarning, match="zero triplets"):
        value, ga, _, _ = triplet_loss_grad(empty, empty, empty)
    assert math.isnan(value) and ga.shape == (0, 3)


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
