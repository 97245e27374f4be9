"""Tests of tripletkit.metrics.refine: the kept highest impostors and the choice of bins to list."""

import numpy as np
import pytest

from tripletkit.engines import LocalEngine
from tripletkit.metrics.allpairs import BlockPlan, Blocks
from tripletkit.metrics.bins import NBINS, keys_of
from tripletkit.metrics.refine import COLLECT, WINDOW, TopImpostors, choose_bins, keep_per_group, operating_bins
from _support import clustered_rows


@pytest.mark.parametrize("workers", [1, 3])  # with 3, each group keeps its own; the merge is complete
def test_kept_impostors_are_exactly_those_above_the_floor(rng, workers):  # from the highest floor
    # the floor rises as blocks are counted; the kept set is every impostor in the bins from the
    # floor up, and at least the number asked for
    x, labels = clustered_rows(rng, 300, 16, 30, noise=0.9)
    blocks = Blocks(x, labels, None, 17)
    top = TopImpostors(500, 300 * 299 // 2, 1 << 16)
    BlockPlan(blocks, LocalEngine(threads=workers), workers, 1 << 20).count(top)
    every = np.concatenate([v for r0 in blocks.block_starts()
                            for v, _, _ in blocks.impostors_at_or_above(r0, blocks.product(r0), -np.inf, 1 << 16)])
    keys, kept, rows, cols = top.result()
    assert top.floor > 1 and kept.size >= 500
    assert np.array_equal(np.sort(kept), np.sort(every[keys_of(every) >= top.floor]))
    assert np.all(blocks.codes[rows] != blocks.codes[cols])


def test_groups_keep_a_part_and_a_quarter_more():
    assert keep_per_group(1000, 1) == 1000
    assert keep_per_group(1000, 4) == 313  # ceil(1.25 * 1000 / 4)


def test_chosen_bins_hold_each_operating_point_and_the_next_non_empty_bin():
    # impostors in bins 10 (x 6), 20 (x 3), 30 (x 1); genuines in bins 25 (x 2) and 40 (x 8)
    imp = np.zeros(NBINS, np.int64)
    imp[[10, 20, 30]] = [6, 3, 1]
    gen = np.zeros(NBINS, np.int64)
    gen[[25, 40]] = [2, 8]
    # FMR 0.1 allows 1 false match of 10: the 2nd highest impostor (bin 20) decides; FMR 0.4: the
    # 5th (bin 10); FMR 1: every threshold, no bin
    ops = operating_bins(imp, [0.1, 0.4, 1.0], 10)
    assert ops == {0.1: 20, 0.4: 10}
    listing = choose_bins(gen, imp, ops, None, identities=3, groups=0, exact_auc=False, auc_budget=0)
    # op bins 10 and 20 with their next non-empty bins (20, 25); the EER: FMR - FNMR at the first
    # score of bins 10, 20, 25, 30, 40 is 1, 0.4, 0.1, -0.1, -0.2: bin 25 and the next, 30
    assert listing.collect_bins.tolist() == [10, 20, 25, 30]
    assert listing.lowest == 10 and listing.selection.window_start == NBINS
    assert np.flatnonzero(listing.selection.code).tolist() == [10, 20, 25, 30]
    assert set(listing.selection.code[[10, 20, 25, 30]].tolist()) == {COLLECT}


def test_the_window_starts_at_the_bootstrap_grid_or_the_first_operating_bin():
    imp = np.zeros(NBINS, np.int64)
    imp[[10, 20, 30]] = [6, 3, 1]
    gen = np.zeros(NBINS, np.int64)
    gen[[25, 40]] = [2, 8]
    ops = {0.1: 20}
    grid = np.array([12, 20, 30])
    listing = choose_bins(gen, imp, ops, grid, identities=3, groups=0, exact_auc=False, auc_budget=0)
    assert listing.selection.window_start == 12 and listing.lowest == 12
    # cell j holds bins [grid_j, grid_j+1), the last one every bin from 30 up: bins 12, 19, 20, 30, 42
    assert listing.selection.cell_of[[0, 7, 8, 18, 30]].tolist() == [0, 0, 1, 2, 2]
    assert (listing.selection.code[12:] & WINDOW).all() and not (listing.selection.code[:12] & WINDOW).any()
    with_groups = choose_bins(gen, imp, ops, grid, identities=3, groups=2, exact_auc=False, auc_budget=0)
    # groups need every impostor from the first operating bin up, counted in cells around it
    assert with_groups.selection.window_start == 12  # the grid reaches lower than bin 20
    cells = with_groups.selection.group_cell_of
    assert cells[[20 - 12, 21 - 12, 19 - 12]].tolist() == [1, 2, 0]
