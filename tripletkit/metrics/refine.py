"""Refinement of the score histogram: which bins to list exactly, and the listing itself.

The first pass of the all-pairs verification counts every score into the bins of
:mod:`.bins`. Counts are exact, so FMR and FNMR are exact at every bin edge; what is left is the
order inside the few bins that hold an operating point (each FMR target and the EER crossing,
with the next non-empty bin), plus the bins the AUC should not count as ties. :func:`choose_bins`
picks them and the window of bins whose impostors the bootstrap and the groups count per
identity and per group (a :class:`BinSelection`); a :class:`Refiner` then lists their exact
impostor scores, from the highest impostor scores kept during the first pass
(:class:`TopImpostors`) when those reach low enough, else from a second pass over the blocks.
"""

from __future__ import annotations

import copy
import math
from typing import NamedTuple

import numpy as np

from .bins import NBINS, keys_of, lowest_scaled_in
from .rates import max_false_matches

__all__ = ["COLLECT", "WINDOW", "BinSelection", "Listing", "Refiner", "TopImpostors", "choose_bins", "keep_per_group",
           "operating_bins"]

#: Code of a bin whose exact impostor scores are listed.
COLLECT = np.uint8(1)
#: Code of a bin whose impostors are counted per identity and per group (the window).
WINDOW = np.uint8(2)
# Scores buffered before the per-identity window counts are added up.
_PENDING_SCORES = 1 << 24


def keep_per_group(keep, groups):
    """Highest impostor scores each of ``groups`` groups of blocks keeps when together they should
    keep ``keep``: each sees about 1/groups of the pairs, so its floor settles at about the same
    score; the quarter more covers groups whose blocks hold more high scores than others."""
    return keep if groups <= 1 else int(math.ceil(1.25 * keep / groups))


class TopImpostors:
    """Keep, during the first pass, every impostor score in the bins at or above a rising floor.

    The floor is a bin, and it only rises: when it does, the kept scores below it are dropped.
    So the kept set is at every moment exactly the impostor scores seen in bins from the floor
    up, and at the end every bin from the floor up is complete, wherever the floor went. It
    starts where the first block's impostor scores put twice the wanted share (``keep`` of
    ``impostor_pairs``) above it, and when more than ``3 * keep`` scores are kept it moves up to
    the bin of the ``keep``-th highest kept one. A start too high only means that the kept scores
    may not reach the bins the operating points need; then a second pass lists them.
    """

    def __init__(self, keep, impostor_pairs, chunk):
        self.keep = int(keep)
        self.share = min(1.0, 2.0 * keep / max(impostor_pairs, 1))
        self.chunk = chunk
        self._empty()

    def _empty(self):
        self.floor = 1  # lowest bin kept; 1 = every pair
        self.vals, self.keys, self.rows, self.cols = [], [], [], []
        self.count = 0

    def start(self, first_block_impostors):
        """Set the first floor from the impostor histogram of the first block."""
        at_or_above = np.cumsum(first_block_impostors[::-1])[::-1]
        enough = np.flatnonzero(at_or_above >= self.share * at_or_above[0])
        if enough.size and self.share < 1.0:
            self.floor = max(self.floor, int(enough[-1]))

    def visit(self, blocks, r0, scaled):
        """Keep the impostor scores of one block at or above the floor; raise the floor if too many."""
        lowest = lowest_scaled_in(self.floor)
        for v, r, c in blocks.impostors_at_or_above(r0, scaled, lowest, self.chunk):
            self.vals.append(v)
            self.keys.append(keys_of(v))
            self.rows.append(r.astype(np.int32))
            self.cols.append(c.astype(np.int32))
            self.count += v.size
        if self.count > 3 * self.keep:
            k = np.concatenate(self.keys)
            floor = int(np.partition(k, k.size - self.keep)[k.size - self.keep])
            up = k >= floor
            self.vals = [np.concatenate(self.vals)[up]]
            self.rows = [np.concatenate(self.rows)[up]]
            self.cols = [np.concatenate(self.cols)[up]]
            self.keys = [k[up]]
            self.count = int(up.sum())
            self.floor = floor

    def empty(self):
        """An empty instance with the same settings."""
        other = copy.copy(self)
        other._empty()
        return other

    def fresh(self, groups):
        """An empty instance for one of ``groups`` groups of blocks: the same share of its own
        impostors, and a part of ``keep`` (see :func:`keep_per_group`)."""
        other = self.empty()
        other.keep = keep_per_group(self.keep, groups)
        return other

    def absorb(self, parts):
        """Become the union of ``parts`` (instances that each saw some blocks), complete from the
        highest of their floors: every part holds every impostor of its blocks from its own floor
        up, so the union restricted to the highest floor holds every impostor from there up.
        The parts' arrays stay separate runs (see :meth:`parts`)."""
        self.floor = max([self.floor] + [p.floor for p in parts])
        self.vals, self.keys, self.rows, self.cols = [], [], [], []
        self.count = 0
        for p in parts:
            for kk, kv, kr, kc in zip(p.keys, p.vals, p.rows, p.cols):
                if p.floor < self.floor:
                    up = kk >= self.floor
                    kk, kv, kr, kc = kk[up], kv[up], kr[up], kc[up]
                self.keys.append(kk)
                self.vals.append(kv)
                self.rows.append(kr)
                self.cols.append(kc)
                self.count += kk.size

    def parts(self):
        """The kept (keys, scaled values, rows, cols) as runs that can be processed apart."""
        return list(zip(self.keys, self.vals, self.rows, self.cols))

    def result(self):
        """The kept (keys, scaled values, rows, cols), each as one array."""
        if not self.vals:
            return np.empty(0, np.int32), np.empty(0, np.float64), np.empty(0, np.int64), np.empty(0, np.int64)
        return (np.concatenate(self.keys), np.concatenate(self.vals), np.concatenate(self.rows).astype(np.int64),
                np.concatenate(self.cols).astype(np.int64))

    def complete_from(self):
        """Lowest bin all of whose impostor scores were kept."""
        return self.floor


class BinSelection(NamedTuple):
    """What a :class:`Refiner` does with an impostor score, by its bin.

    Attributes
    ----------
    code : ndarray of uint8, shape (NBINS,)
        :data:`COLLECT` (list the exact score), :data:`WINDOW` (count it per identity and group),
        both, or 0.
    window_start : int
        First bin of the window (NBINS: no window).
    cell_of : ndarray of int, shape (NBINS - window_start,) or None
        Bootstrap grid cell of each window bin (-1: below the grid); None without a bootstrap.
    identities, cells : int
        Shape of the per-identity window counts.
    group_cell_of : ndarray of int or None
        Group cell of each window bin (below the first operating bin, that bin, between, ...).
    groups, group_cells : int
        Shape of the per-group window counts.
    """

    code: np.ndarray
    window_start: int
    cell_of: np.ndarray | None
    identities: int
    cells: int
    group_cell_of: np.ndarray | None
    groups: int
    group_cells: int


class Refiner:
    """List exact impostor scores of chosen bins; count the window per identity and per group.

    Scores arrive either from a second pass over the blocks (:meth:`visit`) or from the impostors
    kept in the first pass (:meth:`process`). Refiners that saw different blocks are merged with
    :meth:`export` and :meth:`absorb`.
    """

    def __init__(self, selection):
        self.selection = selection
        self.code = selection.code
        self.want = self.code != 0
        nz = np.flatnonzero(self.code)
        self.kmin = int(nz[0]) if nz.size else NBINS
        self.smin = lowest_scaled_in(self.kmin) if nz.size else None
        self.values, self.keys, self.pgroup = [], [], []
        self.win = None
        if selection.cell_of is not None:
            self.win = np.zeros(selection.identities * selection.cells, np.int64)
        self.gwin = None
        if selection.group_cell_of is not None:
            self.gwin = np.zeros(selection.groups * selection.group_cells, np.int64)
        self._pending = []
        self._pending_n = 0
        self.examined = 0  # scores looked at more closely (for benchmarks)

    def _flush(self):
        if self._pending:
            self.win += np.bincount(np.concatenate(self._pending), minlength=self.win.size)
            self._pending, self._pending_n = [], 0

    def visit(self, blocks, r0, scaled, chunk, use_table):
        """Second pass over one block: by comparison with the lowest chosen bin, or (``use_table``)
        by looking every score's bin up."""
        if self.smin is None:
            return
        if not use_table:
            for v, row, col in blocks.impostors_at_or_above(r0, scaled, self.smin, chunk):
                self.process(blocks, keys_of(v), v, row, col)
            return
        rows, m = scaled.shape
        step = max(1, int(chunk // max(m, 1)))
        for a in range(0, rows, step):
            part = scaled[a : a + step]
            kk = keys_of(part, blocks.key_buffer()[: part.size].reshape(part.shape))
            sel = np.flatnonzero(self.want[kk])
            if sel.size == 0:
                continue
            row, col = np.divmod(sel, m)
            row += r0 + a
            col += r0
            imp = blocks.codes[row] != blocks.codes[col]
            sel = sel[imp]
            self.process(blocks, kk.reshape(-1)[sel], part.reshape(-1)[sel], row[imp], col[imp])

    def process(self, blocks, keys, scaled, row, col):
        """Impostor scores (keys, scaled values, rows, cols), in any order, each seen once."""
        keep = self.want[keys]
        keys, scaled, row, col = keys[keep], scaled[keep], row[keep], col[keep]
        self.examined += keys.size
        if keys.size == 0:
            return
        codes = self.code[keys]
        pair_group = None
        if blocks.gcodes is not None:
            ga, gb = blocks.gcodes[row], blocks.gcodes[col]
            pair_group = np.where(ga == gb, ga, -1)
        take = (codes & COLLECT) != 0
        if take.any():
            self.values.append(scaled[take])
            self.keys.append(keys[take])
            if pair_group is not None:
                self.pgroup.append(pair_group[take])
        win = (codes & WINDOW) != 0
        if win.any():
            self._count_window(blocks, keys[win].astype(np.int64) - self.selection.window_start, row[win],
                               col[win], None if pair_group is None else pair_group[win])

    def _count_window(self, blocks, offsets, row, col, pair_group):
        sel = self.selection
        if sel.cell_of is not None:
            cell = sel.cell_of[offsets]
            ok = cell >= 0
            cell = cell[ok]
            for ident in (blocks.codes[row[ok]], blocks.codes[col[ok]]):
                # a pair counts for both of its identities; counted in large batches
                self._pending.append(ident * sel.cells + cell)
                self._pending_n += cell.size
            if self._pending_n > _PENDING_SCORES:
                self._flush()
        if sel.group_cell_of is not None:
            same = pair_group >= 0
            self.gwin += np.bincount(pair_group[same] * sel.group_cells + sel.group_cell_of[offsets[same]],
                                     minlength=self.gwin.size)

    def export(self):
        """What this refiner gathered, for :meth:`absorb` by one built with the same selection."""
        vals, keys, pg = self.finish()
        return vals, keys, pg, self.win, self.gwin, self.examined

    def absorb(self, part):
        """Add what another refiner (same selection) gathered from other blocks (see :meth:`export`)."""
        vals, keys, pg, win, gwin, examined = part
        self.values.append(vals)
        self.keys.append(keys)
        if pg is not None:
            self.pgroup.append(pg)
        if win is not None:
            self.win += win
        if gwin is not None:
            self.gwin += gwin
        self.examined += int(examined)

    def finish(self):
        """The listed (scaled values, keys, pair groups or None); the window counts are complete."""
        if self.win is not None:
            self._flush()
        vals = np.concatenate(self.values) if self.values else np.empty(0, np.float64)
        keys = np.concatenate(self.keys) if self.keys else np.empty(0, np.int32)
        pg = np.concatenate(self.pgroup) if self.pgroup else None
        return vals, keys, pg


# ---------------------------------------------------------------------------------------------
# which bins to list
# ---------------------------------------------------------------------------------------------
def _eer_bin(nonempty, imp_hist, gen_hist, genuine_pairs, impostor_pairs):
    """Non-empty bin holding the last threshold with FMR - FNMR >= 0."""
    imp_ge = np.cumsum(imp_hist[nonempty][::-1])[::-1]  # impostors in this bin and above
    gen_lt = np.cumsum(gen_hist[nonempty]) - gen_hist[nonempty]  # genuines below this bin
    d = imp_ge / impostor_pairs - gen_lt / genuine_pairs  # D at the first score of each non-empty bin
    return int(nonempty[int(np.flatnonzero(d >= 0)[-1])])


def _auc_bins(both, gen_hist, imp_hist, budget, lowest=None):
    """Bins holding genuine and impostor scores to list for an exact AUC, most valuable first."""
    if lowest is not None:
        both = both[both >= lowest]
    cost = imp_hist[both]
    if cost.sum() <= budget:
        return both
    order = np.argsort(-(gen_hist[both] * imp_hist[both]), kind="stable")
    fit = np.cumsum(cost[order]) <= budget
    return np.sort(both[order[fit]])


def operating_bins(imp_hist, targets, impostor_pairs):
    """Bin of each FMR target's operating point: that of the (m+1)-th highest impostor score,
    m the most false matches the target allows (none when every threshold is allowed)."""
    imp_ge_bin = np.cumsum(imp_hist[::-1])[::-1]  # impostors in bin k and above
    bins = {}
    for target in targets:
        most = max_false_matches(target, impostor_pairs)
        if most >= impostor_pairs:
            continue  # every threshold is allowed; the lowest score decides, no bin to resolve
        bins[target] = int(np.flatnonzero(imp_ge_bin >= most + 1)[-1])
    return bins


class Listing(NamedTuple):
    """The bins :func:`choose_bins` chose: a selection for a :class:`Refiner` and what it means."""

    selection: BinSelection
    collect_bins: np.ndarray  # bins whose exact impostor scores are listed, ascending
    lowest: int  # lowest bin the listing needs complete
    op_bins: np.ndarray  # distinct operating bins, ascending (the group cells' edges)


def choose_bins(gen_hist, imp_hist, op_bins, grid_keys, identities, groups, exact_auc, auc_budget):
    """Bins to list exactly and the window to count, for the operating points, AUC, bootstrap and groups.

    Parameters
    ----------
    gen_hist, imp_hist : ndarray of int64, shape (NBINS,)
        Genuine and impostor pairs per bin (first pass).
    op_bins : dict
        :func:`operating_bins`.
    grid_keys : ndarray of int or None
        The bootstrap grid's bins (None: no bootstrap).
    identities, groups : int
        Number of identities, and of groups (0: no groups).
    exact_auc : {"auto", True, False}
        See :func:`tripletkit.metrics.verification.verify_all_pairs`.
    auc_budget : int
        Most impostor scores to list for the AUC.
    """
    nonempty = np.flatnonzero(gen_hist + imp_hist)
    needed = set()

    def with_next(b):  # a bin and the next non-empty one
        needed.add(int(b))
        pos = np.searchsorted(nonempty, b, side="right")
        if pos < nonempty.size:
            needed.add(int(nonempty[pos]))

    for b in op_bins.values():
        with_next(b)
    genuine_pairs, impostor_pairs = int(gen_hist.sum()), int(imp_hist.sum())
    with_next(_eer_bin(nonempty, imp_hist, gen_hist, genuine_pairs, impostor_pairs))
    distinct_ops = np.unique(np.fromiter(op_bins.values(), np.int64, len(op_bins)))
    window_start = NBINS if grid_keys is None else int(grid_keys[0])
    if groups and distinct_ops.size:
        window_start = min(window_start, int(distinct_ops[0]))
    lowest = min(list(needed) + [window_start])
    both = np.flatnonzero((gen_hist > 0) & (imp_hist > 0))
    if exact_auc is True:
        auc_bins = _auc_bins(both, gen_hist, imp_hist, auc_budget)
    elif exact_auc == "auto":
        # the bins from the lowest one the operating points need up are listed anyway; this
        # choice does not depend on the blocks, so neither does the AUC
        auc_bins = _auc_bins(both, gen_hist, imp_hist, auc_budget, lowest=lowest)
    else:
        auc_bins = np.empty(0, np.int64)
    collect_bins = np.unique(np.concatenate([np.fromiter(needed, np.int64, len(needed)), auc_bins]))
    selection = _selection(collect_bins, window_start, grid_keys, identities, groups, distinct_ops)
    return Listing(selection, collect_bins, min([lowest] + auc_bins[:1].tolist()), distinct_ops)


def _selection(collect_bins, window_start, grid_keys, identities, groups, distinct_ops):
    code = np.zeros(NBINS, np.uint8)
    code[collect_bins] = COLLECT
    cell_of = group_cell_of = None
    if window_start < NBINS:
        code[window_start:] |= WINDOW
        window = np.arange(window_start, NBINS)
        if grid_keys is not None:
            # cell j holds keys in [grid_keys[j], grid_keys[j+1]), the last cell all keys from
            # grid_keys[-1] up; -1: below the grid (inside the window only for the groups)
            cell_of = np.searchsorted(grid_keys, window, side="right") - 1
        if groups and distinct_ops.size:
            # group cells: below the first op bin, the op bin, between, the next op bin, ...
            group_cell_of = (np.searchsorted(distinct_ops, window, side="right")
                             + np.searchsorted(distinct_ops, window, side="left"))
    return BinSelection(code, window_start, cell_of, identities, 0 if grid_keys is None else grid_keys.size,
                        group_cell_of, groups, 2 * distinct_ops.size + 1)
