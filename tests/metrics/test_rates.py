"""Tests of tripletkit.metrics.rates: the counting core, with toy cases worked out by hand."""

import numpy as np
import pytest

from tripletkit._errors import TripletkitError
from tripletkit.metrics import rates as R


def test_count_scores_keeps_ties():
    c = R.count_scores([0.9, 0.5, 0.5], [0.5, 0.1])
    assert c.thresholds.tolist() == [0.1, 0.5, 0.9]
    assert c.genuine.tolist() == [0, 2, 1]
    assert c.impostor.tolist() == [1, 1, 0]


def test_error_rates_by_hand():
    # genuine 0.9, 0.8, 0.4; impostor 0.7, 0.4, 0.1, 0.0 (numbers worked out by hand)
    c = R.count_scores([0.9, 0.8, 0.4], [0.7, 0.4, 0.1, 0.0])
    t, fmr, fnmr = R.error_rates(c)
    assert t[:-1].tolist() == [0.0, 0.1, 0.4, 0.7, 0.8, 0.9] and t[-1] > 0.9
    assert fmr.tolist() == [1.0, 0.75, 0.5, 0.25, 0.0, 0.0, 0.0]
    assert np.allclose(fnmr, [0, 0, 0, 1 / 3, 1 / 3, 2 / 3, 1])
    assert R.fnmr_at_fmr(c, 0.25) == (pytest.approx(1 / 3), 0.7)
    assert R.fnmr_at_fmr(c, 0.1) == (pytest.approx(1 / 3), 0.8)
    assert R.fnmr_at_fmr(c, 1.0) == (0.0, 0.0)
    # D = FMR - FNMR is 0.5 at t = 0.4 and -1/12 at t = 0.7: lambda = 0.5 / (7/12) = 6/7,
    # EER = 0.5 + 6/7 * (0.25 - 0.5) = 2/7, threshold = 0.4 + 6/7 * 0.3
    eer, thr = R.equal_error_rate(c)
    assert eer == pytest.approx(2 / 7, abs=1e-15)
    assert thr == pytest.approx(0.4 + 6 / 7 * 0.3, abs=1e-15)
    # AUC: 0.9 and 0.8 beat all 4 impostors, 0.4 beats 2 and ties 1: (4 + 4 + 2.5) / 12
    assert R.auc(c) == 10.5 / 12


def test_roc_and_det_points_by_hand():
    c = R.count_scores([0.9, 0.4], [0.4, 0.1])
    fmr, tmr, thr = R.roc_points(c)
    assert fmr.tolist() == [0.0, 0.0, 0.5, 1.0]
    assert tmr.tolist() == [0.0, 0.5, 1.0, 1.0]
    assert thr[1:].tolist() == [0.9, 0.4, 0.1] and thr[0] > 0.9
    dfmr, dfnmr = R.det_points(c)
    assert dfmr.tolist() == fmr.tolist() and dfnmr.tolist() == [1.0, 0.5, 0.0, 0.0]


def test_all_reject_threshold_when_target_needs_it():
    # the top score is an impostor: FMR 0 needs a threshold above every score
    c = R.count_scores([0.5, 0.2], [0.9, 0.1])
    f, t = R.fnmr_at_fmr(c, 0.4)
    assert f == 1.0 and t > 0.9


def test_most_false_matches_and_the_rule_of_three_by_hand():
    # 1000 impostor pairs: FMR 0.001 allows 1 false match, 0.0015 still 1, 0.002 two
    assert [R.max_false_matches(x, 1000) for x in (0.0001, 0.001, 0.0015, 0.002, 1.0)] == [0, 1, 1, 2, 1000]
    # 0.29 * 100 rounds to 28.999999999999996, but the rate 29 / 100 is <= 0.29: the count is 29
    # (rates compared as floats, as a ROC's FMR values are)
    assert 0.29 * 100 < 29 and R.max_false_matches(0.29, 100) == 29
    assert R.resolvable(0.001, 3000) == (True, None)
    ok, reason = R.resolvable(0.001, 2999)
    assert not ok and "fewer than 3/FMR = 3000 (rule of 3)" in reason


def test_reading_once_gives_the_same_rates():
    c = R.count_scores([0.9, 0.8, 0.4], [0.7, 0.4, 0.1, 0.0])
    plain = (R.fnmr_at_fmr(c, 0.25), R.equal_error_rate(c), R.roc_points(c)[1].tolist())
    with R.reading_once(c):
        assert (R.fnmr_at_fmr(c, 0.25), R.equal_error_rate(c), R.roc_points(c)[1].tolist()) == plain
        assert R.error_rates(c) is R.error_rates(c)  # computed once


def test_error_rates_need_both_kinds_of_pairs():
    with pytest.raises(TripletkitError, match="need at least one of each"):
        R.error_rates(R.count_scores([0.5], []))
    with pytest.raises(TripletkitError, match="genuine scores has 1 NaN"):
        R.count_scores([0.1, np.nan], [0.2])
