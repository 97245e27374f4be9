"""Tasks of a plan run side by side in threads of this process.

The local engine (:mod:`tripletkit.engines.local`) is this runner; it also lives here, in a private
helper module, so that a plan called directly from Python (say ``verify_all_pairs``) has a
default without its room importing an engine.
"""

from __future__ import annotations

import threading
from concurrent.futures import FIRST_EXCEPTION, ThreadPoolExecutor, wait

from ._errors import Stopped

__all__ = ["InThreads", "run_in_threads"]


def run_in_threads(task, shared, items, threads):
    """``[task(shared, item, stopped) for item in items]``, up to ``threads`` at a time.

    With more than one thread, BLAS runs one thread per call while they run (the limit is
    process-wide), so the threads do not compete with BLAS's own. The first task that fails stops
    the others at their next check of ``stopped()`` and its exception is raised; so is an
    interrupt of the caller.
    """
    items = list(items)
    stop = threading.Event()
    workers = min(int(threads), len(items))
    if workers <= 1:
        return [task(shared, item, stop.is_set) for item in items]
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        pool = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="tripletkit")
        try:
            futures = [pool.submit(task, shared, item, stop.is_set) for item in items]
            wait(futures, return_when=FIRST_EXCEPTION)
            if any(f.done() and f.exception() is not None for f in futures):
                stop.set()
                wait(futures)
                errors = [f.exception() for f in futures
                          if f.exception() is not None and not isinstance(f.exception(), Stopped)]
                raise errors[0] if errors else Stopped("the run was stopped")
            return [f.result() for f in futures]
        except BaseException:
            stop.set()
            raise
        finally:
            pool.shutdown(wait=True)


class InThreads:
    """The engine protocol (``map(task, shared, items)``) in ``threads`` threads of this process."""

    name = "local"

    def __init__(self, threads=1):
        if isinstance(threads, bool) or not isinstance(threads, int) or threads < 1:
            raise ValueError(f"threads must be a whole number >= 1, got {threads!r}")
        self.threads = threads

    def map(self, task, shared, items):
        """``[task(shared, item, stopped) for item in items]``, run side by side (see :func:`run_in_threads`)."""
        return run_in_threads(task, shared, items, self.threads)
