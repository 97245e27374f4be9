"""tripletkit.mining.regimes: the regime boundaries on exact (dyadic) distances and against the
written-out definitions, distances from cosines and back, and every error message."""

import numpy as np
import pytest
from _support import distance_of_cosine, regime_name

from tripletkit._errors import TripletkitError
from tripletkit.mining.regimes import (EASY, HARD, REGIMES, SEMI_HARD, classify, cosine_at, distance_from_cosine,
                                       euclidean, regime_codes, regime_of)


def test_regime_boundaries_on_dyadic_distances():
    # Dyadic numbers are exact in binary, so the boundaries are hit exactly.
    # d_ap = 0.5, margin 0.25: d_an 0.25 hard; 0.5 (= d_ap) semi-hard; 0.625 semi-hard;
    # 0.75 (= d_ap + margin) easy; 1.0 easy.
    d_an = [0.25, 0.5, 0.625, 0.75, 1.0]
    assert regime_of(0.5, d_an, 0.25).tolist() == ["hard", "semi-hard", "semi-hard", "easy", "easy"]
    assert regime_codes(0.5, d_an, 0.25).tolist() == [2, 1, 1, 0, 0]
    # margin 0: nothing is semi-hard; d_an == d_ap is easy.
    assert regime_of([0.5, 0.5], [0.25, 0.5], 0.0).tolist() == ["hard", "easy"]
    # broadcasting: one d_ap per anchor against several candidate negatives
    codes = regime_codes(np.array([[0.5], [1.0]]), np.array([[0.25, 0.5, 1.0]]), 0.25)
    assert codes.shape == (2, 3) and codes.tolist() == [[2, 1, 0], [2, 2, 1]]


def test_regimes_tuple_and_codes_are_stable():
    # The mining module imports these; their order is part of the contract.
    assert REGIMES == ("easy", "semi-hard", "hard")
    assert [REGIMES.index(r) for r in REGIMES] == [0, 1, 2]


def test_regime_errors():
    with pytest.raises(TripletkitError, match=r"d_an has 1 negative values; distances are >= 0"):
        regime_of([0.5], [-0.1])
    with pytest.raises(TripletkitError, match=r"d_ap has 1 NaN or Inf values; distances must be finite"):
        regime_codes([np.nan], [0.1])
    with pytest.raises(TripletkitError, match=r"d_ap must hold real numbers, got dtype <U3"):
        regime_codes(["far"], [0.1])
    with pytest.raises(TripletkitError, match=r"d_ap has shape \(2,\) and d_an has shape \(3,\); give one"):
        regime_codes([0.1, 0.2], [0.1, 0.2, 0.3])


def test_codes_name_the_regimes():
    assert [REGIMES[c] for c in (EASY, SEMI_HARD, HARD)] == ["easy", "semi-hard", "hard"]


@pytest.mark.parametrize("margin", [0.0, 0.25, 0.5])
def test_classify_matches_the_written_out_definitions(rng, margin):
    # distances on a grid of 1/8 (exact in binary) hit both boundaries many times
    d_ap = rng.integers(0, 17, 2000) / 8.0
    d_an = rng.integers(0, 17, 2000) / 8.0
    want = [regime_name(x, y, margin) for x, y in zip(d_ap, d_an)]
    assert [REGIMES[c] for c in classify(d_ap, d_an, margin)] == want
    assert np.array_equal(regime_codes(d_ap, d_an, margin), classify(d_ap, d_an, margin))
    assert {EASY, HARD} <= set(classify(d_ap, d_an, margin).tolist())


def test_margin_errors():
    with pytest.raises(TripletkitError, match=r"^margin must be a number >= 0, got True$"):
        regime_codes([0.5], [0.1], True)
    with pytest.raises(TripletkitError, match=r"^margin must be a number >= 0, got 'wide'$"):
        regime_codes([0.5], [0.1], "wide")
    with pytest.raises(TripletkitError, match=r"^margin must be a finite number >= 0, got -0\.1$"):
        regime_of([0.5], [0.1], -0.1)
    with pytest.raises(TripletkitError, match=r"^margin must be a finite number >= 0, got nan$"):
        regime_of([0.5], [0.1], float("nan"))


@pytest.mark.parametrize("distance", ["squared", "euclidean"])
def test_distance_from_cosine_and_back(rng, distance):
    cos = np.concatenate([rng.uniform(-1, 1, 1000), [-1.0, 0.0, 1.0, 1.0 + 1e-16]])
    got = distance_from_cosine(cos, distance)
    np.testing.assert_array_equal(got, distance_of_cosine(cos, distance))
    assert got.min() >= 0.0  # rounding above 1 is clipped, never a negative distance
    # in place: the same values bit for bit, in the array passed
    work = cos.copy()
    assert distance_from_cosine(work, distance, overwrite=True) is work
    np.testing.assert_array_equal(work, got)
    # cosine_at inverts it on [-1, 1]; euclidean converts to ||a - b||
    np.testing.assert_allclose(cosine_at(got[:1000], distance), cos[:1000], rtol=0, atol=1e-12)
    np.testing.assert_allclose(euclidean(got, distance), distance_of_cosine(cos, "euclidean"), rtol=0, atol=0)
