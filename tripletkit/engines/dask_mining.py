"""Mining on a Dask cluster: the exact search sharded over the workers, selection in a driver task.

The gallery is split into ``compute.partitions`` shards of consecutive rows (default twice the
workers); each shard is a task that reads its rows from the Parquet dataset and normalises them as
:class:`~tripletkit.tables.embeddings.EmbeddingTable` does. A driver task reads the table on a
worker and runs :func:`tripletkit.mining.run.mine_table` unchanged, with a search index whose every
query (a block of anchors and their thresholds) becomes one task per shard; the shards' candidates
and top-k lists are merged and selection runs in the driver as in one process, so with the exact
index the triplets are the same as in one process, row for row.

The output is a folder of part files ``part-00000.parquet``, ... of at most :data:`PART_ROWS`
triplets each, in the row order of the single file, and ``<stem>.duplicates.parquet`` beside it.
The driver writes into ``.OUT.tmp-*/.attempt-*/`` and the client moves the parts into place when
the driver has returned, so a retried driver never mixes with an earlier attempt and ``OUT``
appears whole or not at all. A client killed hard leaves ``.OUT.tmp-*`` to delete; the driver, which
Dask cannot interrupt, stops at its next block when its folder is gone or its client let it go.
"""

from __future__ import annotations

import contextlib
import functools
import os
import shutil
import time
import uuid
import warnings
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .._errors import TripletkitError, TripletkitWarning
from .._io import PARQUET_READ, atomic_paths, check_not_input, check_output, say
from ..mining.index import Neighbours, SearchIndex, build_index
from ..tables.embeddings import EmbeddingTable, require_pairs
from . import dask as core
from .dask import (worker_count, digest, read_rows, read_table_on_worker, refuse_unsupported, rows_to_mine, shard_count, stopper,
                   submit_driver, table_files, table_source, wait_for, watch_driver)

__all__ = ["PART_ROWS", "mine_on_cluster"]

#: Most triplets per part file of a mining output folder (16 row groups of the single file).
PART_ROWS = 1 << 20
# Largest query payload sent with one search task (bytes); larger blocks are cut into chunks.
_QUERY_BYTES = 4 << 20
# Blocks of anchors searched ahead of the one the miner selects from.
_AHEAD = 1


# ---------------------------------------------------------------------------------------------
def _load_shard(files, options, lo, hi):
    """Rows [lo, hi) of the dataset, validated and normalised as EmbeddingTable.read does them."""
    arrow = read_rows(files, lo, hi)
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
    return int(rows.shape[0]), digest(rows)


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
                 no_workers_timeout=300.0):
        super().__init__(None, "exact", n, dim, {})
        self.client = client
        self.shards = shards
        self.offsets = offsets
        self.folder = folder
        self.no_workers_timeout = no_workers_timeout
        self._given_up = stopper(cancelled or (lambda: False))
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
            parts = wait_for(self.client, futs, self.no_workers_timeout, self._check)
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
    info = wait_for(client, [client.submit(_shard_summary, s, pure=False) for s in shards], no_workers_timeout,
                   stopper(cancelled))
    sizes = np.array([m for m, _ in info], np.int64)
    offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    if int(sizes.sum()) != table.n:
        raise TripletkitError(f"the workers read {int(sizes.sum())} valid rows from {files[0]!r}..., the driver "
                              f"{table.n}; the dataset changed during the run or differs between machines")
    for (m, shard_digest), off in zip(info, offsets):
        if shard_digest != digest(embeddings[off:off + m]):
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


def _mine_task(path, options, expect, config, folder, parts, part_rows, return_triplets, no_workers_timeout, strict):
    from distributed import worker_client

    from ..mining.run import mine_table

    t0, c0 = time.perf_counter(), time.thread_time()
    cancelled = watch_driver()
    table = read_table_on_worker(path, options, expect)
    if strict:
        require_pairs(table, "mining")
    attempt = None
    if folder is not None:
        # a fresh folder per attempt: a driver started again never writes beside an earlier one
        attempt = Path(folder) / f".attempt-{uuid.uuid4().hex}"
        attempt.mkdir()
    built = []

    def build(*args, **kwargs):
        built.append(_build_sharded(client, table_files(path), options, table, parts,
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
                    table_options=None, part_rows=PART_ROWS, strict=False, config_file=None):
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
    force, quiet, return_triplets, table_options, strict, config_file
        As in :func:`tripletkit.mining.mine` (``strict`` is checked on the driver, which reads the table).
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
    path, shown, options, expect = table_source(source, table_options)
    dup_out = None
    if out is not None:
        out = Path(out)
        dup_out = duplicates_path(out)
        check_output(out, force=force, directory=True)
        check_output(dup_out, force=force, directory=False)
        check_not_input(out, [path, config_file])
        check_not_input(dup_out, [path, config_file])
    refuse_unsupported("mine", cfg, rows_to_mine(source, path, options) if cfg.index == "auto" else None)
    with core.cluster(compute) as client, contextlib.ExitStack() as stack:
        parts = shard_count(client, compute)
        workers = worker_count(client)
        say("mine", f"on {compute.scheduler} ({workers} workers), gallery in {parts} shards", quiet)
        folder = dup_tmp = None
        if out is not None:
            # the folder of parts and the duplicate report are published together or not at all
            folder, dup_tmp = stack.enter_context(atomic_paths([out, dup_out], force=force,
                                                               directory=[True, False]))
        summary, attempt, notes = submit_driver(
            client, _mine_task, path, options, expect, cfg, None if folder is None else str(folder), parts,
            int(part_rows), return_triplets, compute.no_workers_timeout, strict, name="mine",
            no_workers_timeout=compute.no_workers_timeout)
        if folder is not None:
            _settle(folder, attempt, dup_tmp)
    for text, _ in notes:
        warnings.warn(text, TripletkitWarning, stacklevel=3)
    summary.seconds = time.perf_counter() - t0
    summary.details.update({"shards": parts, "scheduler": compute.scheduler, "workers": workers})
    if out is not None:
        summary.out, summary.duplicates_out = str(out), str(dup_out)
        summary.details["parts"] = sorted(p.name for p in out.glob("part-*.parquet"))
    say("mine", f"{summary.n_triplets:,} triplets in {summary.seconds:.1f} s" + (f" -> {out}" if out else ""),
        quiet)
    return summary
