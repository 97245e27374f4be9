"""tripletkit.mining.easy: easy negatives by rejection sampling, from the first top-k, and by the
exact scan, against the brute force."""

import pytest
from _support import all_pairs, check_every_triplet, chosen_negatives, clustered_table, distances, regime_candidates

from tripletkit.mining import mine


@pytest.mark.parametrize("select", ["random", "hardest", "distance-weighted"])
def test_easy_when_rare_falls_back_to_exact_scan(seed, select):
    table = clustered_table(seed + 5, identities=20, per=6, dim=8)
    margin = 2.6  # easy needs d_an >= d_ap + 2.6 on [0, 4]: rare, often impossible
    s = mine(table, regimes=("easy",), select=select, margin=margin, positives_per_anchor=100,
             negatives_per_positive=2, neighbours=5, quiet=True, return_triplets=True)
    check_every_triplet(table, s, margin, "squared")
    D, _ = distances(table.embeddings, "squared")
    got = chosen_negatives(s)
    without = 0
    for a, p in all_pairs(table.labels):
        cand = regime_candidates(table.labels, D, a, p, "easy", margin)
        mined = got.get((a, p, "easy"), [])
        assert len(mined) == min(2, cand.size)
        assert set(mined) <= set(cand.tolist())
        if select == "hardest":
            assert mined == cand[:2].tolist()
        without += cand.size == 0
    assert 0 < without < len(all_pairs(table.labels))
    assert s.pairs_without_negative["easy"] == without
    assert s.details["easy_scanned_pairs"] > 0


def test_easy_hardest_from_top_k_equals_brute_force(seed):
    table = clustered_table(seed + 6)
    s = mine(table, regimes=("easy",), select="hardest", margin=0.1, positives_per_anchor=100,
             negatives_per_positive=2, quiet=True, return_triplets=True)
    D, _ = distances(table.embeddings, "squared")
    got = chosen_negatives(s)
    for a, p in all_pairs(table.labels):
        assert got.get((a, p, "easy"), []) == regime_candidates(table.labels, D, a, p, "easy", 0.1)[:2].tolist()
    # with 100 neighbours of 300 rows the top-k holds the nearest easy rows: little scanning
    assert s.details["easy_scanned_pairs"] < s.details["pairs"]
