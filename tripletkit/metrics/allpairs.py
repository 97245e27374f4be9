"""All-pairs counting as a plan of blocks: tasks that an engine runs, and the merges of their results.

The rows, sorted by identity, are cut into blocks; a block of rows is multiplied with all later
rows (the upper triangle, ``i < j``), so the pairs are never listed. The work is a few groups of
blocks (group ``w`` holds blocks ``w, w + groups, ...``), run side by side by an engine
(:mod:`tripletkit.engines`: ``engine.map(task, shared, items)``): the first pass
(:func:`count_task`) counts every score into the histogram of :mod:`.bins` and returns the genuine
scores and the highest impostor scores of its blocks; the second (:func:`list_task`), when the
kept impostors do not reach low enough, lists the exact impostor scores of the bins that
:mod:`.refine` chose; :func:`kept_task` lists them from the kept impostors instead. Scores are
exact cosines, so no result depends on the groups, the engine or the block shape.

Memory is O(n*d + groups*block*n + bins + genuine pairs + kept impostors): :func:`block_size` and
:func:`workers_for` size the blocks and groups from a memory budget, with the constants below
(also what the memory estimate of ``score`` uses).
"""

from __future__ import annotations

import copy
import os
from typing import NamedTuple

import numpy as np

from .._errors import Stopped

from .._exact import snap
from .bins import EMBEDDING_SCALE, NBINS, NOT_A_PAIR, add_histogram, keys_of
from .refine import Refiner, keep_per_group

__all__ = ["BYTES_PER_BLOCK_SCORE", "BYTES_PER_KEPT", "KEEP_SHARE", "TABLE_SHARE", "Blocks", "BlockPlan",
           "FirstPass", "block_size", "workers_for", "count_task", "list_task", "kept_task"]

#: Bytes of one group's buffers per score of a block: the float64 product, its int32 bin key and
#: a byte of selection.
BYTES_PER_BLOCK_SCORE = 13
#: Bytes of one impostor score kept in the first pass: float64 value, int32 key, row and column.
BYTES_PER_KEPT = 20
#: Share of the memory budget that the impostor scores kept in the first pass may take. A knob,
#: read at every run: 0 never keeps them, so the refined bins always come from a second pass.
KEEP_SHARE = 0.5
#: Above this share of scores at or above the lowest bin to list, the second pass looks every
#: score's bin up in a table instead of comparing with that bin and listing positions. A knob,
#: read at every run (above 1: always compare; below 0: always look up).
TABLE_SHARE = 0.3


def block_size(n, block_rows, memory_budget):
    """Rows per block for ``n`` rows: ``block_rows`` if given, else sized for two groups' buffers
    (:data:`BYTES_PER_BLOCK_SCORE` per score each) within ``memory_budget``, and at most a
    sixteenth of the rows (at least 256): the leading square of each block is computed in full
    but only its upper half is used."""
    rows = max(n, 1)
    if block_rows is None:
        block_rows = min(max(1, int(memory_budget // (2 * BYTES_PER_BLOCK_SCORE * rows))), max(256, n // 16))
    return int(max(1, min(n, block_rows, (2**31 - 1) // rows)))


def workers_for(n, block, memory_budget):
    """Groups of blocks run side by side for ``n`` rows in blocks of ``block``: one per CPU, at most
    one per block, and as many as the memory budget holds buffers for (two with the default
    block size)."""
    per_group = BYTES_PER_BLOCK_SCORE * block * max(n, 1)
    return int(max(1, min(os.cpu_count() or 1, -(-max(n, 1) // block), memory_budget // per_group)))


class Blocks:
    """Rows sorted by identity, snapped and scaled, cut into blocks of rows against all later rows.

    The rows are snapped to the exact-cosine grid (:mod:`tripletkit._exact`), so a score is the
    same float whichever block shape, thread, pass, BLAS kernel or process computes it.
    :meth:`view` gives a copy sharing the rows with buffers of its own, for one task.

    Parameters
    ----------
    embeddings : ndarray of float32, shape (n, d)
        Unit rows.
    codes : ndarray of int64, shape (n,)
        Identity codes 0..k-1.
    group_codes : ndarray of int64, shape (n,), or None
        Subgroup codes.
    block : int
        Rows per block.
    """

    def __init__(self, embeddings, codes, group_codes, block):
        order = np.argsort(codes, kind="stable")
        self.xs = snap(embeddings[order], scale=EMBEDDING_SCALE)
        self.codes = codes[order]
        self.gcodes = None if group_codes is None else group_codes[order]
        self.n = self.xs.shape[0]
        self.b = int(block)
        self.sizes = np.bincount(self.codes)
        self.starts = np.concatenate([[0], np.cumsum(self.sizes)[:-1]])
        self._scores = self._keys = None

    def block_starts(self):
        """First row of every block, in order."""
        return list(range(0, self.n, self.b))

    def __getstate__(self):  # the buffers stay behind when the rows go to another process
        return {**self.__dict__, "_scores": None, "_keys": None}

    def view(self):
        """The same rows and blocks with buffers of its own (allocated on first use)."""
        other = copy.copy(self)
        other._scores = other._keys = None
        return other

    def key_buffer(self):
        """int32 buffer of one block's bin keys."""
        if self._keys is None:
            self._keys = np.empty(self.b * self.n, np.int32)
        return self._keys

    def product(self, r0):
        """Scaled scores of the block starting at row ``r0`` against rows ``r0..n-1``, in this
        view's buffer (valid until its next call); entries ``j <= i`` hold NOT_A_PAIR."""
        if self._scores is None:
            self._scores = np.empty(self.b * self.n, np.float64)
        r1 = min(self.n, r0 + self.b)
        rows, m = r1 - r0, self.n - r0
        scaled = self._scores[: rows * m].reshape(rows, m)
        np.matmul(self.xs[r0:r1], self.xs[r0:].T, out=scaled)
        for a in range(rows):  # j <= i: not a pair of the upper triangle
            scaled[a, : a + 1] = NOT_A_PAIR
        return scaled

    def genuine(self, r0, scaled):
        """Genuine scaled scores of a block, with identity and pair group (-1 = across groups)."""
        r1 = r0 + scaled.shape[0]
        vals, ids, grps = [], [], []
        for c in range(self.codes[r0], self.codes[r1 - 1] + 1):
            if self.sizes[c] < 2:
                continue
            first, end = self.starts[c], self.starts[c] + self.sizes[c]
            ra, rb = max(first, r0), min(end, r1)
            sub = scaled[ra - r0 : rb - r0, ra - r0 : end - r0]
            pair = sub != NOT_A_PAIR
            v = sub[pair]
            if v.size == 0:
                continue
            vals.append(v)
            ids.append(np.full(v.size, c, np.int64))
            if self.gcodes is not None:
                gr = self.gcodes[ra:rb][:, None]
                gc = self.gcodes[ra:end][None, :]
                grps.append(np.where(gr == gc, gr, -1)[pair])
        return vals, ids, grps

    def impostors_at_or_above(self, r0, scaled, lowest, chunk):
        """(scaled values, rows, cols) of a block's impostor scores >= ``lowest``, in row chunks."""
        rows, m = scaled.shape
        step = max(1, int(chunk // max(m, 1)))
        for a in range(0, rows, step):
            part = scaled[a : a + step]
            sel = np.flatnonzero(part >= lowest)
            if sel.size == 0:
                continue
            row, col = np.divmod(sel, m)
            row += r0 + a
            col += r0
            imp = self.codes[row] != self.codes[col]
            yield part.reshape(-1)[sel[imp]], row[imp], col[imp]


# ---------------------------------------------------------------------------------------------
# tasks: task(shared, item, stopped), item = the first rows of a group's blocks. A task that sees
# stopped() raises Stopped at once: its engine is raising the error that stopped the run.
# ---------------------------------------------------------------------------------------------
def count_task(shared, starts, stopped):
    """First pass over some blocks.

    ``shared`` is ``(blocks, top)``: the :class:`Blocks` and an empty :class:`~.refine.TopImpostors` to
    copy, or None to keep no impostors. Returns ``(histogram, genuine, top)``: the bin counts of
    every score, ``[(r0, values, identities, groups)]`` per block, and the kept impostors.
    """
    blocks, template = shared
    view = blocks.view()
    top = None if template is None else template.empty()
    hist = np.zeros(NBINS, np.int64)
    block_hist = np.empty(NBINS, np.int32)
    genuine = []
    for r0 in starts:
        if stopped():
            raise Stopped("the run was stopped")
        scaled = view.product(r0)
        add_histogram(keys_of(scaled, view.key_buffer()[: scaled.size].reshape(scaled.shape)), hist, block_hist)
        v, i, g = view.genuine(r0, scaled)
        genuine.append((r0, v, i, g))
        if top is not None:
            if r0 == starts[0]:
                top.start(_impostor_histogram(block_hist, v))
            top.visit(view, r0, scaled)
    return hist, genuine, top


def _impostor_histogram(block_hist, genuine_values):
    """A block's impostor bin counts: its histogram less its genuine scores and its non-pairs."""
    imp = block_hist.astype(np.int64)
    if genuine_values:
        imp -= np.bincount(keys_of(np.concatenate(genuine_values)), minlength=NBINS)
    imp[0] = 0  # the key of entries that are not pairs
    return imp


def list_task(shared, starts, stopped):
    """Second pass over some blocks: ``shared`` is ``(blocks, selection, chunk, use_table)``;
    returns the :meth:`Refiner.export` of what a :class:`Refiner` of ``selection`` listed."""
    blocks, selection, chunk, use_table = shared
    view = blocks.view()
    refiner = Refiner(selection)
    for r0 in starts:
        if stopped():
            raise Stopped("the run was stopped")
        refiner.visit(view, r0, view.product(r0), chunk, use_table)
    return refiner.export()


def kept_task(shared, runs, stopped):
    """Listing from kept impostors: ``shared`` is ``(blocks, selection)``, ``runs`` a list of
    (keys, scaled values, rows, cols); returns the :meth:`Refiner.export`."""
    blocks, selection = shared
    refiner = Refiner(selection)
    for run in runs:
        if stopped():
            raise Stopped("the run was stopped")
        refiner.process(blocks, *run)
    return refiner.export()


# ---------------------------------------------------------------------------------------------
# the plan
# ---------------------------------------------------------------------------------------------
class FirstPass(NamedTuple):
    """The merged first pass: bin counts of every score and the genuine scores (scaled, block order)."""

    histogram: np.ndarray  # (NBINS,) int64, every score
    genuine: np.ndarray  # scaled genuine scores
    genuine_identity: np.ndarray  # int64 identity code of each
    genuine_group: np.ndarray | None  # group code of each pair (-1: across groups); None without groups


class BlockPlan:
    """The blocks cut into ``workers`` groups (group w: blocks w, w + workers, ...), run by ``engine``.

    Parameters
    ----------
    blocks : Blocks
    engine : object
        ``engine.map(task, shared, items)`` (:mod:`tripletkit.engines`).
    workers : int
        Groups of blocks (at most one per block).
    memory_budget : int
        Bytes; sets the share the kept impostors may take and the chunks scores are scanned in.
    """

    def __init__(self, blocks, engine, workers, memory_budget):
        self.blocks = blocks
        self.engine = engine
        starts = blocks.block_starts()
        self.workers = max(1, min(int(workers), len(starts)))
        self.groups = [starts[w :: self.workers] for w in range(self.workers)]
        self.memory_budget = memory_budget
        self.chunk = max(1 << 16, memory_budget // 64)  # scores scanned at once for impostors

    def keeps(self, keep):
        """Whether the groups can keep ``keep`` highest impostors within their share of the budget
        (each keeps up to 3 times its part before it trims them)."""
        kept = self.workers * 3 * BYTES_PER_KEPT * keep_per_group(keep, self.workers)
        return kept <= KEEP_SHARE * self.memory_budget

    def count(self, top):
        """The first pass. ``top`` (a :class:`~.refine.TopImpostors`, or None) is copied for every group and
        ends holding the copies merged (complete from the highest of their floors)."""
        template = None if top is None else top.fresh(self.workers)
        hist = np.zeros(NBINS, np.int64)
        genuine, tops = [], []
        for part_hist, part_genuine, part_top in self.engine.map(count_task, (self.blocks, template), self.groups):
            hist += part_hist
            genuine += part_genuine
            tops.append(part_top)
        if top is not None:
            top.absorb(tops)
        vals, ids, grps = [], [], []
        for _, v, i, g in sorted(genuine, key=lambda item: item[0]):
            vals += v
            ids += i
            grps += g
        return FirstPass(hist, np.concatenate(vals) if vals else np.empty(0, np.float64),
                         np.concatenate(ids) if ids else np.empty(0, np.int64),
                         np.concatenate(grps) if grps else None)

    def list_bins(self, selection, histogram, pairs):
        """A :class:`Refiner` of ``selection`` that saw every block (the second pass).

        When few of the ``pairs`` scores (``histogram``: all of them by bin) lie at or above the
        lowest chosen bin, one comparison per score finds the candidates; otherwise looking every
        score's bin up in a table is cheaper (see :data:`TABLE_SHARE`).
        """
        chosen = np.flatnonzero(selection.code)
        above = int(histogram[chosen[0]:].sum()) if chosen.size else 0
        shared = (self.blocks, selection, self.chunk, above > TABLE_SHARE * pairs)
        return self._merged(selection, self.engine.map(list_task, shared, self.groups))

    def list_kept(self, selection, top):
        """A :class:`Refiner` of ``selection`` that saw the impostors ``top`` kept: run w of
        ``workers`` groups holds kept runs w, w + workers, ..."""
        runs = [run for run in top.parts() if run[0].size]
        groups = max(1, min(self.workers, len(runs)))
        items = [runs[w::groups] for w in range(groups)]
        return self._merged(selection, self.engine.map(kept_task, (self.blocks, selection), items))

    @staticmethod
    def _merged(selection, exports):
        refiner = Refiner(selection)
        for part in exports:  # in group order, one at a time (window counts can be large)
            refiner.absorb(part)
        return refiner
