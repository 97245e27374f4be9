"""Scale-out on Dask: run the blocked plans of ``mine`` and ``score`` on a cluster.

Chosen by one option, ``compute.scheduler`` (``--scheduler``, or ``scheduler`` in the
``[compute]`` section): the address of a running Dask scheduler (``tcp://host:8786``) or
``local-cluster``, which starts a :class:`distributed.LocalCluster` of ``compute.workers``
single-threaded worker processes for the run and closes it afterwards. Without it nothing here
is imported and Dask is not needed (it is the optional extra ``tripletkit[dask]``).

Every worker, and the client, must see the input table and the output folder under the same
path (a shared filesystem); paths are made absolute on the client. The client reads nothing but
the file names (and, for ``index = auto``, the row counts in the Parquet footers): the workers
read the Parquet dataset.

Options a cluster run cannot honour are refused before a cluster is started or reached, in one
line that says what to use instead: an index other than ``exact`` (``auto`` resolved on the rows
of the table; when invalid rows are dropped only the driver knows them, and it refuses there) and
``threads`` other than 0 (for mining and scoring: it sizes a run in one process).

Scoring (:func:`score_on_cluster`)
----------------------------------
One driver task reads and validates the table on a worker (the same code as in one process) and
runs :func:`tripletkit.evaluate.score` there with a :class:`DaskEngine`: the all-pairs
verification's plan (:mod:`tripletkit.metrics.allpairs`) runs its groups of row blocks as Dask
tasks, the identity-sorted, scaled matrix scattered to every worker once. Each task of the first
pass returns its bin counts, genuine scores and highest impostor scores, merged in the driver; the
exact impostor scores of the bins that hold an operating point come from those, or from a second
pass whose tasks return them with their window counts. Retrieval, clustering and health run in
the driver.

The scores are exact cosines (:mod:`tripletkit._exact`), so the report is identical to the
single-process one whatever the workers' BLAS or block shapes, except ``verification.passes``
(the groups differ from one process's, and each keeps its own highest impostors) and the
timings.

Mining (:func:`mine_on_cluster`)
--------------------------------
The gallery is split into ``compute.partitions`` shards of consecutive rows (default twice the
workers). Each shard is a Dask task that reads its rows from the Parquet dataset and
normalises them exactly as :class:`~tripletkit.table.EmbeddingTable` does. A driver task reads
the table on a worker and runs the miner of :func:`tripletkit.mining.mine` unchanged, with a
search index whose every query (a block of anchors and their thresholds) becomes one task per
shard: the shard's exact faiss index returns every row above each anchor's threshold (widened
as needed, :meth:`tripletkit.index.SearchIndex.within_pieces`) and its top-k; the candidates of
the shards are merged, the top-k lists by a top-k merge, and selection runs in the driver as in
one process. faiss scores only pre-select (with the float32 safety band) and every decision is
made on float64 cosines, so with the exact index the triplets are the same as in one process,
row for row (only ``index = exact`` is available here; ``auto`` must resolve to it).

Limits: the driver holds the whole table, as one process would, and selects serially; what is
spread is the search, whose cost grows with the square of the rows. Scoring spreads the
products of verification; every worker holds the (held-out) matrix. docs/benchmarks_distributed.md
works out what that means for a 50M-row dump.

The output is a folder ``OUT`` of part files ``part-00000.parquet``, ``part-00001.parquet``, ...
of at most :data:`PART_ROWS` triplets each, in the row order of the single file (read it with
``pyarrow.parquet.read_table(OUT)``), and ``<stem>.duplicates.parquet`` beside it, as in one
process.

Faults
------
Tasks are pure functions of their inputs (file names, row ranges, arrays), so when a worker is
lost the scheduler reruns what it held on another worker; when the lost worker ran the driver,
the driver starts again (its shard tasks are found again by key when still held) and the result
is the same. Output is written into ``.OUT.tmp-*/.attempt-*/`` by the driver and moved into
place by the client only when the driver has returned, so a retried driver never mixes with the
parts of an earlier attempt. ``OUT`` itself is never half-written: it appears by one rename or
not at all. When the client dies:

- an exception, Ctrl-C or SIGTERM: the temporary folder and file are removed on the way out;
- a hard kill (SIGKILL, power loss): ``.OUT.tmp-*`` (holding an unfinished attempt) and
  ``.<stem>.duplicates.parquet.tmp-*`` stay behind beside ``OUT``; delete them.

In both cases the driver task, which Dask cannot interrupt, stops at its next block of anchors
or while it waits on its tasks: it checks that its folder still exists and that the scheduler
still wants its result (with ``local-cluster`` the workers die with the client anyway).

When every worker is gone (and none joins), Dask waits for one for ever. Every wait of a run on
its tasks (the client's on the driver, the driver's on its search or block tasks) asks the
scheduler at least every second how many workers it has; after ``compute.no_workers_timeout``
seconds (default 300) without any, the run stops with one error line and its temporary output is
removed, as after any other error.

Dask moves task arguments and results between its processes with its own serialisation (pickle
among them): connect only to a scheduler you trust.
"""

from __future__ import annotations

import contextlib
import dataclasses
import functools
import hashlib
import logging
import os
import shutil
import sys
import threading
import time
import uuid
import warnings
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .._errors import TripletkitError, TripletkitWarning
from .._io import PARQUET_READ, atomic_path, atomic_paths, check_not_input, check_output, parquet_error, parquet_files
from ..config import ComputeConfig
from ..mining.index import Neighbours, SearchIndex, build_index
from ..tables.embeddings import EmbeddingTable

__all__ = ["LOCAL_CLUSTER", "PART_ROWS", "DaskEngine", "cluster", "mine_on_cluster", "score_on_cluster"]

#: The ``scheduler`` value that starts a local cluster for the run.
LOCAL_CLUSTER = "local-cluster"
#: Most triplets per part file of a mining output folder (16 row groups of the single file).
PART_ROWS = 1 << 20
# Largest query payload sent with one search task (bytes); larger blocks are cut into chunks.
_QUERY_BYTES = 4 << 20
# Blocks of anchors searched ahead of the one the miner selects from.
_AHEAD = 1
# Most seconds between two looks at the cluster while a run waits on its tasks.
_POLL_SECONDS = 1.0


def _say(quiet, verb, text):
    if not quiet:
        print(f"[{verb}] {text}", file=sys.stderr, flush=True)


# ---------------------------------------------------------------------------------------------
# the cluster
# ---------------------------------------------------------------------------------------------
def _watch_driver():
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


def _stopper(cancelled):
    """A function that raises when ``cancelled()`` (see :func:`_watch_driver`) says the run was let go."""

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
            "(tcp://host:8786) or use --scheduler local-cluster"
        ) from None
    with client:
        yield client


def _workers(client):
    """Number of workers the scheduler has now."""
    try:
        info = client.scheduler_info(n_workers=0)  # the count without every worker's details
    except TypeError:  # distributed before 2025: no n_workers argument
        info = client.scheduler_info()
    return int(info.get("n_workers", len(info.get("workers", {}))))


def _gather(client, futures, no_workers_timeout, check=None):
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
            if _workers(client):
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


def _refuse_unsupported(what, config, rows=None):
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
                    "index = exact runs with a scheduler; pass --index exact or run without --scheduler"
                )
        elif kind not in ("auto", "exact"):
            raise TripletkitError(
                f"index = {kind} is not available with a scheduler, only index = exact is; pass --index exact "
                "or run without --scheduler"
            )
    if config.threads:
        raise TripletkitError(
            f"threads = {config.threads} applies to a run in one process and is not used with a scheduler, where "
            "the workers share the work; pass --threads 0 (with a scheduler, --workers and --partitions size the run)"
        )


def _rows_to_mine(source, path, options):
    """Rows ``index = auto`` resolves on, when the client can know them without reading the table."""
    if isinstance(source, EmbeddingTable):
        return source.n
    try:
        rows = sum(pq.ParquetFile(f, **PARQUET_READ).metadata.num_rows for f in _files(path))
    except (OSError, pa.ArrowException):  # unreadable here: the driver says what is wrong with it
        return None
    # with drop_invalid the valid rows may be fewer: leave the decision to the driver
    return None if options.get("drop_invalid") else rows


def _shards(client, compute):
    """Number of shards (mining) or task groups (scoring): ``partitions``, else twice the workers."""
    if compute.partitions:
        return int(compute.partitions)
    return 2 * max(1, len(client.scheduler_info().get("workers", {})))


def _thread_limits():
    """BLAS and OpenMP thread counts of this process, by library (the workers run with the same)."""
    from threadpoolctl import threadpool_info  # faiss, its BLAS and OpenMP are loaded by .mining.index above

    return {info["prefix"]: int(info["num_threads"]) for info in threadpool_info()}


@contextlib.contextmanager
def _limits(limits):
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=limits):
        yield


# ---------------------------------------------------------------------------------------------
# the input
# ---------------------------------------------------------------------------------------------
def _source(source, table_options):
    """(absolute path the workers read, path as given, table options, fingerprint to match or None)."""
    options = dict(table_options or {})
    if isinstance(source, EmbeddingTable):
        if source.source is None:
            raise TripletkitError(
                "with a scheduler the table must be a Parquet path (file or folder) every worker can read; "
                "this EmbeddingTable was built in memory"
            )
        # Re-read on the cluster; fingerprint and groups prove it is the same table.
        return str(Path(source.source).resolve()), source.source, options, _identity(source)
    if not isinstance(source, (str, Path)):
        raise TripletkitError(
            f"with a scheduler the table must be a Parquet path (file or folder) every worker can read, "
            f"got {type(source).__name__}"
        )
    p = Path(source)
    if not p.exists():
        raise TripletkitError(f"embedding table {str(p)!r} does not exist; check the path")
    return str(p.resolve()), str(source), options, None


def _identity(table):
    """What must match when a table is read again: its fingerprint and its groups."""
    groups = None
    if table.groups is not None:
        groups = hashlib.blake2b("\x1f".join(map(str, table.groups.tolist())).encode(), digest_size=16).hexdigest()
    return table.fingerprint, groups


def _read_table(path, options, expect):
    table = EmbeddingTable.read(path, **options)
    if expect is not None and _identity(table) != expect:
        raise TripletkitError(
            f"the table read on the cluster from {path!r} is not the EmbeddingTable given (other columns or "
            "options?); pass the path and its table_options instead"
        )
    return table


def _files(path):
    """The Parquet files of a table path, in the order :class:`EmbeddingTable` reads them."""
    p = Path(path)
    return parquet_files(p) if p.is_dir() else [str(p)]


def _read_rows(files, lo, hi):
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


def _digest(rows):
    return hashlib.blake2b(np.ascontiguousarray(rows).tobytes(), digest_size=16).hexdigest()


# ---------------------------------------------------------------------------------------------
# scoring
# ---------------------------------------------------------------------------------------------
def _not_stopped():
    return False


def _run_task(task, shared, item, limits, as_tuple):
    """One task of a plan on a worker: the client's thread limits, and one BLAS thread per task
    (as in the threads of the local engine). It is never stopped from inside: the driver stops
    waiting instead."""
    from threadpoolctl import threadpool_limits

    with _limits(limits), threadpool_limits(limits=1, user_api="blas"):
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
        Tells whether the driver was let go (see :func:`_watch_driver`): the run then stops while
        it waits on its tasks.
    no_workers_timeout : float
        Seconds a wait goes on without any worker (see :func:`_gather`).
    """

    name = "dask"

    def __init__(self, client, threads, limits, cancelled=None, no_workers_timeout=ComputeConfig.no_workers_timeout):
        self.client = client
        self.threads = int(threads)
        self.limits = limits
        self.no_workers_timeout = no_workers_timeout
        self._check = _stopper(cancelled or (lambda: False))
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
        futures = [self.client.submit(_run_task, task, sent, item, self.limits, as_tuple, pure=False)
                   for item in items]
        return self._in_order(futures)

    def _in_order(self, futures):
        for future in futures:
            (result,) = _gather(self.client, [future], self.no_workers_timeout, self._check)
            future.release()
            yield result


def _score_task(path, options, expect, config, limits, parts, no_workers_timeout):
    from distributed import worker_client

    from ..evaluate import score

    cancelled = _watch_driver()
    table = _read_table(path, options, expect)
    with _limits(limits), worker_client() as client:
        engine = DaskEngine(client, parts, limits, cancelled, no_workers_timeout)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # the report lists them; the client issues them again
            return score(table, config=config, quiet=True, engine=engine)


def score_on_cluster(source, out=None, *, config=None, compute, force=False, quiet=False, table_options=None):
    """:func:`tripletkit.evaluate.score` on a Dask cluster; the same report.

    Parameters
    ----------
    source : str or Path
        Parquet file or folder every worker can read (an :class:`EmbeddingTable` read from a
        path is re-read on the cluster and must have the same fingerprint).
    out, config, force, quiet, table_options
        As in :func:`tripletkit.evaluate.score`; the report folder is written by the client.
    compute : ComputeConfig
        ``scheduler`` (required), ``workers`` (local cluster), ``partitions`` (task groups per
        pass; 0: twice the workers).

    Returns
    -------
    dict
        The report of :func:`tripletkit.evaluate.score`. Equal to the single-process report except ``verification.passes``,
        ``seconds`` and ``stage_seconds`` when the workers run the same BLAS build on the same
        CPU type (see the module notes).
    """
    from ..config import EvaluationConfig
    from ..report import write_report

    t0 = time.perf_counter()
    config = EvaluationConfig() if config is None else config
    if not isinstance(config, EvaluationConfig):
        raise TripletkitError(
            f"config must be an EvaluationConfig (the [evaluation] section), got {type(config).__name__}"
        )
    if out is not None:
        check_output(out, force=force, directory=True)
    path, shown, options, expect = _source(source, table_options)
    _refuse_unsupported("score", config)
    run_config = config
    if config.pairs is not None:  # the workers need a path they can resolve
        run_config = dataclasses.replace(config, pairs=str(Path(config.pairs).resolve()))
    limits = _thread_limits()
    with cluster(compute) as client:
        parts = _shards(client, compute)
        workers = len(client.scheduler_info().get("workers", {}))
        _say(quiet, "score", f"on {compute.scheduler} ({workers} workers), verification in {parts} task groups")
        fut = client.submit(_score_task, path, options, expect, run_config, limits, parts,
                            compute.no_workers_timeout, key=f"tripletkit-score-driver-{uuid.uuid4().hex}")
        (report,) = _gather(client, [fut], compute.no_workers_timeout)
    # the paths as the caller gave them, as in one process
    report["input"]["path"] = shown
    report["input"]["pair_list"] = None if config.pairs is None else str(config.pairs)
    report["config"] = dataclasses.asdict(config)
    for text in report["warnings"]:
        warnings.warn(text, TripletkitWarning, stacklevel=3)
    report["seconds"] = time.perf_counter() - t0
    if out is not None:
        _say(quiet, "score", f"writing {out}")
        with atomic_path(out, force=force, directory=True) as tmp:
            report = write_report(report, tmp, plots=config.plots)
    return report


# ---------------------------------------------------------------------------------------------
# mining
# ---------------------------------------------------------------------------------------------
def _load_shard(files, options, lo, hi):
    """Rows [lo, hi) of the dataset, validated and normalised as EmbeddingTable.read does them."""
    arrow = _read_rows(files, lo, hi)
    cols = {k: v for k, v in options.items() if k != "drop_invalid"}
    try:
        table = EmbeddingTable.from_arrow(arrow, **cols, drop_invalid=bool(options.get("drop_invalid")))
    except TripletkitError:
        if not options.get("drop_invalid"):
            raise
        # the whole table was read without error, so this shard holds invalid rows only
        emb = arrow.column(options.get("embedding_column", "embedding")).type
        return np.empty((0, emb.list_size if pa.types.is_fixed_size_list(emb) else 0), np.float32)
    return table.embeddings


def _shard_summary(rows):
    return int(rows.shape[0]), _digest(rows)


def _search_task(rows, queries, thresholds, k, memory_mb, keep_topk):
    """Every shard row above each query's threshold (shard positions), the shard's top-k, and the
    CPU seconds of this thread (faiss and BLAS run single-threaded in a worker)."""
    t0 = time.thread_time()
    q = queries.shape[0]
    widened = np.zeros(q, bool)
    if rows.shape[0] == 0:
        e = np.zeros(0, np.int64)
        top = (np.zeros((q, 0), np.float32), np.zeros((q, 0), np.int64)) if keep_topk else None
        return e, e, np.zeros(0, np.float32), widened, top, 0.0
    # aligned copies of what arrived over the network (faiss reads them with vector loads)
    rows, queries = (np.require(a, np.float32, ["C", "A"]) for a in (rows, queries))
    index = build_index(rows, "exact")
    qs, rs, ss, top = [], [], [], None
    for sel, nb in index.within_pieces(queries, thresholds, k, memory_mb=memory_mb, keep_topk=keep_topk):
        qs.append(np.repeat(sel, np.diff(nb.lims)))
        rs.append(nb.rows)
        ss.append(nb.scores)
        if nb.widened:
            widened[sel] = True
        if nb.topk is not None:
            top = nb.topk[:2]
    return (np.concatenate(qs), np.concatenate(rs), np.concatenate(ss), widened, top,
            time.thread_time() - t0)


class _ShardedIndex(SearchIndex):
    """An exact index whose rows are shards held by Dask workers; answers as one index would.

    Only :meth:`within_pieces` (and what is built on it) is distributed; it is what the miner
    uses. With :meth:`plan`, the searches of the next :data:`_AHEAD` blocks are already running
    while the miner selects from the current one.
    """

    def __init__(self, client, shards, offsets, n, dim, folder=None, cancelled=None,
                 no_workers_timeout=ComputeConfig.no_workers_timeout):
        super().__init__(None, "exact", n, dim, {})
        self.client = client
        self.shards = shards
        self.offsets = offsets
        self.folder = folder
        self.no_workers_timeout = no_workers_timeout
        self._given_up = _stopper(cancelled or (lambda: False))
        self._plan = None
        self.stats = {"search_tasks": 0, "search_cpu_seconds": 0.0, "search_pairs": 0, "search_wait_seconds": 0.0}

    def plan(self, queries, thresholds, block):
        """The miner will ask for rows [0, block), [block, 2 block), ... of ``queries`` in order."""
        self._plan = (queries, np.asarray(thresholds, dtype=np.float64), int(block))
        self._next, self._ahead = 0, {}

    def _planned(self, queries, thresholds):
        """Start row of the planned block these queries are, or None."""
        if self._plan is None:
            return None
        X, thr, b = self._plan
        s = self._next
        e = min(X.shape[0], s + b)
        if (queries.shape[0] == e - s and np.array_equal(thresholds, thr[s:e])
                and np.array_equal(queries, X[s:e])):
            return s
        return None

    def _submit(self, queries, thresholds, k, memory_mb, keep_topk):
        step = int(max(1, _QUERY_BYTES // (4 * self.dim)))
        out = []
        for s in range(0, queries.shape[0], step):
            sel = np.arange(s, min(queries.shape[0], s + step))
            q = np.ascontiguousarray(queries[sel])
            out.append((sel, [self.client.submit(_search_task, shard, q, thresholds[sel], k, memory_mb, keep_topk,
                                                 pure=False) for shard in self.shards]))
        return out

    def _check(self):
        """Raise when the run was given up: its temporary output removed, or its client gone."""
        if self.folder is not None and not Path(self.folder).is_dir():
            # the client removed its temporary output: it was interrupted, so stop here
            raise TripletkitError(f"output folder {self.folder!r} was removed; the run was cancelled")
        self._given_up()

    def within_pieces(self, queries, thresholds, k, *, memory_mb=1024, keep_topk=False):
        self._check()
        thresholds = np.asarray(thresholds, dtype=np.float64)
        k = int(min(max(1, k), self.n))
        s = self._planned(queries, thresholds)
        if s is None:
            pending = self._submit(queries, thresholds, k, memory_mb, keep_topk)
        else:
            X, thr, b = self._plan
            for t in range(s, min(X.shape[0], s + (_AHEAD + 1) * b), b):
                if t not in self._ahead:
                    self._ahead[t] = self._submit(X[t:t + b], thr[t:t + b], k, memory_mb, keep_topk)
            pending = self._ahead.pop(s)
            self._next = s + b
        for sel, futs in pending:
            t0 = time.perf_counter()
            parts = _gather(self.client, futs, self.no_workers_timeout, self._check)
            self.stats["search_wait_seconds"] += time.perf_counter() - t0
            self.stats["search_tasks"] += len(parts)
            self.stats["search_cpu_seconds"] += sum(p[5] for p in parts)
            self.stats["search_pairs"] += int(sel.size) * self.n
            yield sel, self._merge(parts, sel.size, k, keep_topk)

    def _merge(self, parts, q, k, keep_topk):
        qs = np.concatenate([p[0] for p in parts])
        rs = np.concatenate([p[1] + off for p, off in zip(parts, self.offsets)])
        ss = np.concatenate([p[2] for p in parts])
        widened = int(np.logical_or.reduce([p[3] for p in parts]).sum())
        topk = None
        if keep_topk:
            # top-k merge: a row missing from the merged list scores at most its k-th score
            D = np.concatenate([p[4][0] for p in parts], axis=1)
            I = np.concatenate([p[4][1] + off for p, off in zip(parts, self.offsets)], axis=1)
            order = np.argsort(-D, axis=1, kind="stable")[:, :k]
            D, I = np.take_along_axis(D, order, axis=1), np.take_along_axis(I, order, axis=1)
            topk = (D, I, self.topk_bound(D, I, k))
        # grouped by query (the order within a query does not matter to the miner, which sorts)
        order = np.argsort(qs, kind="stable")
        return Neighbours.from_entries(qs[order], rs[order], ss[order], q, widened, topk)


def _build_sharded(client, files, options, table, parts, folder, cancelled, no_workers_timeout, embeddings, kind,
                   **_):
    """The ``build`` hook of the miner: shards loaded by the workers, checked against the driver's rows."""
    if kind != "exact":
        raise TripletkitError(
            f"index = {kind} is not available with a scheduler; use index = exact (with index = auto, raise "
            "exact_below above the number of rows) or run without a scheduler"
        )
    counts = [pq.ParquetFile(f, **PARQUET_READ).metadata.num_rows for f in files]
    total = int(sum(counts))
    edges = np.linspace(0, total, min(parts, total) + 1).round().astype(np.int64)
    # pure: the same shard gets the same key, so a driver started again finds shards still held
    shards = [client.submit(_load_shard, files, options, int(a), int(b), pure=True)
              for a, b in zip(edges[:-1], edges[1:])]
    info = _gather(client, [client.submit(_shard_summary, s, pure=False) for s in shards], no_workers_timeout,
                   _stopper(cancelled))
    sizes = np.array([m for m, _ in info], np.int64)
    offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    if int(sizes.sum()) != table.n:
        raise TripletkitError(f"the workers read {int(sizes.sum())} valid rows from {files[0]!r}..., the driver "
                              f"{table.n}; the dataset changed during the run or differs between machines")
    for (m, digest), off in zip(info, offsets):
        if digest != _digest(embeddings[off:off + m]):
            raise TripletkitError(f"rows {off}..{off + m - 1} read by a worker differ from the driver's; the dataset "
                                  "changed during the run or differs between machines")
    return _ShardedIndex(client, shards, offsets, table.n, table.dim, folder, cancelled, no_workers_timeout)


class _PartWriter:
    """The triplet writer of a mining output folder: ``part-00000.parquet``, ... of at most
    ``part_rows`` triplets each (a multiple of the row group size), rows in the single file's order."""

    def __init__(self, folder, table, metadata, part_rows=PART_ROWS):
        from ..tables.triplets import TripletWriter

        self._writer_class = TripletWriter
        self.folder = None if folder is None else Path(folder)
        self.table, self.metadata = table, metadata
        self.part_rows = int(part_rows)
        self.parts, self.current, self.rows = [], None, 0

    @property
    def writer(self):
        """The open ParquetWriter, if any (what the mining run closes when it fails)."""
        return None if self.current is None else self.current.writer

    def _open(self):
        name = f"part-{len(self.parts):05d}.parquet"
        self.current = self._writer_class(self.folder / name, self.table, self.metadata)
        self.parts.append(name)
        self.rows = 0

    def add(self, arrays):
        if self.folder is None:
            return
        n, pos = len(arrays["anchor"]), 0
        while pos < n:
            if self.current is None:
                self._open()
            take = min(n - pos, self.part_rows - self.rows)
            self.current.add({key: v[pos:pos + take] for key, v in arrays.items()})
            pos += take
            self.rows += take
            if self.rows == self.part_rows:
                self.current.close()
                self.current = None

    def close(self):
        if self.folder is None:
            return
        if self.current is None and not self.parts:
            self._open()  # no triplet: one empty part keeps the schema and metadata readable
        if self.current is not None:
            self.current.close()
            self.current = None


def _mine_task(path, options, expect, config, folder, parts, part_rows, return_triplets, no_workers_timeout):
    from distributed import worker_client

    from ..mining.run import mine_table

    t0, c0 = time.perf_counter(), time.thread_time()
    cancelled = _watch_driver()
    table = _read_table(path, options, expect)
    attempt = None
    if folder is not None:
        # a fresh folder per attempt: a driver started again never writes beside an earlier one
        attempt = Path(folder) / f".attempt-{uuid.uuid4().hex}"
        attempt.mkdir()
    built = []

    def build(*args, **kwargs):
        built.append(_build_sharded(client, _files(path), options, table, parts,
                                    None if attempt is None else str(attempt), cancelled, no_workers_timeout,
                                    *args, **kwargs))
        return built[-1]

    with worker_client() as client, warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        summary = mine_table(table, config, attempt, None if attempt is None else attempt / "duplicates.parquet",
                             quiet=True, return_triplets=return_triplets, build=build,
                             writer_class=functools.partial(_PartWriter, part_rows=part_rows))
    summary.details["driver_seconds"] = time.perf_counter() - t0
    summary.details["driver_cpu_seconds"] = time.thread_time() - c0
    if built:
        summary.details.update(built[0].stats)
    notes = [(str(w.message), w.category.__name__) for w in caught if issubclass(w.category, TripletkitWarning)]
    return summary, None if attempt is None else str(attempt), notes


def _settle(folder, attempt, dup_tmp):
    """Move the winning attempt's parts into ``folder`` and its duplicates to ``dup_tmp``; drop the rest."""
    attempt = Path(attempt)
    os.replace(attempt / "duplicates.parquet", dup_tmp)
    for part in sorted(attempt.glob("part-*.parquet")):
        os.replace(part, Path(folder) / part.name)
    for entry in Path(folder).iterdir():
        if entry.name.startswith(".") and entry.is_dir():
            shutil.rmtree(entry, ignore_errors=True)


def mine_on_cluster(source, out=None, *, config=None, compute, force=False, quiet=False, return_triplets=False,
                    table_options=None, part_rows=PART_ROWS):
    """:func:`tripletkit.mining.mine` on a Dask cluster: the same triplets, written as a folder of parts.

    Parameters
    ----------
    source : str or Path
        Parquet file or folder every worker can read (an :class:`EmbeddingTable` read from a
        path is re-read on the cluster and must have the same fingerprint).
    out : str or Path, optional
        Output folder (created atomically) of ``part-NNNNN.parquet`` files; the suspect
        duplicates go to ``<stem>.duplicates.parquet`` beside it, as in one process.
    config : MiningConfig, optional
        Mining options; ``index`` must be (or resolve to) ``exact``.
    compute : ComputeConfig
        ``scheduler`` (required), ``workers`` (local cluster), ``partitions`` (gallery shards;
        0: twice the workers).
    force, quiet, return_triplets, table_options
        As in :func:`tripletkit.mining.mine`.
    part_rows : int, default PART_ROWS
        Most triplets per part file.

    Returns
    -------
    MiningSummary
        As in one process; ``details`` adds ``shards``, ``parts`` and ``scheduler``.
    """
    from ..config import MiningConfig
    from ..mining import resolve_config
    from ..tables.triplets import duplicates_path

    t0 = time.perf_counter()
    cfg = resolve_config(config, {})
    if not isinstance(cfg, MiningConfig):
        raise TripletkitError(f"config must be a MiningConfig (or None), got {type(cfg).__name__}")
    if int(part_rows) < 1:
        raise TripletkitError(f"part_rows must be >= 1, got {part_rows!r}")
    path, shown, options, expect = _source(source, table_options)
    dup_out = None
    if out is not None:
        out = Path(out)
        dup_out = duplicates_path(out)
        check_output(out, force=force, directory=True)
        check_output(dup_out, force=force, directory=False)
        check_not_input(out, [path])
        check_not_input(dup_out, [path])
    _refuse_unsupported("mine", cfg, _rows_to_mine(source, path, options) if cfg.index == "auto" else None)
    with cluster(compute) as client, contextlib.ExitStack() as stack:
        parts = _shards(client, compute)
        workers = len(client.scheduler_info().get("workers", {}))
        _say(quiet, "mine", f"on {compute.scheduler} ({workers} workers), gallery in {parts} shards")
        folder = dup_tmp = None
        if out is not None:
            # the folder of parts and the duplicate report are published together or not at all
            folder, dup_tmp = stack.enter_context(atomic_paths([out, dup_out], force=force,
                                                               directory=[True, False]))
        fut = client.submit(_mine_task, path, options, expect, cfg, None if folder is None else str(folder), parts,
                            int(part_rows), return_triplets, compute.no_workers_timeout,
                            key=f"tripletkit-mine-driver-{uuid.uuid4().hex}")
        ((summary, attempt, notes),) = _gather(client, [fut], compute.no_workers_timeout)
        if folder is not None:
            _settle(folder, attempt, dup_tmp)
    for text, _ in notes:
        warnings.warn(text, TripletkitWarning, stacklevel=3)
    summary.seconds = time.perf_counter() - t0
    summary.details.update({"shards": parts, "scheduler": compute.scheduler, "workers": workers})
    if out is not None:
        summary.out, summary.duplicates_out = str(out), str(dup_out)
        summary.details["parts"] = sorted(p.name for p in out.glob("part-*.parquet"))
    _say(quiet, "mine", f"{summary.n_triplets:,} triplets in {summary.seconds:.1f} s" + (f" -> {out}" if out else ""))
    return summary
