"""The local engine: a plan's tasks in threads of this process (the default of every verb)."""

from __future__ import annotations

from .._errors import Stopped
from .._threads import InThreads

__all__ = ["LocalEngine", "Stopped"]


class LocalEngine(InThreads):
    """Run tasks side by side in ``threads`` threads of this process.

    Parameters
    ----------
    threads : int, default 1
        Tasks run at once. With more than one, BLAS runs one thread per call while they run
        (the limit is process-wide), so that the threads do not compete with BLAS's own.
    """
