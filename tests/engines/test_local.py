"""Tests of tripletkit.engines.local (and the thread runner of tripletkit._threads it is)."""

import threading
import time

import pytest

from tripletkit._errors import Stopped
from tripletkit.engines import LocalEngine


def _square(shared, item, stopped):
    return shared * item * item


def test_results_come_in_item_order_whatever_finishes_first():
    def slow_first(shared, item, stopped):
        time.sleep(0.05 if item == 0 else 0.0)
        return item

    for threads in (1, 2, 3):
        assert LocalEngine(threads).map(slow_first, None, range(5)) == [0, 1, 2, 3, 4]
    assert LocalEngine(2).map(_square, 2, [1, 2, 3]) == [2, 8, 18]
    assert LocalEngine(2).map(_square, 2, []) == []


def test_the_first_failure_stops_the_others_and_is_raised():
    seen = []
    started = threading.Barrier(2)

    def task(shared, item, stopped):
        started.wait(timeout=30)  # both tasks run side by side
        if item == 0:
            raise ValueError("disk on fire")
        for _ in range(3000):  # the other task polls stopped() between its blocks
            if stopped():
                seen.append("stopped")
                raise Stopped("the run was stopped")
            time.sleep(0.01)
        seen.append("finished")
        return item

    with pytest.raises(ValueError, match="disk on fire"):
        LocalEngine(2).map(task, None, [0, 1])
    assert seen == ["stopped"]  # the second task ended at its next check, not after 30 s


def test_threads_must_be_a_positive_whole_number():
    for bad in (0, -1, 1.5, True):
        with pytest.raises(ValueError, match="threads must be a whole number >= 1"):
            LocalEngine(bad)
