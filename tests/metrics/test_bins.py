"""Tests of tripletkit.metrics.bins: bin keys, counting, and score counts rebuilt from bins."""

import numpy as np

from tripletkit.metrics import bins as B
from tripletkit.metrics.rates import count_scores


def test_histogram_counting_matches_bincount(rng):
    keys = rng.integers(1, B.NBINS, size=100_000).astype(np.int32)
    acc = np.zeros(B.NBINS, np.int64)
    B.add_histogram(keys, acc)
    assert np.array_equal(acc, np.bincount(keys, minlength=B.NBINS))


def test_keys_are_monotone_and_bin_edges_are_exact(rng):
    # scaled scores are exact cosines times 2**18: multiples of 2**-34 (see tripletkit._exact)
    s = np.sort(np.rint(rng.uniform(-1.001, 1.001, 200_000) * 2.0**52) * 2.0**-34)
    k = B.keys_of(s)
    assert np.all(np.diff(k) >= 0) and k.min() >= 1 and k.max() < B.NBINS
    for key in (int(k[10]), int(k[100_000]), int(k[-5])):
        edge = B.lowest_scaled_in(key)
        assert B.keys_of(np.array([edge]))[0] == key
        below = edge - 2.0**-34  # the next lower score on the grid
        assert B.keys_of(np.array([below]))[0] == key - 1


def _hist(keys):
    return np.bincount(keys, minlength=B.NBINS).astype(np.int64)


def test_score_counts_with_every_bin_listed_equal_the_exact_counts(rng):
    # scores on a coarse grid: many ties within and across the two sides
    genuine = rng.integers(-40, 200, 3000) / 256
    impostor = rng.integers(-200, 60, 9000) / 256
    gkeys = B.keys_of(genuine * B.SCORE_SCALE).astype(np.int64)
    ikeys = B.keys_of(impostor * B.SCORE_SCALE).astype(np.int64)
    every_bin = np.unique(ikeys)
    counts = B.score_counts(genuine, gkeys, impostor, every_bin, _hist(gkeys), _hist(ikeys))
    ref = count_scores(genuine, impostor)
    assert all(np.array_equal(a, b) for a, b in zip(counts, ref))


def test_unlisted_bins_become_one_tied_entry_at_their_middle(rng):
    genuine = np.array([0.5, 0.25])
    impostor = np.array([0.1, 0.1 + 2.0**-30, -0.3])  # the first two share a bin
    gkeys = B.keys_of(genuine * B.SCORE_SCALE).astype(np.int64)
    ikeys = B.keys_of(impostor * B.SCORE_SCALE).astype(np.int64)
    listed = ikeys == ikeys[2]
    counts = B.score_counts(genuine, gkeys, impostor[listed], ikeys[listed], _hist(gkeys), _hist(ikeys))
    middle = float(B.bin_value(ikeys[0]))
    assert abs(middle - 0.1) <= 2.0**-18
    assert counts.thresholds.tolist() == [-0.3, middle, 0.25, 0.5]
    assert counts.genuine.tolist() == [0, 0, 1, 1] and counts.impostor.tolist() == [1, 2, 0, 0]
