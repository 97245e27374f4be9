"""Tests of tripletkit.metrics.verification: twins of the three entries, invariances, errors."""

import numpy as np
import pytest

from tripletkit._errors import TripletkitError, TripletkitWarning
import tripletkit.metrics.verification as V
from tripletkit._exact import snap
from _support import clustered_rows, lattice_table, pair_scores


@pytest.fixture
def table(rng):
    return lattice_table(rng, 240, 20)


# ----------------------------------------------------------------------------- twins


def test_all_pairs_equals_materialised_scores(table):
    x, labels = table
    s, same, i, j = pair_scores(x, labels)
    targets = [0.001, 0.01, 0.1]
    ref = V.verify_scores(s[same], s[~same], genuine_identity=labels[i][same],
                                impostor_identity=np.stack([labels[i][~same], labels[j][~same]], 1),
                                fmr_targets=targets, bootstrap=60, seed=3)
    out = V.verify_all_pairs(x, labels, fmr_targets=targets, bootstrap=60, seed=3, block_rows=50, exact_auc=True)
    for key in ("genuine_pairs", "impostor_pairs", "auc", "eer", "eer_threshold", "fnmr_at_fmr"):
        assert out[key] == ref[key], key
    assert out["auc_exact"] and out["auc_error_bound"] == 0.0
    # the ROC points agree; thresholds of bins not listed exactly are bin middles (within 2**-18)
    assert out["roc"]["fpr"] == ref["roc"]["fpr"] and out["roc"]["tpr"] == ref["roc"]["tpr"]
    assert np.allclose(out["roc"]["threshold"][1:], ref["roc"]["threshold"][1:], atol=2.0**-18)
    assert out["score_histogram"] == ref["score_histogram"]


def test_groups_equal_pair_list_path(table, rng):
    x, labels = table
    groups = rng.choice(["north", "south", "reef"], size=len(x))
    _, _, i, j = pair_scores(x, labels)
    ref = V.verify_pairs(x, labels, i, j, groups=groups, fmr_targets=[0.01, 0.1], bootstrap=0)
    out = V.verify_all_pairs(x, labels, groups=groups, fmr_targets=[0.01, 0.1], bootstrap=0, block_rows=33)
    assert out["groups"] == ref["groups"]
    # brute force for one group: pairs with both rows in "reef", at the global threshold
    t = out["fnmr_at_fmr"]["0.01"]["threshold"]
    s, same, i, j = pair_scores(x, labels)
    both = (groups[i] == "reef") & (groups[j] == "reef")
    g = out["groups"]["reef"]
    assert g["impostor_pairs"] == int((both & ~same).sum())
    assert g["at_fmr"]["0.01"]["fmr"] == np.mean(s[both & ~same] >= t)
    assert g["at_fmr"]["0.01"]["fnmr"] == np.mean(s[both & same] < t)


def test_workers_must_be_a_positive_whole_number(table):
    x, labels = table
    for bad in (0, -1, 1.5, True, "2"):
        with pytest.raises(TripletkitError, match="workers must be a whole number"):
            V.verify_all_pairs(x, labels, workers=bad)


def test_random_data_equals_materialised_exact_cosines(rng):
    # float data: the blocked path's scores are the exact cosines of the snapped rows, which a
    # plain float64 product of the snapped rows reproduces in any order, so the operating
    # points and the (fully listed) AUC equal the brute force bit for bit
    x, labels = clustered_rows(rng, 400, 16, 40, noise=0.9)
    s, same, _, _ = pair_scores(snap(x), labels)
    ref = V.verify_scores(s[same], s[~same], fmr_targets=[0.01, 0.05], bootstrap=0)
    for block_rows in (7, 64, 400):
        out = V.verify_all_pairs(x, labels, fmr_targets=[0.01, 0.05], bootstrap=0, block_rows=block_rows,
                                 exact_auc=True)
        assert out["fnmr_at_fmr"] == ref["fnmr_at_fmr"]
        assert (out["eer"], out["eer_threshold"]) == (ref["eer"], ref["eer_threshold"])
        assert out["auc_exact"] and out["auc"] == ref["auc"]


def test_auc_budget_gives_a_true_bound(rng):
    x, labels = clustered_rows(rng, 300, 16, 30, noise=2.0)
    exact = V.verify_all_pairs(x, labels, bootstrap=0, fmr_targets=[0.01], exact_auc=True)
    capped = V.verify_all_pairs(x, labels, bootstrap=0, fmr_targets=[0.01], exact_auc=True, auc_budget=0)
    assert exact["auc_exact"] and not capped["auc_exact"]
    assert capped["auc_error_bound"] > 0
    assert abs(capped["auc"] - exact["auc"]) <= capped["auc_error_bound"]
    # the operating points do not depend on the AUC refinement
    assert capped["fnmr_at_fmr"] == exact["fnmr_at_fmr"] and capped["eer"] == exact["eer"]


def test_pair_list_equals_scores_of_those_pairs(table, rng):
    x, labels = table
    left = rng.integers(0, len(x), 3000)
    right = (left + rng.integers(1, len(x), 3000)) % len(x)
    s = np.einsum("ij,ij->i", x[left], x[right]).astype(np.float64)
    same = labels[left] == labels[right]
    out = V.verify_pairs(x, labels, left, right, same=same, fmr_targets=[0.01], bootstrap=25)
    ref = V.verify_scores(s[same], s[~same], genuine_identity=labels[left][same],
                                impostor_identity=np.stack([labels[left][~same], labels[right][~same]], 1),
                                fmr_targets=[0.01], bootstrap=25)
    assert out == ref


# ----------------------------------------------------------------------------- invariances


def test_invariant_to_row_order_and_label_names(table, rng):
    x, labels = table
    base = V.verify_all_pairs(x, labels, bootstrap=0, fmr_targets=[0.01, 0.1])
    perm = rng.permutation(len(x))
    names = np.array([f"seal-{v:03d}" for v in labels])
    moved = V.verify_all_pairs(x[perm], names[perm], bootstrap=0, fmr_targets=[0.01, 0.1])
    assert moved == base


def test_bootstrap_is_seeded(table):
    x, labels = table
    a = V.verify_all_pairs(x, labels, bootstrap=50, seed=1, fmr_targets=[0.1])
    b = V.verify_all_pairs(x, labels, bootstrap=50, seed=1, fmr_targets=[0.1])
    c = V.verify_all_pairs(x, labels, bootstrap=50, seed=2, fmr_targets=[0.1])
    assert a == b
    assert a["fnmr_at_fmr"]["0.1"]["ci"] != c["fnmr_at_fmr"]["0.1"]["ci"]
    lo, hi = a["fnmr_at_fmr"]["0.1"]["ci"]
    assert lo <= a["fnmr_at_fmr"]["0.1"]["fnmr"] <= hi


def test_report_holds_plain_python_numbers(table):
    x, labels = table
    out = V.verify_all_pairs(x, labels, bootstrap=20, fmr_targets=[0.01])

    def walk(v):
        if isinstance(v, dict):
            for w in v.values():
                walk(w)
        elif isinstance(v, list):
            for w in v:
                walk(w)
        else:
            assert v is None or type(v) in (bool, int, float, str), type(v)

    walk(out)


# ----------------------------------------------------------------------------- degenerate input


def test_rule_of_three(table):
    x, labels = table
    out = V.verify_all_pairs(x, labels, fmr_targets=[1e-5, 0.01], bootstrap=0)
    assert out["impostor_pairs"] < 3 / 1e-5
    op = out["fnmr_at_fmr"]["0.00001"]
    assert op["resolvable"] is False and op["fnmr"] is None and "rule of 3" in op["reason"]
    assert out["fnmr_at_fmr"]["0.01"]["resolvable"] is True


def test_one_identity_warns_and_returns_nulls(rng):
    x, _ = clustered_rows(rng, 30, 16, 3, noise=0.9)
    with pytest.warns(TripletkitWarning, match="no impostor pairs"):
        out = V.verify_all_pairs(x, np.zeros(30, int))
    assert out["auc"] is None and out["eer"] is None and "impostor" in out["reason"]
    assert out["fnmr_at_fmr"]["0.001"]["fnmr"] is None


def test_singletons_warn_and_return_nulls(rng):
    x, _ = clustered_rows(rng, 30, 16, 3, noise=0.9)
    with pytest.warns(TripletkitWarning, match="no genuine pairs"):
        out = V.verify_all_pairs(x, np.arange(30))
    assert out["genuine_pairs"] == 0 and out["auc"] is None


def test_empty_score_arrays_warn():
    with pytest.warns(TripletkitWarning, match="0 genuine"):
        out = V.verify_scores([], [0.1, 0.2])
    assert out["eer"] is None


# ----------------------------------------------------------------------------- errors


def test_errors_name_the_problem(table):
    x, labels = table
    with pytest.raises(TripletkitError, match="L2 norm is not 1"):
        V.verify_all_pairs(x * 2, labels)
    with pytest.raises(TripletkitError, match=r"fmr_targets must lie in \(0, 1\]"):
        V.verify_all_pairs(x, labels, fmr_targets=[0.0])
    with pytest.raises(TripletkitError, match="bootstrap must be"):
        V.verify_all_pairs(x, labels, bootstrap=-1)
    with pytest.raises(TripletkitError, match="confidence must lie"):
        V.verify_all_pairs(x, labels, confidence=1.5)
    with pytest.raises(TripletkitError, match="labels has 3 entries but there are 240 rows"):
        V.verify_all_pairs(x, labels[:3])
    with pytest.raises(TripletkitError, match="block_rows must be"):
        V.verify_all_pairs(x, labels, block_rows=0)
    bad = x.copy()
    bad[5, 0] = np.nan
    with pytest.raises(TripletkitError, match="NaN or Inf"):
        V.verify_all_pairs(bad, labels)


def test_pair_list_errors(table):
    x, labels = table
    with pytest.raises(TripletkitError, match="compares row 4 with itself"):
        V.verify_pairs(x, labels, [1, 4], [2, 4])
    with pytest.raises(TripletkitError, match=r"right\[1\] = 999 is not a row position"):
        V.verify_pairs(x, labels, [1, 2], [3, 999])
    with pytest.raises(TripletkitError, match="same number of rows"):
        V.verify_pairs(x, labels, [1, 2], [3])
    same = labels[[1, 2]] == labels[[3, 5]]
    with pytest.raises(TripletkitError, match="pair 1 .* is marked same"):
        V.verify_pairs(x, labels, [1, 2], [3, 5], same=np.array([same[0], not same[1]]))
    with pytest.raises(TripletkitError, match="same must be a boolean array"):
        V.verify_pairs(x, labels, [1, 2], [3, 5], same=[1, 0])


def test_score_array_errors():
    with pytest.raises(TripletkitError, match="genuine scores has 1 NaN"):
        V.verify_scores([0.1, np.nan], [0.2])
    with pytest.raises(TripletkitError, match="give both genuine_identity and impostor_identity"):
        V.verify_scores([0.5], [0.2], genuine_identity=[0])
    with pytest.raises(TripletkitError, match=r"impostor_identity has shape \(1,\); expected \(1, 2\)"):
        V.verify_scores([0.5], [0.2], genuine_identity=[0], impostor_identity=[1])
    with pytest.raises(TripletkitError, match="same identity on both sides"):
        V.verify_scores([0.5], [0.2], genuine_identity=[0], impostor_identity=[[1, 1]])
