"""tripletkit._exact: the exact cosines are exact, whatever the order of summation."""

from fractions import Fraction

import numpy as np
import pytest

from tripletkit._errors import TripletkitError
from tripletkit._exact import GRID_BITS, cosines, pair_cosines, slack, snap


def unit(rng, n, d):
    x = rng.standard_normal((n, d))
    return (x / np.linalg.norm(x, axis=1, keepdims=True)).astype(np.float32)


def test_products_of_snapped_rows_equal_exact_rational_arithmetic(rng):
    # reference: Python's fractions.Fraction, exact rational arithmetic (no rounding at all)
    x = unit(rng, 6, 37)
    s = snap(x)
    assert np.all(s * 2.0**GRID_BITS == np.rint(s * 2.0**GRID_BITS))  # on the grid
    got = cosines(s, s)
    for i in range(6):
        for j in range(6):
            exact = sum(Fraction(float(a)) * Fraction(float(b)) for a, b in zip(s[i], s[j]))
            assert got[i, j] == float(exact) == exact  # representable, so no rounding happened


def test_any_order_and_any_blocking_give_the_same_bits(rng):
    x = unit(rng, 300, 128)
    s = snap(x)
    whole = cosines(s, s)
    rows = np.vstack([cosines(s[a:a + 7], s) for a in range(0, 300, 7)])  # other block shapes
    reversed_dims = cosines(s[:, ::-1].copy(), s[:, ::-1].copy())  # the other summation order
    i, j = np.triu_indices(300, 1)
    assert np.array_equal(whole, rows) and np.array_equal(whole, reversed_dims)
    assert np.array_equal(pair_cosines(s, i, j), whole[i, j])
    # scaling by a power of two scales the products exactly
    assert np.array_equal(cosines(snap(x, scale=2.0**9), snap(x, scale=2.0**9)), whole * 2.0**18)


def test_slack_bounds_float32_products(rng):
    # the float32 product of the stored rows lies within slack(d) of the exact cosine
    for d in (3, 64, 512):
        x = unit(rng, 200, d)
        f32 = (x @ x.T).astype(np.float64)
        assert np.max(np.abs(f32 - cosines(snap(x), snap(x)))) <= slack(d)


def test_rows_far_from_unit_length_are_refused():
    with pytest.raises(TripletkitError, match=r"^row 1 has squared norm 4; exact cosines need unit rows"):
        snap(np.array([[1.0, 0.0], [2.0, 0.0]]))
