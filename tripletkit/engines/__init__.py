"""Engines run the tasks of a plan: threads of this process (:mod:`.local`) or a Dask cluster (:mod:`.dask`).

A plan (all-pairs verification, mining) is a list of independent tasks and a merge. An engine
offers one method, ``map(task, shared, items)``: it calls ``task(shared, item, stopped)`` for every
item and returns the results in item order. ``task`` is a module-level function (so that it can
be sent to another process), ``shared`` holds what every task reads (arrays, sent once), and
``stopped()`` tells a task that the run was stopped (another task failed, the caller was
interrupted or went away), so it can end at its next block by raising :class:`Stopped`.
Plans never import an engine; the public verbs choose one.
"""

from .local import LocalEngine, Stopped

__all__ = ["LocalEngine", "Stopped"]
