"""tripletkit.mining.select: the counter-based draws, Floyd's sampler, the choice inside ranges of a
candidate list, and the counting helpers on ragged segments, each against a plain twin.
(distance-weighted sampling against its published target lives in tests/external.)"""

from itertools import combinations

import numpy as np
import pytest
from scipy.stats import chisquare, kstest

from tripletkit.mining.select import (choose, count_below, distance_log_weights, floyd, ragged, rank_in_groups,
                                      top_in_groups, uniform)


def test_floyd_is_uniform_over_subsets(seed):
    m, k, draws = 5, 2, 20_000
    off = floyd(np.full(draws, m), k, np.uint64(seed), np.arange(draws))
    assert np.all((off >= 0) & (off < m))
    assert np.all(off[:, 0] != off[:, 1])
    subsets = {c: i for i, c in enumerate(combinations(range(m), k))}
    idx = [subsets[tuple(sorted(r))] for r in off.tolist()]
    counts = np.bincount(idx, minlength=len(subsets))
    assert chisquare(counts).pvalue > 1e-3
    # short rows take everything, padded with -1
    assert floyd(np.array([1, 0]), 3, np.uint64(1), np.arange(2)).tolist() == [[0, -1, -1], [-1, -1, -1]]


def test_uniform_hash_is_uniform_and_counter_driven(seed):
    u = uniform(np.uint64(seed), np.arange(50_000), 3)
    assert np.all((u > 0) & (u < 1))
    assert kstest(u, "uniform").pvalue > 1e-3
    assert np.array_equal(u[100:200], uniform(np.uint64(seed), np.arange(100, 200), 3))
    assert not np.array_equal(u[:100], uniform(np.uint64(seed + 1), np.arange(100), 3))


def test_hardest_and_random_choose_inside_ranges():
    lo, hi = np.array([0, 3, 3]), np.array([3, 3, 7])
    owner, idx = choose("hardest", lo, hi, 2, (np.arange(3), 0, 1), (np.uint64(1), np.uint64(2)))
    assert owner.tolist() == [0, 0, 2, 2] and idx.tolist() == [0, 1, 3, 4]
    owner, idx = choose("random", lo, hi, 2, (np.arange(3), 0, 1), (np.uint64(1), np.uint64(2)))
    assert owner.tolist() == [0, 0, 2, 2]
    assert np.all((idx >= lo[owner]) & (idx < hi[owner]))


def test_weighted_choice_hangs_on_rows_not_list_positions():
    # the same candidates listed in another order get the same draws
    lo, hi = np.array([0]), np.array([6])
    rows = np.array([10, 11, 12, 13, 14, 15])
    logw = distance_log_weights(np.linspace(0.6, 1.6, 6), 8)
    keys = (np.uint64(1), np.uint64(2))
    owner, idx = choose("distance-weighted", lo, hi, 3, (np.array([4]), 5, 1), keys, rows=rows, logw=logw)
    perm = np.array([3, 0, 5, 1, 4, 2])
    owner2, idx2 = choose("distance-weighted", lo, hi, 3, (np.array([4]), 5, 1), keys, rows=rows[perm],
                          logw=logw[perm])
    assert owner.tolist() == owner2.tolist() == [0, 0, 0]
    assert sorted(rows[idx].tolist()) == sorted(rows[perm][idx2].tolist())


@pytest.mark.parametrize("k", [1, 3, 40])
def test_top_in_groups_equals_a_full_sort(rng, k):
    """The k best of each group by (-score, row) equal the head of a lexsort of every entry,
    with tied scores (rounded values, -0.0 against 0.0), -inf entries and groups shorter than k."""
    sizes = rng.integers(1, 30, 200)
    groups = np.repeat(np.arange(sizes.size), sizes)
    rows = np.concatenate([rng.permutation(1000)[:m] for m in sizes])
    score = np.round(rng.standard_normal(groups.size), 1)
    score[rng.random(groups.size) < 0.05] = -0.0
    score[rng.random(groups.size) < 0.05] = -np.inf
    order = np.lexsort((rows, -score, groups))
    order = order[np.isfinite(score[order])]
    want = order[np.concatenate([np.arange(m) for m in np.bincount(groups[order], minlength=sizes.size)]) < k]
    assert np.array_equal(top_in_groups(groups, score, rows, k), want)
    assert top_in_groups(groups[:0], score[:0], rows[:0], k).size == 0


def test_count_below_matches_searchsorted(rng):
    values = np.sort(rng.random(50))
    lo = rng.integers(0, 50, 40)
    hi = np.minimum(50, lo + rng.integers(0, 20, 40))
    x = rng.random(40)
    want = [int(np.searchsorted(values[a:b], v, side="left")) for a, b, v in zip(lo, hi, x)]
    assert count_below(values, lo, hi, x).tolist() == want


def test_ragged_and_rank_in_groups():
    assert ragged([2, 0, 3]).tolist() == [0, 1, 0, 1, 2]
    assert ragged(np.zeros(0, np.int64)).size == 0
    assert rank_in_groups(np.array([4, 4, 7, 9, 9, 9])).tolist() == [0, 1, 0, 0, 1, 2]
    assert rank_in_groups(np.zeros(0, np.int64)).size == 0
