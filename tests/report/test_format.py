"""Tests of tripletkit.report.format: the one spelling of every number, by hand."""

import math

import numpy as np

from tripletkit.report.format import (bracketed, compact, duration, fmr_target, interval, level, metric_label, number,
                                      percent, significant, sorted_targets, table, verification_part,
                                      with_interval)


def test_number():
    assert number(0.123456) == "0.1235" and number(0.5, 2) == "0.50" and number(2.0, 3) == "2.000"
    assert number(1290) == "1,290" and number(0) == "0"
    assert number(True) == "yes" and number(False) == "no"
    assert number(None) == "n/a" and number(math.nan) == "n/a" and number(math.inf) == "n/a"


def test_percent_and_intervals():
    assert percent(0.035920) == "3.59%" and percent(0.00015, 3) == "0.015%" and percent(1.0) == "100.00%"
    assert percent(None) == "n/a" and percent(float("nan")) == "n/a"
    assert interval([0.031, 0.0438]) == "3.10% – 4.38%"
    assert interval(None) == "n/a" and interval([]) == "n/a"
    assert interval([0.5, 0.75], number) == "0.5000 – 0.7500"
    assert with_interval(0.0359, [0.031, 0.0438]) == "3.59% (3.10% – 4.38%)"
    assert with_interval(0.0359, None) == "3.59%" and with_interval(None, None) == "n/a"
    assert level(0.95) == "95%" and level(0.9) == "90%"


def test_differences_settings_and_durations():
    assert significant(0.00023810001) == "0.0002381" and significant(-0.0028619) == "-0.002862"
    assert significant(2.2e-07, 2) == "2.2e-07" and significant(None) == "n/a"
    assert bracketed([-0.0028619, 0.0029364]) == "[-0.002862, 0.002936]"
    assert compact(0.05) == "0.05" and compact("0.0001") == "0.0001" and compact(1e-5) == "1e-05"
    assert compact(np.float64(0.2)) == "0.2"
    assert duration(0.44) == "0.4 s"
    assert duration(12.61) == "12.6 s" and duration(None) == "n/a s"


def test_fmr_targets_and_metric_names():
    assert fmr_target("0.001") == "0.1% (1 in 1,000)"
    assert fmr_target("0.0001") == "0.01% (1 in 10,000)"
    assert fmr_target("0.01") == "1% (1 in 100)"
    assert fmr_target("0.03") == "3%"  # not 1 in a whole number
    assert fmr_target("1") == "100%"
    assert sorted_targets(["0.01", "0.0001", "0.001"]) == ["0.0001", "0.001", "0.01"]
    assert metric_label("eer") == "EER" and metric_label("fnmr@0.001") == "FNMR at FMR = 0.001"


def test_table():
    assert table(["metric", "value"], [["EER", "3.59%"], ["AUC", 0.99]]) == [
        "| metric | value |", "|---|---|", "| EER | 3.59% |", "| AUC | 0.99 |"]


def test_verification_part():
    part = {"eer": 0.1}
    assert verification_part({"verification": part}) is part
    assert verification_part(part) is part
    assert verification_part({"verification": None}) == {} and verification_part(None) == {}
