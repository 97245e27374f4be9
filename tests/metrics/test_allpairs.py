"""Tests of tripletkit.metrics.allpairs: the plan of blocks gives the same report whatever runs it.

Blocks, groups, engines, BLAS threads and the two ways of listing the refined bins (the kept
impostors of the first pass, or a second pass) change how the work is done, never a number.
"""

import os
import time

import pytest

from tripletkit.engines import LocalEngine
from tripletkit.metrics import allpairs as A
from tripletkit.metrics.verification import verify_all_pairs
from _support import clustered_rows, lattice_table


@pytest.fixture
def table(rng):
    return lattice_table(rng, 240, 20)


def test_blocked_equals_one_shot_for_several_block_sizes(table):
    x, labels = table
    kw = dict(bootstrap=30, fmr_targets=[0.001, 0.01, 0.1])
    ref = verify_all_pairs(x, labels, block_rows=len(x), **kw)
    ref.pop("passes")  # how the bins were listed may depend on the blocks; the results may not
    for rows in (1, 7, 64, 239):
        out = verify_all_pairs(x, labels, block_rows=rows, **kw)
        out.pop("passes")
        assert out == ref
    out = verify_all_pairs(x, labels, memory_budget=1 << 20, **kw)
    out.pop("passes")
    assert out == ref


def test_selection_paths_agree(table, monkeypatch):
    x, labels = table
    kw = dict(fmr_targets=[0.001, 0.01], bootstrap=40, block_rows=37)
    monkeypatch.setattr(A, "TABLE_SHARE", 2.0)  # always compare-and-list
    a = verify_all_pairs(x, labels, **kw)
    monkeypatch.setattr(A, "TABLE_SHARE", -1.0)  # always table look-up
    b = verify_all_pairs(x, labels, **kw)
    assert a == b


def test_one_pass_and_two_passes_agree(rng, monkeypatch):
    # the kept highest impostor scores serve every operating point in one pass (EER about 1%
    # here); with no room to keep them a second pass lists the same bins
    x, labels = lattice_table(rng, 500, 40, spread=8)
    groups = rng.choice(["bay", "spit"], size=len(x))
    for auc_mode, workers in ((False, 1), ("auto", 1), (False, 2), ("auto", 3)):
        kw = dict(fmr_targets=[0.001, 0.01], bootstrap=40, block_rows=29, groups=groups, exact_auc=auc_mode,
                  workers=workers)
        one = verify_all_pairs(x, labels, **kw)
        monkeypatch.setattr(A, "KEEP_SHARE", 0.0)
        two = verify_all_pairs(x, labels, **kw)
        monkeypatch.undo()
        assert one.pop("passes") == 1 and two.pop("passes") == 2, workers
        assert one == two


def test_report_does_not_depend_on_workers_blas_threads_or_block_shape(rng):
    # ordinary floats (not the exact lattice), many blocks, groups and bootstrap: every number
    # of the report is the same for 1, 2 or 3 worker threads, 1 or 2 BLAS threads of the process
    # and blocks of 71, 200 or 1200 rows (products of other shapes), since the scores are exact
    # cosines (tripletkit/_exact.py); only ``passes`` may differ.
    from threadpoolctl import threadpool_limits

    x, labels = clustered_rows(rng, 1200, 48, 60, noise=0.9)
    groups = rng.choice(["north", "south"], size=len(x))
    kw = dict(fmr_targets=[0.001, 0.01], bootstrap=30, groups=groups)
    reports = []
    for blas in (1, 2):
        with threadpool_limits(limits=blas, user_api="blas"):
            for workers, block_rows in ((1, 71), (2, 71), (3, 200), (2, 1200)):
                r = verify_all_pairs(x, labels, workers=workers, block_rows=block_rows, **kw)
                r.pop("passes")
                reports.append(r)
    assert all(r == reports[0] for r in reports[1:])


class _OneByOne:
    """The smallest engine: every task in turn, in this thread, the items in reverse order."""

    def map(self, task, shared, items):
        return [task(shared, item, lambda: False) for item in items[::-1]][::-1]


def test_any_engine_of_the_protocol_gives_the_same_report(rng):
    x, labels = clustered_rows(rng, 400, 16, 40, noise=0.9)
    groups = rng.choice(["north", "south"], size=len(x))
    kw = dict(fmr_targets=[0.001, 0.01], bootstrap=30, groups=groups, block_rows=23)
    ref = verify_all_pairs(x, labels, workers=1, **kw)
    for workers in (1, 3, 5):
        out = verify_all_pairs(x, labels, workers=workers, engine=_OneByOne(), **kw)
        assert out == ref | {"passes": out["passes"]}
    # an engine's threads set the groups by default
    assert verify_all_pairs(x, labels, engine=LocalEngine(threads=3), **kw) == verify_all_pairs(x, labels, workers=3,
                                                                                               **kw)


def _failing_task(shared, starts, stopped):
    """The task of ``shared`` over ``starts``; its polls of ``stopped()`` (one before each block)
    are slowed down, recorded, and fail at the block ``fail_at``."""
    task, inner, fail_at, seen = shared
    upcoming = iter(starts)

    def slow_stopped():
        r0 = next(upcoming)
        seen.append(r0)
        if r0 == fail_at:
            raise ValueError("disk on fire")
        time.sleep(0.05)  # a slow block, so that the stop is seen long before a group is done
        return stopped()

    return task(inner, starts, slow_stopped)


class _FailingEngine:
    """A LocalEngine whose first map fails at the block beginning at row ``fail_at``."""

    def __init__(self, threads, fail_at):
        self.local = LocalEngine(threads=threads)
        self.fail_at, self.seen = fail_at, []

    def map(self, task, shared, items):
        return self.local.map(_failing_task, (task, shared, self.fail_at, self.seen), items)


@pytest.mark.parametrize("failing_block", [2, 3])  # blocks of group 0 and of group 1 (of 2)
def test_a_failing_worker_stops_the_pass_with_its_error(rng, failing_block):
    x, labels = clustered_rows(rng, 400, 16, 20, noise=0.9)
    engine = _FailingEngine(2, failing_block * 13)
    with pytest.raises(ValueError, match="disk on fire"):
        verify_all_pairs(x, labels, block_rows=13, bootstrap=0, workers=2, engine=engine)
    # 31 blocks, 16 and 15 per group; the failure comes at a group's second block. Without the
    # stop the other group would count all of its share (18 blocks seen); with it, a few at most
    assert len(engine.seen) <= 8, engine.seen


def test_blocks_and_groups_are_sized_from_the_budget():
    # two groups' buffers (13 bytes per score) fit the budget, at most n / 16 rows (at least 256)
    assert A.block_size(10_000, None, 256 * 2**20) == min(256 * 2**20 // (2 * 13 * 10_000), 10_000 // 16)
    assert A.block_size(1000, None, 2**20) == 40
    assert A.block_size(1000, 7, 2**20) == 7 and A.block_size(5, 7, 2**20) == 5
    assert A.workers_for(1000, 40, 2**20) == min(os.cpu_count() or 1, 2)  # 2**20 // (13 * 40 * 1000) = 2
    assert A.workers_for(1000, 1000, 2**40) == 1  # one block

