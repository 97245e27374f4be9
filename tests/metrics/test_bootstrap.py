"""Tests of tripletkit.metrics.bootstrap: the grid, the per-identity counts and the interval coverage."""

import math
from statistics import NormalDist

import numpy as np

from tripletkit.metrics import bootstrap as B
from tripletkit.metrics.verification import verify_scores


def test_window_factor_shrinks_with_identities_between_its_bounds():
    assert B.window_factor(1) == 8.0 and B.window_factor(10**6) == 1.25
    assert B.window_factor(100) == math.exp(2.0)  # exp(20 / sqrt(100)), inside the bounds
    assert all(B.window_factor(k) >= B.window_factor(k + 50) for k in range(1, 2000, 50))


def test_threshold_grid_holds_the_first_candidate_at_each_level():
    # 1000 impostors over 10 candidate thresholds, 100 at each: imp_ge = 1000, 900, ..., 100
    imp_ge = np.arange(1000, 0, -100)
    grid = B.threshold_grid(imp_ge, 1000, [0.3], per_decade=1, factor=2.0)
    # levels 0.15 and 0.6 and the target 0.3: first candidates with at most 150, 600, 300 above
    assert grid.tolist() == [4, 7, 9]
    assert imp_ge[grid].tolist() == [600, 300, 100]


def test_per_identity_counts_by_hand():
    # impostor pairs (identity a, b, grid cell): (0, 1, 0), (0, 2, 1), (1, 2, 1), (1, 2, -1 = below)
    cells = B.per_identity_cells(np.array([0, 1, 1, -1]), np.array([0, 0, 1, 1]), np.array([1, 2, 2, 2]), 3, 2)
    assert cells.tolist() == [[1, 1], [1, 1], [0, 2]]
    assert B.at_or_above(cells).tolist() == [[2, 1], [2, 1], [2, 2]]
    # genuine pairs of identity 0 in cells -1, 0, 1 and of identity 2 in cell 1: below grid_0, grid_1
    assert B.below(np.array([0, 0, 0, 2]), np.array([-1, 0, 1, 1]), 3, 2).tolist() == [[1, 2], [0, 0], [0, 0]]


def _simulated_scores(rng, k, m, mu_g):
    """Scores with identity and row random effects; their marginals are normal with known moments.

    genuine (i, j of identity c):  mu_g + a_c + u_i + u_j + e_ij
    impostor (c != c'):            b_c + b_c' + v_i + v_j + e_ij
    """
    n = k * m
    ident = np.repeat(np.arange(k), m)
    a, b = rng.normal(0, 0.08, k), rng.normal(0, 0.05, k)
    u, v = rng.normal(0, 0.05, n), rng.normal(0, 0.04, n)
    i, j = np.triu_indices(n, 1)
    same = ident[i] == ident[j]
    e = rng.normal(0, 0.05, i.size)
    s = np.where(same, mu_g + a[ident[i]] + u[i] + u[j], b[ident[i]] + b[ident[j]] + v[i] + v[j]) + e
    return s[same], s[~same], ident[i][same], np.stack([ident[i][~same], ident[j][~same]], 1)


def test_intervals_cover_the_true_fnmr_at_about_the_nominal_rate():
    # truth from the normal marginals: threshold t = sd_i * z(1 - x), FNMR = Phi((t - mu_g) / sd_g)
    x, mu_g, k, m, sims = 0.01, 0.35, 100, 5, 150
    sd_g = math.sqrt(0.08**2 + 2 * 0.05**2 + 0.05**2)
    sd_i = math.sqrt(2 * 0.05**2 + 2 * 0.04**2 + 0.05**2)
    nd = NormalDist()
    truth = nd.cdf((sd_i * nd.inv_cdf(1 - x) - mu_g) / sd_g)
    rng = np.random.default_rng(20261201)
    covered = at_grid_end = 0
    for r in range(sims):
        g, i, gi, ii = _simulated_scores(rng, k, m, mu_g)
        op = verify_scores(g, i, genuine_identity=gi, impostor_identity=ii, fmr_targets=[x],
                           bootstrap=200, seed=r)["fnmr_at_fmr"]["0.01"]
        lo, hi = op["ci"]
        covered += lo <= truth <= hi
        at_grid_end += op["reason"] is not None  # some replicate's threshold hit the grid's end
    assert at_grid_end <= sims // 20
    # percentile intervals over ~100 clusters cover a little under nominal (0.90-0.94 seen in
    # development); 0.85-0.99 is several binomial standard errors (0.02) either side
    assert 0.85 <= covered / sims <= 0.99
