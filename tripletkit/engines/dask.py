"""The Dask engine: the same plans as in one process, run as tasks on a cluster.

Chosen by one option, ``compute.scheduler`` (``--scheduler``, or ``scheduler`` in the
``[compute]`` section): the address of a running Dask scheduler (``tcp://host:8786``) or
``local-cluster``, which starts a :class:`distributed.LocalCluster` of ``compute.workers``
single-threaded worker processes for the run and closes it afterwards. Without it nothing here is
imported and Dask is not needed (it is the optional extra ``tripletkit[dask]``). Every worker, and
the client, must see the input table and the output folder under the same path (a shared
filesystem); the client reads nothing but file names and footers, the workers read the data.

This module holds what both verbs use on a cluster: the client (:func:`cluster`), the
:class:`DaskEngine` that runs a plan's tasks, the waits that notice a cluster without workers
(:func:`wait_for`) and a driver whose client went away (:func:`watch_driver`), reading the table on
a worker, and the refusal of options a cluster run cannot honour. Scoring's driver task lives with
the verb (:mod:`tripletkit.evaluate`); mining's sharded search in :mod:`.dask_mining`.

Tasks are pure functions of their inputs, so when a worker is lost the scheduler reruns what it
held elsewhere, with the same result. When every worker is gone, Dask waits for one for ever; every
wait here asks the scheduler at least every second how many workers it has and, after
``compute.no_workers_timeout`` seconds without any, stops the run with one error line. Dask moves
task arguments and results with its own serialisation (pickle among them): connect only to a
scheduler you trust.
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import threading
import time
import uuid
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .._errors import TripletkitError
from .._io import PARQUET_READ, parquet_error, parquet_files
from ..config import ComputeConfig
from ..tables.embeddings import EmbeddingTable

__all__ = ["LOCAL_CLUSTER", "DaskEngine", "cluster", "wait_for", "watch_driver", "stopper", "refuse_unsupported",
           "rows_to_mine", "shard_count", "thread_limits", "thread_limits_applied", "table_source",
           "table_identity", "read_table_on_worker", "table_files", "read_rows", "digest", "worker_count",
           "run_task", "submit_driver"]

#: The ``scheduler`` value that starts a local cluster for the run.
LOCAL_CLUSTER = "local-cluster"
# Most seconds between two looks at the cluster while a run waits on its tasks.
_POLL_SECONDS = 1.0


# ---------------------------------------------------------------------------------------------
# the cluster
# ---------------------------------------------------------------------------------------------
def watch_driver():
    """A function telling whether the scheduler let go of the task running now (its client died
    or cancelled it): Dask cannot stop a running task, so the drivers ask at every block."""
    try:
        from distributed import get_worker

        worker = get_worker()
        key = worker.get_current_task()
    except Exception:  # not inside a task: nothing to watch
        return lambda: False

    def cancelled():
        try:
            ts = worker.state.tasks.get(key)
        except Exception:  # another distributed version without this state: cannot tell
            return False
        return ts is None or ts.state in ("cancelled", "released", "forgotten")

    return cancelled


def stopper(cancelled):
    """A function that raises when ``cancelled()`` (see :func:`watch_driver`) says the run was let go."""

    def check():
        if cancelled():
            raise TripletkitError("the client of this run is gone or cancelled it; the run was stopped")

    return check


def _distributed():
    try:
        import distributed
    except ImportError:
        raise TripletkitError(
            "a Dask scheduler was requested but Dask is not installed; pip install 'tripletkit[dask]' "
            "or leave [compute] scheduler unset"
        ) from None
    return distributed


@contextlib.contextmanager
def cluster(compute):
    """A ``distributed.Client`` for ``compute.scheduler``, closed (with its local cluster) after.

    Parameters
    ----------
    compute : ComputeConfig
        ``scheduler``: ``"local-cluster"`` starts a ``LocalCluster`` of ``workers`` worker
        processes with one thread each; anything else is a scheduler address.
    """
    distributed = _distributed()
    if not isinstance(compute, ComputeConfig) or compute.scheduler is None:
        raise TripletkitError("compute must be a ComputeConfig with a scheduler ('local-cluster' or an address)")
    if compute.scheduler == LOCAL_CLUSTER:
        # Workers log a task's error with its traceback; the client raises that error itself (one
        # line on the command line, the remote traceback with --debug), so only crashes are logged.
        local = distributed.LocalCluster(n_workers=compute.workers, threads_per_worker=1, processes=True,
                                         dashboard_address=None, silence_logs=logging.CRITICAL)
        try:
            with distributed.Client(local) as client:
                yield client
        finally:
            local.close()
        return
    try:
        client = distributed.Client(compute.scheduler, timeout="20s")
    except (OSError, TimeoutError, ValueError) as exc:
        msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise TripletkitError(
            f"cannot reach the Dask scheduler {compute.scheduler!r} ({msg}); check the address "
            "(tcp://host:8786) or use scheduler='local-cluster'"
        ) from None
    with client:
        yield client


def worker_count(client):
    """Number of workers the scheduler has now."""
    try:
        info = client.scheduler_info(n_workers=0)  # the count without every worker's details
    except TypeError:  # distributed before 2025: no n_workers argument
        info = client.scheduler_info()
    return int(info.get("n_workers", len(info.get("workers", {}))))


def wait_for(client, futures, no_workers_timeout, check=None):
    """The results of ``futures``, waiting no longer than ``no_workers_timeout`` seconds without a worker.

    Dask waits for a worker forever: when every worker has died, a task stays pending until one
    joins. While the futures are unfinished, the scheduler is asked every :data:`_POLL_SECONDS`
    (at most) how many workers it has; once it has had none for ``no_workers_timeout`` seconds the
    run stops with a :class:`TripletkitError`. ``check()``, called as often, raises to stop the run
    for another reason (a driver whose client is gone).
    """
    futures = list(futures)
    if not all(f.done() for f in futures):
        left, lock, finished = [len(futures)], threading.Lock(), threading.Event()

        def one_finished(_):
            with lock:
                left[0] -= 1
                if not left[0]:
                    finished.set()

        for f in futures:
            f.add_done_callback(one_finished)  # also when it fails or is cancelled
        poll = min(_POLL_SECONDS, no_workers_timeout / 4)
        empty_since = None
        while not finished.wait(poll):
            if check is not None:
                check()
            if worker_count(client):
                empty_since = None
                continue
            now = time.monotonic()
            if empty_since is None:
                empty_since = now
            elif now - empty_since >= no_workers_timeout:
                raise TripletkitError(
                    f"the Dask cluster at {client.scheduler.address} has had no worker for {no_workers_timeout:g} s, "
                    "so the run was stopped and nothing was written; start workers (or raise [compute] "
                    "no_workers_timeout) and run it again"
                )
    return client.gather(futures)


def refuse_unsupported(what, config, rows=None):
    """Refuse, before a cluster is started, the options a cluster run cannot honour.

    ``what`` is ``"mine"`` or ``"score"``; ``rows`` is the row count ``index = auto`` resolves
    on (None: unknown, and the driver refuses an approximate index itself when it resolves to one).
    """
    from ..mining.index import resolve_kind

    if what == "mine":
        kind = config.index
        if kind == "auto" and rows is not None:
            kind = resolve_kind(kind, rows, config.exact_below)
            if kind != "exact":
                raise TripletkitError(
                    f"index = auto picks {kind} for {rows:,} rows (exact_below = {config.exact_below:,}), and only "
                    "index = exact runs with a scheduler; pass index='exact' or run without scheduler=..."
                )
        elif kind not in ("auto", "exact"):
            raise TripletkitError(
                f"index = {kind} is not available with a scheduler, only index = exact is; pass index='exact' "
                "or run without scheduler=..."
            )
    if config.threads:
        raise TripletkitError(
            f"threads = {config.threads} applies to a run in one process and is not used with a scheduler, where "
            "the workers share the work; pass threads=0 (with a scheduler, workers=... and partitions=... size the run)"
        )


def rows_to_mine(source, path, options):
    """Rows ``index = auto`` resolves on, when the client can know them without reading the table."""
    if isinstance(source, EmbeddingTable):
        return source.n
    try:
        rows = sum(pq.ParquetFile(f, **PARQUET_READ).metadata.num_rows for f in table_files(path))
    except (OSError, pa.ArrowException):  # unreadable here: the driver says what is wrong with it
        return None
    # with drop_invalid the valid rows may be fewer: leave the decision to the driver
    return None if options.get("drop_invalid") else rows


def shard_count(client, compute):
    """Number of shards (mining) or task groups (scoring): ``partitions``, else twice the workers."""
    if compute.partitions:
        return int(compute.partitions)
    return 2 * max(1, len(client.scheduler_info().get("workers", {})))


def thread_limits():
    """BLAS and OpenMP thread counts of this process, by library (the workers run with the same)."""
    from threadpoolctl import threadpool_info

    return {info["prefix"]: int(info["num_threads"]) for info in threadpool_info()}


@contextlib.contextmanager
def thread_limits_applied(limits):
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=limits):
        yield


# ---------------------------------------------------------------------------------------------
# the input
# ---------------------------------------------------------------------------------------------
def table_source(source, table_options):
    """(absolute path the workers read, path as given, table options, fingerprint to match or None)."""
    options = dict(table_options or {})
    if isinstance(source, EmbeddingTable):
        if source.source is None:
            raise TripletkitError(
                "with a scheduler the table must be a Parquet path (file or folder) every worker can read; "
                "this EmbeddingTable was built in memory"
            )
        # Re-read on the cluster; fingerprint and groups prove it is the same table.
        return str(Path(source.source).resolve()), source.source, options, table_identity(source)
    if not isinstance(source, (str, Path)):
        raise TripletkitError(
            f"with a scheduler the table must be a Parquet path (file or folder) every worker can read, "
            f"got {type(source).__name__}"
        )
    p = Path(source)
    if not p.exists():
        raise TripletkitError(f"embedding table {str(p)!r} does not exist; check the path")
    return str(p.resolve()), str(source), options, None


def table_identity(table):
    """What must match when a table is read again: its fingerprint and its groups."""
    groups = None
    if table.groups is not None:
        groups = hashlib.blake2b("\x1f".join(map(str, table.groups.tolist())).encode(), digest_size=16).hexdigest()
    return table.fingerprint, groups


def read_table_on_worker(path, options, expect):
    table = EmbeddingTable.read(path, **options)
    if expect is not None and table_identity(table) != expect:
        raise TripletkitError(
            f"the table read on the cluster from {path!r} is not the EmbeddingTable given (other columns or "
            "options?); pass the path and its table_options instead"
        )
    return table


def table_files(path):
    """The Parquet files of a table path, in the order :class:`EmbeddingTable` reads them."""
    p = Path(path)
    return parquet_files(p) if p.is_dir() else [str(p)]


def read_rows(files, lo, hi):
    """Rows [lo, hi) of the files read one after another, reading only the row groups needed."""
    pieces, start = [], 0
    for f in files:
        try:
            pf = pq.ParquetFile(f, **PARQUET_READ)
            meta = pf.metadata
            if start + meta.num_rows > lo and start < hi:
                g0 = start
                for g in range(meta.num_row_groups):
                    m = meta.row_group(g).num_rows
                    if g0 + m > lo and g0 < hi:
                        a, b = max(0, lo - g0), min(m, hi - g0)
                        pieces.append(pf.read_row_group(g).slice(a, b - a).replace_schema_metadata(None))
                    g0 += m
        except (pa.ArrowException, OSError) as exc:
            raise parquet_error(exc, [f], "part") from None
        start += meta.num_rows
        if start >= hi:
            break
    return pa.concat_tables(pieces)


def digest(rows):
    return hashlib.blake2b(np.ascontiguousarray(rows).tobytes(), digest_size=16).hexdigest()


# ---------------------------------------------------------------------------------------------
# scoring
# ---------------------------------------------------------------------------------------------
def _not_stopped():
    return False


def run_task(task, shared, item, limits, as_tuple):
    """One task of a plan on a worker: the client's thread limits, and one BLAS thread per task
    (as in the threads of the local engine). It is never stopped from inside: the driver stops
    waiting instead."""
    from threadpoolctl import threadpool_limits

    with thread_limits_applied(limits), threadpool_limits(limits=1, user_api="blas"):
        return task(tuple(shared) if as_tuple else shared, item, _not_stopped)


class DaskEngine:
    """Run a plan's tasks on a Dask cluster, from a task that holds a worker client (the driver).

    Parameters
    ----------
    client : distributed.Client
        The driver's client (``distributed.worker_client()``).
    threads : int
        Groups a plan should cut its work into (``compute.partitions``, else twice the workers).
    limits : dict
        BLAS and OpenMP thread counts of the client, applied in every task.
    cancelled : callable, optional
        Tells whether the driver was let go (see :func:`watch_driver`): the run then stops while
        it waits on its tasks.
    no_workers_timeout : float
        Seconds a wait goes on without any worker (see :func:`wait_for`).
    """

    name = "dask"

    def __init__(self, client, threads, limits, cancelled=None, no_workers_timeout=ComputeConfig.no_workers_timeout):
        self.client = client
        self.threads = int(threads)
        self.limits = limits
        self.no_workers_timeout = no_workers_timeout
        self._check = stopper(cancelled or (lambda: False))
        self._sent = {}

    def _scattered(self, obj):
        """``obj`` on every worker, sent once however many maps share it (scalars go with the tasks)."""
        if obj is None or isinstance(obj, (bool, int, float, str)):
            return obj
        if id(obj) not in self._sent:
            (future,) = self.client.scatter([obj], broadcast=True, hash=False)
            self._sent[id(obj)] = (obj, future)  # obj kept, so that its id is not reused
        return self._sent[id(obj)][1]

    def map(self, task, shared, items):
        """``task(shared, item, stopped)`` for every item as Dask tasks; the results in item order.

        ``shared`` is scattered to every worker once (a tuple item by item, so that what two maps
        share is sent once); one task is submitted per item. The results are gathered one at a
        time as the caller iterates over them, so the driver holds one at a time.
        """
        self._check()
        as_tuple = isinstance(shared, tuple)
        sent = [self._scattered(obj) for obj in shared] if as_tuple else self._scattered(shared)
        futures = [self.client.submit(run_task, task, sent, item, self.limits, as_tuple, pure=False)
                   for item in items]
        return self._in_order(futures)

    def _in_order(self, futures):
        for future in futures:
            (result,) = wait_for(self.client, [future], self.no_workers_timeout, self._check)
            future.release()
            yield result


def submit_driver(client, fn, *args, name, no_workers_timeout):
    """Run ``fn(*args)`` as the run's driver task on a worker and return its result.

    ``fn`` is a module-level function (sent by reference); it runs on one worker and usually
    opens a ``distributed.worker_client()`` to submit the plan's tasks through a
    :class:`DaskEngine`. The wait stops after ``no_workers_timeout`` seconds without a worker.
    """
    future = client.submit(fn, *args, key=f"tripletkit-{name}-driver-{uuid.uuid4().hex}")
    (result,) = wait_for(client, [future], no_workers_timeout)
    return result
