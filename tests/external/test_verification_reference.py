"""Verification metrics against outside references: scikit-learn, scipy, signal detection theory."""

import math
from statistics import NormalDist

import numpy as np
import pytest
from scipy.stats import mannwhitneyu
from sklearn.metrics import det_curve, roc_auc_score, roc_curve

import tripletkit.metrics.verification as V
from tripletkit.metrics import rates as R
from tripletkit.metrics.section import report_key
from _support import lattice_table, pair_scores


def sklearn_operating_points(y, s, targets):
    """FNMR at FMR, its threshold and the EER from sklearn.metrics.roc_curve, by the definitions."""
    fpr, tpr, thr = roc_curve(y, s, drop_intermediate=False)  # thresholds falling, first = inf
    ops = {}
    for x in targets:
        j = np.flatnonzero(fpr <= x)[-1]  # the lowest threshold with FMR <= x: highest TPR
        ops[x] = (1.0 - tpr[j], thr[j])
    # EER: thresholds rising, D = FMR - FNMR; last D >= 0, interpolate to the next one
    f, m, t = fpr[::-1], 1.0 - tpr[::-1], thr[::-1]
    d = f - m
    j = np.flatnonzero(d >= 0)[-1]
    lam = d[j] / (d[j] - d[j + 1])
    eer = f[j] + lam * (f[j + 1] - f[j])
    eer_t = t[j] + lam * (t[j + 1] - t[j]) if np.isfinite(t[j + 1]) else None
    return ops, eer, eer_t, (fpr, tpr)


TABLES = {
    "fine grid": dict(n=260, k=22, d=12, centre=20, spread=12, scale=64),
    "tied scores": dict(n=200, k=12, d=6, centre=2, spread=1, scale=4),
}


@pytest.mark.parametrize("name", sorted(TABLES))
def test_all_pairs_against_sklearn_roc(name, rng):
    # reference: sklearn.metrics.roc_curve and roc_auc_score on every materialised pair
    x, labels = lattice_table(rng, **TABLES[name])
    s, y, _, _ = pair_scores(x, labels)
    if name == "tied scores":
        assert np.unique(s).size < 40  # the table really is full of ties
    targets = [0.001, 0.01, 0.05, 0.2]
    out = V.verify_all_pairs(x, labels, fmr_targets=targets, bootstrap=0, block_rows=41)
    ops, eer, eer_t, (fpr, tpr) = sklearn_operating_points(y, s, targets)
    assert out["genuine_pairs"] == int(y.sum()) and out["impostor_pairs"] == int((~y).sum())
    for x_ in targets:
        op = out["fnmr_at_fmr"][report_key(x_)]
        if not op["resolvable"]:
            continue
        ref_fnmr, ref_t = ops[x_]
        assert abs(op["fnmr"] - ref_fnmr) <= 1e-12
        if np.isfinite(ref_t):
            assert op["threshold"] == ref_t
        else:
            assert op["threshold"] > s.max()
    assert abs(out["eer"] - eer) <= 1e-4
    if eer_t is not None:
        assert abs(out["eer_threshold"] - eer_t) <= 1e-4
    assert abs(out["auc"] - roc_auc_score(y, s)) <= 1e-6
    # every reported (downsampled) ROC point is a point of sklearn's ROC
    ref_points = set(zip(fpr.tolist(), tpr.tolist()))
    for p in zip(out["roc"]["fpr"], out["roc"]["tpr"]):
        assert min(abs(p[0] - a) + abs(p[1] - b) for a, b in ref_points) <= 1e-12


@pytest.mark.parametrize("name", sorted(TABLES))
def test_counting_function_roc_and_det_against_sklearn(name, rng):
    # reference: sklearn.metrics.roc_curve (every point) and sklearn.metrics.det_curve
    x, labels = lattice_table(rng, **TABLES[name])
    s, y, _, _ = pair_scores(x, labels)
    counts = R.count_scores(s[y], s[~y])
    fmr, tmr, thr = R.roc_points(counts)
    rfpr, rtpr, rthr = roc_curve(y, s, drop_intermediate=False)
    assert np.allclose(fmr, rfpr, atol=1e-12, rtol=0) and np.allclose(tmr, rtpr, atol=1e-12, rtol=0)
    assert np.array_equal(thr[1:], rthr[1:]) and np.isinf(rthr[0]) and thr[0] > s.max()
    dfmr, dfnmr = R.det_points(counts)
    sfpr, sfnr, _ = det_curve(y, s)
    sfpr, sfnr = sfpr[::-1], sfnr[::-1]  # sklearn lists FMR falling; ours rises
    # sklearn trims the flat ends of the curve: its points are a run of ours
    start = int(np.flatnonzero((np.abs(dfmr - sfpr[0]) < 1e-12) & (np.abs(dfnmr - sfnr[0]) < 1e-12))[0])
    run = slice(start, start + sfpr.size)
    assert np.allclose(dfmr[run], sfpr, atol=1e-12) and np.allclose(dfnmr[run], sfnr, atol=1e-12)


def test_score_arrays_against_sklearn_with_float_ties(rng):
    # reference: sklearn.metrics.roc_curve / roc_auc_score; scores rounded to 3 decimals so that
    # genuine and impostor scores tie often
    g = np.round(rng.normal(0.5, 0.2, 3000), 3)
    i = np.round(rng.normal(0.0, 0.2, 40000), 3)
    y = np.r_[np.ones(g.size, bool), np.zeros(i.size, bool)]
    s = np.r_[g, i]
    targets = [0.001, 0.01, 0.1]
    out = V.verify_scores(g, i, fmr_targets=targets, bootstrap=0)
    ops, eer, eer_t, _ = sklearn_operating_points(y, s, targets)
    for x_ in targets:
        op = out["fnmr_at_fmr"][report_key(x_)]
        assert abs(op["fnmr"] - ops[x_][0]) <= 1e-12 and op["threshold"] == ops[x_][1]
    assert abs(out["eer"] - eer) <= 1e-4 and abs(out["eer_threshold"] - eer_t) <= 1e-4
    assert abs(out["auc"] - roc_auc_score(y, s)) <= 1e-6


def test_auc_is_the_mann_whitney_statistic(rng):
    # reference: scipy.stats.mannwhitneyu, U = #(g > i) + 0.5 #(g == i) over all pairs of pairs
    g = rng.integers(0, 50, 700) / 50
    i = rng.integers(0, 40, 900) / 50
    u = mannwhitneyu(g, i, alternative="two-sided").statistic
    assert R.auc(R.count_scores(g, i)) == pytest.approx(u / (g.size * i.size), abs=1e-15)


@pytest.mark.parametrize("d_prime", [1.0, 2.0])
def test_binormal_eer_and_auc(d_prime, rng):
    # signal detection theory (e.g. Green and Swets, "Signal Detection Theory and Psychophysics",
    # 1966; formulas recalled from memory): equal-variance normal scores N(0, 1) and N(d', 1)
    # give EER = Phi(-d'/2) and AUC = Phi(d'/sqrt 2)
    n = 200_000
    g = rng.normal(d_prime, 1.0, n)
    i = rng.normal(0.0, 1.0, n)
    counts = R.count_scores(g, i)
    nd = NormalDist()
    eer, thr = R.equal_error_rate(counts)
    # the standard error of an empirical rate near 0.3 from 2e5 scores is ~0.001; allow 5 of them
    assert abs(eer - nd.cdf(-d_prime / 2)) < 0.005
    assert abs(thr - d_prime / 2) < 0.02  # by symmetry the EER threshold is the midpoint
    assert abs(R.auc(counts) - nd.cdf(d_prime / math.sqrt(2))) < 0.004
    # the report gives the same numbers
    out = V.verify_scores(g, i, bootstrap=0)
    assert out["eer"] == eer and out["auc"] == R.auc(counts)
