"""Property-based tests (hypothesis, fixed seed): random small tables and option sets.

Invariants, each checked against an independent float64 brute force (here and in tests/_support.py):

- mining: every triplet has the right labels, the stored distances, violation and regime of the
  DESIGN.md boundaries (hard: d_an < d_ap; semi-hard: d_ap <= d_an < d_ap + alpha; easy:
  d_an >= d_ap + alpha), a requested regime, and as many negatives as the regime holds (up to
  ``negatives_per_positive``); ``hardest`` picks the smallest d_an; the summary adds up;
- verification: every rate is in [0, 1], the ROC and DET are monotone, FNMR at FMR and the EER
  equal the ones computed from every materialised pair by the ISO/IEC 19795-1 definitions
  (FMR(t) = share of impostor scores >= t, FNMR(t) = share of genuine scores < t), FNMR at FMR
  falls as the FMR target grows, and unresolvable targets follow the rule of 3;
- no crash: whatever the table and options, the result is a report/summary or one
  ``TripletkitError`` line.

Runs are derandomised (``derandomize=True``) so CI sees the same examples every time.
"""

import json
import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from _support import distance_of_cosine, regime_name

from tripletkit._errors import TripletkitError
from tripletkit._validate import MAX_DISTANCE
from tripletkit.config import EvaluationConfig, MiningConfig
from tripletkit.evaluate import score
from tripletkit.metrics.verification import verify_all_pairs
from tripletkit.mining import mine
from tripletkit.mining.regimes import REGIMES
from tripletkit.tables.embeddings import EmbeddingTable
from _support import four_squares, pair_scores

SETTINGS = dict(derandomize=True, deadline=None, suppress_health_check=[HealthCheck.too_slow])
# Pairs this close to a regime boundary may fall on either side with another summation order
# (DESIGN.md: float64 brute forces agree except within about 1e-15 of a boundary).
BOUNDARY = 1e-12


# ---------------------------------------------------------------------------------------------
# strategies
# ---------------------------------------------------------------------------------------------
@st.composite
def small_tables(draw, max_rows=28):
    """(ids, labels, X): integer-valued rows (many exact ties), labels from a few identities."""
    n = draw(st.integers(3, max_rows))
    d = draw(st.integers(1, 5))
    k = draw(st.integers(1, 6))
    labels = np.array(draw(st.lists(st.integers(0, k - 1), min_size=n, max_size=n)), dtype=np.int64)
    values = draw(st.lists(st.integers(-3, 3), min_size=n * d, max_size=n * d))
    X = np.array(values, dtype=np.float64).reshape(n, d)
    zero = ~X.any(axis=1)
    X[zero, 0] = 1.0  # no zero rows here; bad rows are the corruption strategy's job
    return np.arange(n) * 3 + 1, labels, X


mining_options = st.fixed_dictionaries({
    "margin": st.sampled_from([0.05, 0.2, 0.5, 1.0, 2.5]),
    "distance": st.sampled_from(["squared", "euclidean"]),
    "regimes": st.lists(st.sampled_from(REGIMES), min_size=1, max_size=3, unique=True).map(tuple),
    "select": st.sampled_from(["hardest", "random", "distance-weighted"]),
    "positives_per_anchor": st.integers(1, 4),
    "negatives_per_positive": st.integers(1, 3),
    "max_per_identity": st.one_of(st.none(), st.integers(1, 3)),
    "neighbours": st.sampled_from([1, 3, 100]),
    "seed": st.integers(0, 2**31),
})


def _unit64(X):
    """The table's own float32 unit rows, as float64 (what every decision is made on)."""
    return EmbeddingTable.from_arrays(np.arange(len(X)), np.zeros(len(X), np.int64), X).embeddings.astype(np.float64)


def _near_boundary(d_ap, d_an, margin):
    return abs(d_an - d_ap) < BOUNDARY or abs(d_an - (d_ap + margin)) < BOUNDARY


# ---------------------------------------------------------------------------------------------
# mining
# ---------------------------------------------------------------------------------------------
@settings(max_examples=300, **SETTINGS)
@given(table=small_tables(), options=mining_options)
def test_mined_triplets_satisfy_the_regime_definitions(table, options):
    ids, labels, X = table
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            s = mine((ids, labels, X), return_triplets=True, quiet=True, index="exact", **options)
        except TripletkitError as exc:
            # the legal refusals for a valid table: distance-weighted needs d >= 2, and a margin must
            # stay below the largest distance between unit vectors (2.5 is refused for euclidean)
            assert "\n" not in str(exc)
            unreachable = options["margin"] >= MAX_DISTANCE[options["distance"]]
            assert unreachable or (options["select"] == "distance-weighted" and X.shape[1] < 2), str(exc)
            return
    t = s.triplets
    event("triplets mined" if s.n_triplets else "no triplet")
    m = options["margin"]
    U = _unit64(X)
    cos = U @ U.T  # independent float64 products of the stored unit rows
    D = distance_of_cosine(cos, options["distance"])
    a, p, q = t["anchor"], t["positive"], t["negative"]
    n_trip = a.size
    assert s.n_triplets == n_trip == sum(s.regimes.values())
    assert set(s.regimes) == set(options["regimes"])
    # labels: anchor and positive share one, the negative has another; original values returned
    assert np.all(labels[a] == labels[p]) and np.all(a != p) and np.all(labels[q] != labels[a])
    assert np.array_equal(t["anchor_label"], labels[a]) and np.array_equal(t["negative_label"], labels[q])
    assert np.array_equal(t["anchor_id"], ids[a]) and np.array_equal(t["negative_id"], ids[q])
    # stored distances are the float64 ones rounded to float32
    np.testing.assert_allclose(t["d_ap"], D[a, p], rtol=0, atol=2e-6)
    np.testing.assert_allclose(t["d_an"], D[a, q], rtol=0, atol=2e-6)
    np.testing.assert_allclose(t["violation"], D[a, p] - D[a, q] + m, rtol=0, atol=4e-6)
    counts = dict.fromkeys(options["regimes"], 0)
    for i in range(n_trip):
        stored = REGIMES[t["regime"][i]]
        counts[stored] += 1
        assert stored in options["regimes"]
        dap, dan = D[a[i], p[i]], D[a[i], q[i]]
        if _near_boundary(dap, dan, m):
            continue
        assert stored == regime_name(dap, dan, m), (i, dap, dan, m)
    assert counts == s.regimes
    active = float(np.sum(t["violation"] > 0)) / n_trip if n_trip else None
    assert (s.active_fraction is None) == (active is None)
    if n_trip:
        assert s.active_fraction == pytest.approx(active, abs=1e-9) and 0.0 <= s.active_fraction <= 1.0
    _check_counts_per_pair(s, labels, D, m, options)
    # max_per_identity caps distinct anchors per identity
    if options["max_per_identity"] is not None and n_trip:
        per_identity = np.bincount(labels[np.unique(a)])
        assert per_identity.max() <= options["max_per_identity"]


def _check_counts_per_pair(s, labels, D, m, options):
    """Each drawn (anchor, positive) pair either has min(k, |candidates|) negatives in a regime or
    is counted in pairs_without_negative; hardest takes the smallest d_an."""
    t = s.triplets
    k = options["negatives_per_positive"]
    pairs = s.details["pairs"]
    for r in options["regimes"]:
        sel = t["regime"] == REGIMES.index(r)
        key = t["anchor"][sel] * 10_000 + t["positive"][sel]
        seen = np.unique(key)
        assert seen.size + s.pairs_without_negative[r] == pairs, r
        for ap in seen:
            a, p = divmod(int(ap), 10_000)
            others = np.flatnonzero(labels != labels[a])
            dap = D[a, p]
            dan = D[a, others]
            if any(_near_boundary(dap, x, m) for x in dan):
                continue
            cand = np.sort(dan[[regime_name(dap, x, m) == r for x in dan]])
            got = np.sort(t["d_an"][sel][key == ap].astype(np.float64))
            assert got.size == min(k, cand.size), (r, a, p)
            if options["select"] == "hardest":
                np.testing.assert_allclose(got, cand[: got.size], rtol=0, atol=2e-6)


# ---------------------------------------------------------------------------------------------
# verification
# ---------------------------------------------------------------------------------------------
@st.composite
def exact_unit_tables(draw):
    """Unit rows of integers / 8 (completed to norm 1 by four squares): float32 products are exact,
    so the blocked float32 scores equal the float64 brute force bit for bit; ties are common."""
    n = draw(st.integers(2, 40))
    d = draw(st.integers(1, 4))
    k = draw(st.integers(1, 8))
    labels = np.array(draw(st.lists(st.integers(0, k - 1), min_size=n, max_size=n)), dtype=np.int64)
    v = np.array(draw(st.lists(st.integers(-3, 3), min_size=n * d, max_size=n * d))).reshape(n, d)
    rows = np.zeros((n, d + 4))
    for r in range(n):
        rows[r, :d] = v[r]
        rows[r, d:] = four_squares(int(64 - (v[r] ** 2).sum()))
    return (rows / 8).astype(np.float32), labels


def _brute_fnmr_at_fmr(gen, imp, x):
    """Lowest FNMR over thresholds with FMR <= x (thresholds: every score, and above all of them)."""
    best = 1.0
    for t in np.concatenate([np.unique(np.concatenate([gen, imp])), [np.inf]]):
        if np.mean(imp >= t) <= x:
            best = min(best, float(np.mean(gen < t)))
    return best


def _brute_eer(gen, imp):
    """EER: the crossing of FMR and FNMR, interpolated linearly between the two neighbouring
    thresholds (ascending) where FMR - FNMR changes sign."""
    thr = np.concatenate([np.unique(np.concatenate([gen, imp])), [np.inf]])
    fmr = np.array([np.mean(imp >= t) for t in thr])
    fnmr = np.array([np.mean(gen < t) for t in thr])
    diff = fmr - fnmr
    j = np.flatnonzero(diff >= 0)[-1]
    lam = diff[j] / (diff[j] - diff[j + 1])
    return fmr[j] + lam * (fmr[j + 1] - fmr[j])


TARGETS = (0.01, 0.05, 0.1, 0.25, 0.5)


@settings(max_examples=300, **SETTINGS)
@given(table=exact_unit_tables(), block_rows=st.sampled_from([None, 1, 3, 7]))
def test_verification_rates_are_exact_bounded_and_monotone(table, block_rows):
    x, labels = table
    scores, genuine, _, _ = pair_scores(x, labels)
    gen, imp = scores[genuine], scores[~genuine]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        r = verify_all_pairs(x, labels, fmr_targets=TARGETS, bootstrap=0, block_rows=block_rows)
    assert r["genuine_pairs"] == gen.size and r["impostor_pairs"] == imp.size
    event("degenerate" if gen.size == 0 or imp.size == 0 else "genuine and impostor pairs")
    if gen.size == 0 or imp.size == 0:
        # degenerate: nulls with a reason, no made-up number
        assert r["eer"] is None and r["auc"] is None and r["reason"]
        assert all(e["fnmr"] is None for e in r["fnmr_at_fmr"].values())
        return
    assert 0.0 <= r["auc"] <= 1.0 and 0.0 <= r["eer"] <= 1.0
    assert r["eer"] == pytest.approx(_brute_eer(gen, imp), abs=1e-12)
    if r["auc_exact"]:
        # AUC = P(genuine > impostor) + P(tie) / 2 (Mann-Whitney), over every pair of pairs
        auc = (np.sum(gen[:, None] > imp[None, :]) + 0.5 * np.sum(gen[:, None] == imp[None, :])) / (gen.size * imp.size)
        assert r["auc"] == pytest.approx(auc, abs=1e-12)
    roc, det = r["roc"], r["det"]
    for values in (roc["fpr"], roc["tpr"], det["fmr"], det["fnmr"]):
        assert all(0.0 <= v <= 1.0 for v in values)
    assert np.all(np.diff(roc["fpr"]) >= 0) and np.all(np.diff(roc["tpr"]) >= 0)
    assert np.all(np.diff(roc["threshold"]) <= 0)
    order = np.argsort(det["fmr"], kind="stable")
    assert np.all(np.diff(np.asarray(det["fnmr"])[order]) <= 0)
    previous = 1.0
    for target in TARGETS:
        entry = r["fnmr_at_fmr"][f"{target:g}"]
        if imp.size < 3.0 / target:  # rule of 3 (common practice in biometric testing)
            assert entry["fnmr"] is None and entry["reason"]
            continue
        assert entry["fnmr"] == pytest.approx(_brute_fnmr_at_fmr(gen, imp, target), abs=1e-12)
        # the reported threshold reaches the target: FMR(t) <= x and FNMR(t) is the value
        t = entry["threshold"]
        assert np.mean(imp >= t) <= target and np.mean(gen < t) == pytest.approx(entry["fnmr"], abs=1e-12)
        assert entry["fnmr"] <= previous
        previous = entry["fnmr"]


# ---------------------------------------------------------------------------------------------
# no crash other than TripletkitError
# ---------------------------------------------------------------------------------------------
@st.composite
def maybe_corrupt(draw):
    """A small table, possibly with one defect the contract forbids."""
    ids, labels, X = draw(small_tables(max_rows=20))
    defect = draw(st.sampled_from(["none", "none", "nan", "inf", "zero", "duplicate-id", "ragged-labels"]))
    row = draw(st.integers(0, len(ids) - 1))
    if defect == "nan":
        X[row, 0] = np.nan
    elif defect == "inf":
        X[row, -1] = np.inf
    elif defect == "zero":
        X[row] = 0.0
    elif defect == "duplicate-id":
        ids = ids.copy()
        ids[row] = ids[(row + 1) % len(ids)]
    elif defect == "ragged-labels":
        labels = labels[:-1]
    return defect, (ids, labels, X)


evaluation_options = st.fixed_dictionaries({
    "fmr": st.lists(st.sampled_from([1e-4, 1e-3, 0.01, 0.1, 0.5, 1.0]), min_size=1, max_size=3, unique=True)
    .map(tuple),
    "bootstrap": st.sampled_from([0, 5]),
    "recall_k": st.lists(st.integers(1, 30), min_size=1, max_size=3, unique=True).map(tuple),
    "clustering": st.booleans(),
    "plots": st.just(False),
    "block_rows": st.sampled_from([0, 1, 4]),
    "seed": st.integers(0, 1000),
})


@settings(max_examples=80, **SETTINGS)
@given(case=maybe_corrupt(), options=evaluation_options, drop=st.booleans())
def test_score_gives_a_report_or_one_clear_line(case, options, drop):
    defect, table = case
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            report = score(table, config=EvaluationConfig(**options), quiet=True,
                           table_options={"drop_invalid": drop})
            event("report")
        except TripletkitError as exc:
            event("refused")
            assert "\n" not in str(exc)
            assert defect != "none", str(exc)  # a valid table is never refused
            return
    assert defect in ("none",) or (drop and defect in ("nan", "inf", "zero"))
    json.dumps(report, allow_nan=False)  # plain JSON values, nulls instead of NaN
    ver = report["verification"]
    for key in ("auc", "eer"):
        assert ver[key] is None or 0.0 <= ver[key] <= 1.0
    for entry in ver["fnmr_at_fmr"].values():
        assert entry["fnmr"] is None or 0.0 <= entry["fnmr"] <= 1.0
        if entry["ci"] is not None:
            assert 0.0 <= entry["ci"][0] <= entry["ci"][1] <= 1.0
    for value in report["retrieval"]["recall_at_k"].values():
        assert value is None or 0.0 <= value <= 1.0


@settings(max_examples=150, **SETTINGS)
@given(case=maybe_corrupt(), options=mining_options, drop=st.booleans())
def test_mine_gives_a_summary_or_one_clear_line(case, options, drop):
    defect, table = case
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            s = mine(table, config=MiningConfig(**options), quiet=True, table_options={"drop_invalid": drop})
        except TripletkitError as exc:
            assert "\n" not in str(exc)
            assert defect != "none" or options["select"] == "distance-weighted", str(exc)
            return
    assert defect == "none" or (drop and defect in ("nan", "inf", "zero"))
    d = s.to_dict()
    json.dumps(d, allow_nan=False)
    assert d["triplets"] == sum(d["regimes"].values())
    assert d["active_fraction"] is None or 0.0 <= d["active_fraction"] <= 1.0


def test_distance_weighted_never_drops_a_pair_silently():
    # found by test_mined_triplets_satisfy_the_regime_definitions; rows of dimension 2: ten of
    # identity 0 at (1, 0), one of identity 0 at (-1, 0), one of identity 1 at (1, 0). The pairs
    # anchored at (-1, 0) have d_ap = d_an = 4 (semi-hard: d_ap <= d_an < d_ap + alpha) and
    # their only negative is antipodal.
    X = np.array([[1.0, 0.0]] * 10 + [[-1.0, 0.0], [1.0, 0.0]])
    labels = np.array([0] * 11 + [1])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        s = mine((np.arange(12), labels, X), return_triplets=True, quiet=True, index="exact", margin=0.05,
                 regimes=("semi-hard",), select="distance-weighted", positives_per_anchor=1, seed=0)
    got = np.unique(s.triplets["anchor"] * 100 + s.triplets["positive"]).size
    assert got + s.pairs_without_negative["semi-hard"] == s.details["pairs"] == 11
