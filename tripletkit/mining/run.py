"""A mining run on a validated table: build the index and the plan, mine the blocks in row order,
write the triplets and the suspect duplicates, and summarise.

:func:`mine_table` is what :func:`tripletkit.mining.mine` runs once the options, the outputs and
the memory are checked; the Dask engine runs it too, with its own index (searching shards held by
the workers) and its own writer (a folder of part files).
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import sys
import time
import warnings

import numpy as np
from tqdm import tqdm

from .. import __version__
from .._errors import TripletkitError, TripletkitWarning
from ..tables.triplets import TripletWriter, write_duplicates
from . import MiningSummary
from .candidates import mine_block
from .index import build_index, estimate_recall, faiss_threads, resolve_kind
from .plan import make_plan, query_threshold
from .regimes import HARD, REGIMES
from .select import uniform

__all__ = ["mine_table"]

# Metadata keys are namespaced so they do not collide with other tools' keys.
_META = "tripletkit."


def mine_table(table, config, out, duplicates_out, *, quiet=False, return_triplets=False, build=None,
               writer_class=None, dense=None):
    """Mine a validated table, writing to paths that are already temporary ones.

    Parameters
    ----------
    table : EmbeddingTable
    config : MiningConfig
        Validated options (:func:`tripletkit.mining.resolve_config`).
    out, duplicates_out : Path or None
        Where the triplet table and the suspect-duplicate report go (None: not written).
    quiet : bool, default False
        No progress bar.
    return_triplets : bool, default False
        Also return the triplets as arrays (``summary.triplets``).
    build : callable, optional
        Makes the search index, with the signature of :func:`~tripletkit.mining.index.build_index`
        (default: that function).
    writer_class : callable, optional
        ``writer_class(path, table, metadata)`` makes the triplet writer (default
        :class:`~tripletkit.tables.triplets.TripletWriter`); it has ``add``, ``close`` and a
        ``writer`` attribute (the open file, or None).
    dense : bool, optional
        Force the dense path or the index search (see :func:`~tripletkit.mining.plan.make_plan`).

    Returns
    -------
    MiningSummary
    """
    t0 = time.perf_counter()
    if config.select == "distance-weighted" and table.dim < 2:
        raise TripletkitError(f"select = distance-weighted needs embeddings of dimension >= 2, got {table.dim}")
    kind = resolve_kind(config.index, table.n, config.exact_below)
    with faiss_threads(config.threads):
        index = (build or build_index)(table.embeddings, kind, nlist=config.ivf_nlist, nprobe=config.ivf_nprobe,
                                       hnsw_m=config.hnsw_m, ef_search=config.hnsw_ef_search,
                                       ef_construction=config.hnsw_ef_construction, seed=config.seed)
        plan = make_plan(table, config, index, dense=dense)
        _warn_degenerate(plan, table)
        recall, relevant = _recall(plan, index)
        with contextlib.ExitStack() as stack:
            writer = (writer_class or TripletWriter)(out, table, _metadata(config, table, index, recall))
            stack.callback(_close_quietly, writer)
            totals = _Totals(return_triplets)
            _mine_blocks(plan, index, writer, totals, quiet)
            writer.close()
            dup_a, dup_b, dup_cos = totals.duplicate_pairs(plan.n)
            if duplicates_out is not None:
                write_duplicates(duplicates_out, table, dup_a, dup_b, dup_cos,
                                 _metadata(config, table, index, recall,
                                           {"duplicate_cosine": config.duplicate_cosine}))
    total = int(totals.regime_counts.sum())
    if total == 0 and plan.anchors.size and table.n_identities > 1:
        warnings.warn("no triplet was mined (see pairs_without_negative); active_fraction is null",
                      TripletkitWarning, stacklevel=3)
    return MiningSummary(
        n_triplets=total,
        anchors=int(plan.anchors.size),
        regimes={r: int(totals.regime_counts[REGIMES.index(r)]) for r in config.regimes},
        active_fraction=(totals.active / total) if total else None,
        pairs_without_negative={r: int(totals.without[REGIMES.index(r)]) for r in config.regimes},
        singletons_skipped=plan.singletons,
        suspect_duplicates=int(dup_a.size),
        index=index.kind,
        recall=recall,
        seconds=time.perf_counter() - t0,
        triplets=_gather(totals.collected, table) if return_triplets else None,
        details={"pairs": int(plan.pair_anchors.size), "widened_queries": totals.widened,
                 "easy_scanned_pairs": totals.easy_scanned, "index_params": index.params,
                 "recall_relevant": relevant, "dense_rows": totals.dense_rows,
                 "dense_share": plan.dense_share},
    )


def _mine_blocks(plan, index, writer, totals, quiet):
    """Mine the blocks of the plan in row order, writing each block's triplets as it comes."""
    n, block = plan.n, plan.block_rows
    search_ahead = getattr(index, "plan", None)
    if search_ahead is not None:  # an index that searches ahead of the blocks (the Dask engine's)
        search_ahead(plan.embeddings, plan.thresholds, block)
    bar = tqdm(total=n, desc="mine", unit="row", file=sys.stderr, leave=False,
               disable=quiet or not _is_tty(sys.stderr))
    with bar:
        for start in range(0, n, block):
            stop = min(n, start + block)
            result = mine_block(plan, index, start, stop)
            totals.add(result)
            if result.triplets is not None:
                writer.add(result.triplets)
            bar.update(stop - start)


class _Totals:
    """The blocks' results added up (and their triplets kept, when they are returned)."""

    def __init__(self, keep_triplets):
        self.regime_counts = np.zeros(len(REGIMES), dtype=np.int64)
        self.without = np.zeros(len(REGIMES), dtype=np.int64)
        self.active = self.widened = self.easy_scanned = self.dense_rows = 0
        self.duplicates = []
        self.collected = [] if keep_triplets else None

    def add(self, result):
        self.regime_counts += result.regime_counts
        self.without += result.without
        self.active += result.active
        self.widened += result.widened
        self.easy_scanned += result.easy_scanned
        self.dense_rows += result.dense_rows
        self.duplicates.extend(result.duplicates)
        if self.collected is not None and result.triplets is not None:
            self.collected.append(result.triplets)

    def duplicate_pairs(self, n):
        """Unique unordered suspect pairs (row_a < row_b) and their cosines, most similar first."""
        if not self.duplicates:
            return np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.float64)
        i = np.concatenate([d[0] for d in self.duplicates])
        j = np.concatenate([d[1] for d in self.duplicates])
        c = np.concatenate([d[2] for d in self.duplicates])
        _, first = np.unique(i * np.int64(n) + j, return_index=True)
        i, j, c = i[first], j[first], c[first]
        order = np.lexsort((j, i, -c))
        return i[order], j[order], c[order]


def _recall(plan, index):
    """Fraction of the exact hard and semi-hard candidates of sampled anchors the index finds,
    and how many there are ((None, 0) for an exact index)."""
    config = plan.config
    if not index.approximate or not plan.anchors.size:
        return None, 0
    u = uniform(plan.streams.recall, plan.anchors)
    take = np.sort(np.argsort(u, kind="stable")[:config.recall_sample])
    _, pairs = plan.pairs_of(take)
    # hard and semi-hard as requested; both when the run asks for easy only
    bound = plan.d_ap[pairs] if plan.searched == (HARD,) else plan.d_ap[pairs] + plan.margin
    found, relevant = estimate_recall(index, plan.embeddings, plan.pair_anchors[pairs],
                                      query_threshold(bound, plan.distance), labels=plan.labels,
                                      k=config.neighbours, memory_mb=plan.memory_mb)
    if relevant == 0:
        warnings.warn("recall is undefined: the sampled anchors have no hard or semi-hard candidate "
                      "(reported as null)", TripletkitWarning, stacklevel=3)
        return None, 0
    return found / relevant, relevant


def _warn_degenerate(plan, table):
    if not plan.anchors.size:
        warnings.warn("no identity has two rows, so there is no anchor; nothing will be mined",
                      TripletkitWarning, stacklevel=4)
    elif table.n_identities < 2:
        warnings.warn("the table has a single identity, so there are no negatives; nothing will be mined",
                      TripletkitWarning, stacklevel=4)


def _metadata(config, table, index, recall, extra=None):
    """Key-value metadata of the outputs: the options, the index, the input's fingerprint."""
    values = {
        "margin": config.margin, "distance": config.distance, "regimes": list(config.regimes),
        "select": config.select, "index": index.kind, "index_params": index.params, "seed": config.seed,
        "rows": table.n, "fingerprint": table.fingerprint, "recall": recall, "version": __version__,
        "options": {f.name: (list(v) if isinstance(v := getattr(config, f.name), tuple) else v)
                    for f in dataclasses.fields(config)},
    }
    values.update(extra or {})
    return {f"{_META}{k}": json.dumps(v, sort_keys=True) for k, v in values.items()}


def _close_quietly(writer):
    with contextlib.suppress(Exception):
        if writer.writer is not None:
            writer.writer.close()


def _is_tty(stream):
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False


def _gather(collected, table):
    keys = ("anchor", "positive", "negative", "d_ap", "d_an", "violation", "regime")
    dtypes = (np.int64, np.int64, np.int64, np.float32, np.float32, np.float32, np.int8)
    if collected:
        out = {k: np.concatenate([c[k] for c in collected]) for k in keys}
    else:
        out = {k: np.zeros(0, dtype=t) for k, t in zip(keys, dtypes)}
    for role in ("anchor", "positive", "negative"):
        out[f"{role}_id"] = table.ids[out[role]]
    out["anchor_label"] = table.label_values[table.labels[out["anchor"]]]
    out["negative_label"] = table.label_values[table.labels[out["negative"]]]
    return out
