"""tripletkit.mining.search: the search path widens beyond the first neighbours (range search, or
doubling k for HNSW) and finds what a brute force finds."""

import numpy as np
from _support import all_pairs, check_every_triplet, chosen_negatives, clustered_table, distances, regime_candidates

from tripletkit.mining import mine


def test_widening_finds_semi_hard_beyond_first_neighbours(seed):
    """Tight identities fill the first k neighbours; the semi-hard band lies beyond them."""
    table = clustered_table(seed + 4, identities=24, per=12, spread=0.5, family=4, family_spread=0.6)
    D, _ = distances(table.embeddings, "squared")
    k_first = 4
    # the premise: for many anchors the k-th neighbour is a same-identity row, yet brute force
    # finds semi-hard negatives
    nearest = np.argsort(D, axis=1, kind="stable")[:, 1:k_first + 1]
    assert np.mean(np.all(table.labels[nearest] == table.labels[:, None], axis=1)) > 0.5
    s = mine(table, regimes=("semi-hard", "hard"), select="hardest", neighbours=k_first, positives_per_anchor=100,
             negatives_per_positive=2, quiet=True, return_triplets=True, dense=False)
    assert s.details["widened_queries"] > 0
    got = chosen_negatives(s)
    found = 0
    for a, p in all_pairs(table.labels):
        for r in ("semi-hard", "hard"):
            want = regime_candidates(table.labels, D, a, p, r, 0.2)[:2].tolist()
            assert got.get((a, p, r), []) == want
            found += bool(want)
    assert found > 0
    wide = mine(table, regimes=("semi-hard", "hard"), select="hardest", neighbours=10_000, positives_per_anchor=100,
                negatives_per_positive=2, quiet=True, return_triplets=True, dense=False)
    assert wide.details["widened_queries"] == 0
    for key in ("anchor", "positive", "negative", "regime"):
        assert np.array_equal(wide.triplets[key], s.triplets[key])


def test_hnsw_widens_by_doubling_and_agrees(seed):
    table = clustered_table(seed + 4, identities=24, per=12, spread=0.5, family=4, family_spread=0.6)
    ex = mine(table, index="exact", select="hardest", neighbours=4, quiet=True, return_triplets=True)
    hn = mine(table, index="hnsw", select="hardest", neighbours=4, threads=1, quiet=True, return_triplets=True)
    assert hn.details["widened_queries"] > 0
    assert hn.recall is not None and 0.99 <= hn.recall <= 1.0
    check_every_triplet(table, hn, 0.2, "squared")
    # on 288 rows with ef_search 128 the graph walk sees everything: same triplets as exact
    assert np.array_equal(ex.triplets["negative"], hn.triplets["negative"])
