"""Tests of tripletkit.metrics.paired: the paired identity bootstrap (brute-force twin of the weighted
counts, agreement with the verification module, the exact tail shortcut), identical runs, a clearly
better run, and the errors of the public entry.
"""

import itertools

import numpy as np
import pytest

from _support import identity_clusters
from tripletkit._errors import TripletkitError
from tripletkit.metrics.paired import PairScores, paired_comparison, parse_primary, primary_value
from tripletkit.metrics.rates import count_scores, equal_error_rate, fnmr_at_fmr
from tripletkit.metrics.verification import verify_all_pairs


# -- primary metric ----------------------------------------------------------------------------
def test_parse_primary():
    assert parse_primary("eer").kind == "eer"
    p = parse_primary("FNMR@1e-3", fmrs=(0.0001, 0.001))
    assert (p.kind, p.fmr, p.text) == ("fnmr", 0.001, "fnmr@0.001")
    assert (p.label, parse_primary(" EER ").label) == ("FNMR at FMR = 0.001", "EER")
    for bad in ("fnmr", "fnmr@", "fnmr@abc", "fnmr@0", "fnmr@1.5", "auc", "fnmr@nan"):
        with pytest.raises(TripletkitError, match="expected 'eer' or 'fnmr@<fmr>'"):
            parse_primary(bad)
    with pytest.raises(TripletkitError, match=r"not among \[evaluation\] fmr \(0.0001, 0.01\)"):
        parse_primary("fnmr@0.001", fmrs=(0.0001, 0.01))


# -- the weighted counts of the paired bootstrap -----------------------------------------------
def _explicit_resample_counts(E, labels, m):
    """Brute-force twin: build the resampled set (m_i copies of identity i) and list its pairs.

    Copies of one identity are different draws: a pair inside one copy is genuine, a pair of rows
    of different identities is an impostor pair, and pairs across two copies of the same identity
    are not formed (they would pair a photo with itself or repeat genuine pairs).
    """
    entries = []  # (row, identity, copy)
    for i in range(labels.max() + 1):
        for c in range(int(m[i])):
            entries += [(r, i, c) for r in np.flatnonzero(labels == i)]
    gen, imp = [], []
    for (ra, ia, ca), (rb, ib, cb) in itertools.combinations(entries, 2):
        if ia == ib and ca != cb:
            continue
        s = float(np.dot(E[ra], E[rb]))
        (gen if ia == ib else imp).append(s)
    return count_scores(gen, imp)


def _nonzero(counts):
    keep = (counts.genuine > 0) | (counts.impostor > 0)
    return counts.thresholds[keep], counts.genuine[keep], counts.impostor[keep]


def test_weighted_counts_equal_explicit_resample(rng):
    # Signed unit axes: every cosine is -1, 0 or 1, exactly, so both sides see the same scores
    # (and many ties, which the weighted counts must keep as ties).
    labels = np.repeat(np.arange(5), [3, 2, 4, 1, 3])
    E = np.eye(3, dtype=np.float32)[rng.integers(0, 3, labels.size)] * rng.choice([-1, 1], labels.size)[:, None]
    E = E.astype(np.float32)
    ps = PairScores(E, labels)
    for m in (np.ones(5), np.array([2, 0, 1, 3, 0]), np.array([0, 5, 0, 0, 0]), np.array([1, 1, 0, 2, 1])):
        got = _nonzero(ps.counts(m.astype(np.float64)))
        want = _nonzero(_explicit_resample_counts(E, labels, m))
        for g, w in zip(got, want):
            np.testing.assert_array_equal(g, w)
    full = ps.counts()
    assert int(full.genuine.sum()) == 3 + 1 + 6 + 0 + 3 and int(full.impostor.sum()) == 78 - 13


def test_full_sample_values_agree_with_verification_module(rng):
    # With every identity drawn once the paired bootstrap's metric is the plain all-pairs value.
    labels, X, _ = identity_clusters(rng, 30, 7, 8, 0.8)
    E = (X / np.linalg.norm(X, axis=1, keepdims=True)).astype(np.float32)
    ps = PairScores(E, labels)
    ref = verify_all_pairs(E, labels, fmr_targets=(0.01, 0.05), bootstrap=0)
    counts = ps.counts()
    # both use the exact cosines, so the values are equal, not merely close
    assert equal_error_rate(counts) == (ref["eer"], ref["eer_threshold"])
    assert fnmr_at_fmr(counts, 0.01) == (ref["fnmr_at_fmr"]["0.01"]["fnmr"], ref["fnmr_at_fmr"]["0.01"]["threshold"])
    assert int(counts.genuine.sum()) == ref["genuine_pairs"] and int(counts.impostor.sum()) == ref["impostor_pairs"]


@pytest.mark.parametrize("primary", ["eer", "fnmr@0.01"])
def test_tail_shortcut_equals_full_pair_list(rng, primary):
    # Replicates use only the top tail of the impostor scores plus a closed-form total; with the
    # operating point above the cut this must give the same float as the full pair list, and
    # below it (forced here with a cut at the operating point itself) the full list is used.
    labels, X, _ = identity_clusters(rng, 30, 6, 8, 0.45)  # EER about 5 %: the tail is a real cut
    E = (X / np.linalg.norm(X, axis=1, keepdims=True)).astype(np.float32)
    p = parse_primary(primary)
    ps = PairScores(E, labels)
    value = primary_value(ps, None, p)
    op = value if p.kind == "eer" else p.fmr
    for factor in (8.0, 1.0):
        ps.prepare_tail(factor * op)
        assert ps._tail is not None and ps._tail["imp_group"].size < ps.impostor_pairs
        stats = {"full_list": 0}
        for _ in range(60):
            m = np.bincount(rng.integers(0, 30, 30), minlength=30).astype(np.float64)
            fast = primary_value(ps, m, p, stats)
            tail, ps._tail = ps._tail, None
            slow = primary_value(ps, m, p)
            ps._tail = tail
            assert fast == slow
        if factor == 8.0:
            assert stats["full_list"] <= 3
        else:
            assert stats["full_list"] > 0


# -- the paired comparison ---------------------------------------------------------------------
@pytest.mark.parametrize("primary", ["eer", "fnmr@0.01"])
def test_identical_runs_give_exactly_zero_and_not_larger_than_noise(rng, primary):
    labels, X, _ = identity_clusters(rng, 40, 6, 16, 0.6)
    out = paired_comparison({0.1: X, 0.4: X.copy()}, labels, primary, bootstrap=100, seed=3)
    c = out["comparison"]
    assert c["difference"] == 0.0 and c["ci"] == [0.0, 0.0]
    assert c["larger_than_noise"] is False
    assert "not larger than the noise" in c["verdict"]
    assert c["best"]["margin"] == 0.1 and c["runner_up"]["margin"] == 0.4  # a tie goes to the smaller margin
    assert c["replicates_used"] == 100


def test_clearly_better_run_is_larger_than_noise(rng):
    labels, good, centres = identity_clusters(rng, 40, 6, 16, 0.35)
    poor = centres[labels] + 0.9 * rng.normal(size=good.shape)
    out = paired_comparison({0.2: poor, 0.05: good}, labels, "eer", bootstrap=200, seed=0)
    c = out["comparison"]
    assert c["best"]["margin"] == 0.05 and c["runner_up"]["margin"] == 0.2
    assert c["difference"] > 0 and c["ci"][0] > 0
    assert c["larger_than_noise"] is True
    assert "larger than the noise" in c["verdict"] and "not larger" not in c["verdict"]
    assert c["difference"] == pytest.approx(out["runs"][0.2]["value"] - out["runs"][0.05]["value"], abs=0)


def test_small_difference_is_within_noise(rng):
    # Two noisy copies of one model: their difference is resampling noise, not a real effect.
    labels, X, centres = identity_clusters(rng, 30, 5, 16, 0.8)
    Y = X + 0.05 * rng.normal(size=X.shape)
    c = paired_comparison({0.1: X, 0.2: Y}, labels, "eer", bootstrap=200)["comparison"]
    assert c["difference"] > 0 and c["ci"][0] <= 0 <= c["ci"][1]
    assert "not larger than the noise" in c["verdict"]


def test_paired_interval_is_narrower_than_unpaired_intervals(rng):
    # Pairing removes the noise the runs share: the difference's interval is much narrower than
    # the two runs' own intervals (the reason for applying one resample to both runs).
    labels, X, centres = identity_clusters(rng, 40, 6, 16, 0.7)
    Y = centres[labels] + 0.75 * rng.normal(size=X.shape)
    out = paired_comparison({0.1: X, 0.2: Y}, labels, "eer", bootstrap=200)
    width = lambda ci: ci[1] - ci[0]  # noqa: E731
    own = min(width(out["runs"][0.1]["ci"]), width(out["runs"][0.2]["ci"]))
    assert width(out["comparison"]["ci"]) < own


def test_unresolvable_primary_gives_no_comparison(rng):
    labels, X, _ = identity_clusters(rng, 5, 4, 8, 0.5)  # 190 pairs: FMR 0.001 needs 3000 impostors
    c = paired_comparison({0.1: X, 0.2: X}, labels, "fnmr@0.001", bootstrap=10)["comparison"]
    assert c["best"] is None and c["difference"] is None and "no comparison" in c["verdict"]


def test_paired_comparison_errors(rng):
    labels, X, _ = identity_clusters(rng, 4, 3, 5, 0.5)
    with pytest.raises(TripletkitError, match="non-empty dict"):
        paired_comparison({}, labels)
    with pytest.raises(TripletkitError, match="every run must embed the same held-out rows"):
        paired_comparison({0.1: X, 0.2: X[:-1]}, labels)
    with pytest.raises(TripletkitError, match="bootstrap must be a whole number >= 1"):
        paired_comparison({0.1: X}, labels, bootstrap=0)
    with pytest.raises(TripletkitError, match="confidence must be between 0 and 1, got 1.5"):
        paired_comparison({0.1: X}, labels, confidence=1.5)
