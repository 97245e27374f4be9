"""Score an embedding checkpoint on held-out identities: the ``score`` verb.

:func:`score` reads the table (and the optional pair list), estimates what the run will hold
(:func:`scoring_bytes`), runs the metrics of :mod:`tripletkit.metrics` (verification, retrieval,
clustering, health) in this process or, with a scheduler, in a driver task on a Dask cluster
(the same report), and assembles one report dict with stable keys; with ``out`` it writes the
report folder atomically (:mod:`tripletkit.report`).

Legal but degenerate input (one identity, every identity with a single row, two rows) is not an
error: the metric that cannot be computed is ``None`` with a ``reason``, a
:class:`~tripletkit._errors.TripletkitWarning` is issued, and the warning text is also listed
under ``warnings`` in the report. ``strict=True`` (what the command does) refuses a table with no
genuine or no impostor pairs instead.
"""

from __future__ import annotations

import dataclasses
import time
import warnings
from pathlib import Path

from ._errors import TripletkitError, TripletkitWarning
from ._io import atomic_path, check_not_input, check_output, say
from ._validate import whole_number
from .config import EvaluationConfig
from .tables.embeddings import as_table, require_pairs, source_path
from .tables.pairs import read_pair_list

__all__ = ["score", "scoring_bytes"]

# Prefixes of the RuntimeWarnings that the metric functions issue for degenerate input.
_METRIC_WARNINGS = ("verification:", "retrieval:", "clustering:", "health:")


# ---------------------------------------------------------------------------------------------
# the metrics, each with its degenerate cases turned into nulls with a reason
# ---------------------------------------------------------------------------------------------
def _verification(table, cfg, pairs, engine=None):
    from .metrics.verification import verify_all_pairs, verify_pairs

    common = dict(groups=table.groups, fmr_targets=cfg.fmr, bootstrap=cfg.bootstrap,
                  confidence=cfg.confidence, seed=cfg.seed)
    if pairs is None:
        return verify_all_pairs(table.embeddings, table.labels, memory_budget=cfg.memory_mb * 2**20,
                                block_rows=cfg.block_rows or None, workers=cfg.threads or None, engine=engine,
                                **common)
    left, right, same = pairs
    return verify_pairs(table.embeddings, table.labels, left, right, same=same, **common)


def _retrieval(table, cfg):
    from .metrics.retrieval import retrieval_metrics

    if table.n < 2:
        reason = "fewer than 2 rows; there is no gallery to search"
        warnings.warn(f"retrieval: {reason}", RuntimeWarning, stacklevel=2)
        return {"recall_at_k": {str(k): None for k in sorted(cfg.recall_k)}, "r_precision": None,
                "map_at_r": None, "queries": 0, "skipped_queries": int(table.n), "reason": reason}
    return retrieval_metrics(table.embeddings, table.labels, ks=cfg.recall_k,
                             memory_budget=cfg.memory_mb * 2**20, block_rows=cfg.block_rows or None)


def _clustering(table, cfg):
    from .metrics.clustering import clustering_metrics

    # k = identities <= rows always holds for a table, so k-means is always well posed here;
    # the metrics module itself turns a single identity into nulls with a reason.
    return clustering_metrics(table.embeddings, table.labels, seed=cfg.seed)


def _health(table):
    from .metrics.health import (
        COLLAPSE_MAX_IMPOSTOR_COSINE, COLLAPSE_MIN_DIMENSION, collapsed, health_metrics, mean_impostor_cosine,
    )

    if table.n >= 2:
        out = dict(health_metrics(table.embeddings, table.labels))
    else:
        # thin adapter: health_metrics needs 2 rows for the effective dimension; one row gives nulls
        mic = mean_impostor_cosine(table.embeddings, table.labels)
        warnings.warn("health: fewer than 2 rows; effective dimension is undefined", RuntimeWarning, stacklevel=2)
        out = {
            "mean_impostor_cosine": mic,
            "effective_dimension": None,
            "collapsed": collapsed(None, mic),
            "rule": (f"collapsed when effective_dimension < {COLLAPSE_MIN_DIMENSION:g} or "
                     f"mean_impostor_cosine > {COLLAPSE_MAX_IMPOSTOR_COSINE:g} (our rule of thumb)"),
        }
    mic, dim = out["mean_impostor_cosine"], out["effective_dimension"]
    reasons = []
    if mic is None:
        reasons.append("mean_impostor_cosine: no impostor pairs (one identity)")
    if dim is None:
        reasons.append("effective_dimension: " + ("fewer than 2 rows" if table.n < 2 else "the embeddings have no variance"))
    if reasons:
        out["reason"] = "; ".join(reasons)
    return out


def _stage(name, fn, notes, quiet, describe=""):
    """Run one metric stage, collecting the metrics' degenerate-input warnings as report notes."""
    say("score", f"{name}{describe} ...", quiet)
    t0 = time.perf_counter()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = fn()
    for w in caught:
        text = str(w.message)
        if issubclass(w.category, (RuntimeWarning, TripletkitWarning)) and text.startswith(_METRIC_WARNINGS):
            notes.append(text)
            warnings.warn(text, TripletkitWarning, stacklevel=3)
        else:
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    seconds = time.perf_counter() - t0
    say("score", f"{name} done in {seconds:.2f} s", quiet)
    return result, seconds


# ---------------------------------------------------------------------------------------------
# the public entry
# ---------------------------------------------------------------------------------------------
# ---------------------------------------------------------------------------------------------
# what a run holds (the guard of tripletkit._memory compares it with what the machine has)
# ---------------------------------------------------------------------------------------------
# The verification holds about seven int64 histograms of NBINS at once (measured with tracemalloc
# on small tables, where they dominate), and each worker its own int64 one with an int32 scratch.
# One genuine pair score kept for the exact second pass: float64 score, int64 identity, group code.
_BYTES_PER_GENUINE = 24
# Rows (or columns) of integer coordinates per block of the effective dimension (2**(52 - 2*20)).
_HEALTH_BLOCK = 4096


def scoring_bytes(n, d, block_rows, *, memory_mb=512, genuine_pairs=0, identities=0, workers=None):
    """Estimated peak bytes of :func:`tripletkit.evaluate.score` on all pairs of an ``n x d`` table.

    Parameters
    ----------
    n, d : int
        Rows and dimension of the held-out table.
    block_rows : int
        Rows per scoring block (0: sized from ``memory_mb`` as the verification does).
    memory_mb : int
        The evaluation's memory budget (``memory_mb``).
    genuine_pairs : int
        Genuine pairs of the table (sum over identities of s (s - 1) / 2); their scores are kept
        for the exact operating points.
    identities : int
        Identities (the k of the clustering's k-means).
    workers : int, optional
        Verification worker threads (default: as the verification chooses them, one per CPU
        within the budget; see :func:`tripletkit.metrics.allpairs.workers_for`).

    Returns
    -------
    int
        The table and the verification's sorted copy on the exact-cosine grid (float64), the
        block buffers (13 bytes per score of a block and worker), the score histograms, the kept genuine
        scores and highest impostor scores, the retrieval index and its result block, the
        k-means copy and centroids, and the effective dimension's int64 and float64 (m, m) matrices,
        m = min(n, d), with a block of integer rows (health).
    """
    for name, value in dict(n=n, d=d, block_rows=block_rows, memory_mb=memory_mb, genuine_pairs=genuine_pairs,
                            identities=identities).items():
        whole_number(value, name, low=0)
    from .metrics.allpairs import BYTES_PER_BLOCK_SCORE, KEEP_SHARE, block_size, workers_for
    from .metrics.bins import NBINS

    budget = memory_mb * 2**20

    nn = max(n, 1)
    b = block_size(nn, block_rows or None, budget)  # the verification's own rules
    workers = workers_for(nn, b, budget) if workers is None else max(1, min(int(workers), -(-nn // b)))
    vectors = n * d * 4
    # the sorted copy snapped to the exact-cosine grid is float64: twice the table
    verification = (2 * vectors + workers * (BYTES_PER_BLOCK_SCORE * b * n + 12 * NBINS)
                    + 7 * 8 * NBINS + genuine_pairs * _BYTES_PER_GENUINE + int(KEEP_SHARE * budget))
    # retrieval and k-means work on a float64 copy on the exact-cosine grid (twice the table)
    retrieval = 2 * vectors + budget
    clustering = 2 * vectors + identities * d * 12 + n * 16
    m = min(n, d)
    # the exact int64 matrix and its float64 centred copy, and one block of integer rows
    health = 16 * m * m + 8 * m * min(_HEALTH_BLOCK, max(n, d))
    # the stages run one after another: the table stays, the largest stage sets the peak
    return int(vectors + max(verification, retrieval, clustering, health))


def _guard_memory(table, cfg):
    """Refuse, with a suggestion, a scoring run whose blocks would not fit in memory."""
    from ._memory import estimate_and_guard

    sizes = table.identity_sizes()
    need = scoring_bytes(table.n, table.dim, cfg.block_rows, memory_mb=cfg.memory_mb,
                         genuine_pairs=int((sizes * (sizes - 1) // 2).sum()), identities=table.n_identities,
                         workers=cfg.threads or None)
    estimate_and_guard(f"scoring {table.n:,} x {table.dim} rows", max(0, need - table.n * table.dim * 4),
                       suggestion="lower memory_mb=... or block_rows=..., or score a fixed pairs=... list")


def score(source, out=None, *, config=None, force=False, quiet=False, table_options=None, compute=None,
          engine=None, strict=False, config_file=None):
    """Score held-out embeddings: verification, retrieval, clustering and embedding health.

    Parameters
    ----------
    source : str, Path, EmbeddingTable, table object or (ids, labels, embeddings[, groups]) tuple
        The held-out embedding table (identities the model never trained on): anything
        :func:`tripletkit.tables.embeddings.as_table` accepts (a DataFrame, an Arrow table, ...).
    out : str or Path, optional
        Report folder to create with ``report.json``, ``report.md`` and PNG plots. It is written
        atomically (a temporary sibling folder renamed into place) and an existing folder is
        only replaced with ``force``. Without ``out`` nothing is written.
    config : EvaluationConfig, optional
        Evaluation options (``[evaluation]`` of a TOML config); defaults when omitted.
    force : bool, default False
        Replace an existing ``out``.
    quiet : bool, default False
        No progress lines on stderr.
    table_options : dict, optional
        Column names and ``drop_invalid`` for reading ``source`` (see :meth:`EmbeddingTable.read`).
    compute : ComputeConfig, optional
        With ``compute.scheduler`` set, run on a Dask cluster instead: a driver task on a worker
        reads the table and runs the verification's tasks on the cluster (``source`` must then
        be a Parquet path every worker can read); the report is the same.
    engine : object, optional
        Runs the all-pairs verification's tasks (:mod:`tripletkit.engines`; default: threads of
        this process, ``threads`` of the config).
    strict : bool, default False
        Refuse (:class:`TripletkitError`) a table scored over all pairs that has no genuine or no
        impostor pair, instead of warning and reporting nulls (the command is strict).
    config_file : str or Path, optional
        The TOML file ``config`` was read from, never to be replaced by ``out``.

    Returns
    -------
    dict
        The report, with keys

        - ``tripletkit_version``;
        - ``input``: ``path``, ``fingerprint``, ``rows``, ``identities``, ``dim``,
          ``dropped_rows``, ``groups`` (number of subgroups or None), ``pair_list`` (path or None);
        - ``config``: the evaluation options used;
        - ``verification``: ``genuine_pairs``, ``impostor_pairs``, ``auc``, ``auc_exact``,
          ``auc_error_bound``, ``eer``, ``eer_threshold``, ``fnmr_at_fmr`` (keyed by the FMR as a
          string, e.g. ``"0.001"``: ``fnmr``, ``threshold``, ``ci``, ``resolvable``, ``reason``),
          ``roc`` (``fpr``, ``tpr``, ``threshold``), ``det`` (``fmr``, ``fnmr``),
          ``score_histogram`` (``edges``, ``genuine``, ``impostor``), ``bootstrap`` and, with a
          group column, ``groups``; see :func:`tripletkit.metrics.verification.verify_all_pairs`;
        - ``retrieval``: ``recall_at_k`` (keyed ``"1"``, ``"5"``, ...), ``r_precision``,
          ``map_at_r``, ``queries``, ``skipped_queries``;
        - ``clustering``: ``purity``, ``nmi``, ``ari``, ``clusters``, ``seed`` (``None`` when
          ``clustering = false``);
        - ``health``: ``mean_impostor_cosine``, ``effective_dimension``, ``collapsed``, ``rule``;
        - ``warnings``: the degenerate-input warnings of this run (list of str);
        - ``caution``: :data:`tripletkit.report.CAUTION`;
        - ``plots``: PNG files written (``[{"file", "title"}]``; empty without ``out``);
        - ``seconds``: wall time of loading and scoring (writing excluded);
        - ``stage_seconds``: wall time of each stage.

        A value that cannot be computed is ``None`` with a ``reason`` key beside it.

    Raises
    ------
    TripletkitError
        Bad input: a missing or invalid table or pair list, a pair list that disagrees with the
        labels, an existing ``out`` without ``force``.
    """
    t_start = time.perf_counter()
    if config is None:
        config = EvaluationConfig()
    if not isinstance(config, EvaluationConfig):
        raise TripletkitError(
            f"config must be an EvaluationConfig (the [evaluation] section), got {type(config).__name__}"
        )
    if out is not None:
        # fail before the work, not after it; and never replace a folder holding an input
        check_output(out, force=force, directory=True)
        check_not_input(out, [source_path(source), config.pairs, config_file])
    if compute is not None and compute.scheduler is not None:
        report = _score_on_cluster(source, config, compute, quiet, table_options, strict)
    else:
        report = _score_here(source, config, quiet, table_options, engine, strict)
    report["seconds"] = time.perf_counter() - t_start
    if out is not None:
        from .report import write_report

        say("score", f"writing {out}", quiet)
        with atomic_path(out, force=force, directory=True) as tmp:
            report = write_report(report, tmp, plots=config.plots)
        say("score", f"report written to {Path(out) / 'report.md'}", quiet)
    return report


def _score_here(source, cfg, quiet, table_options, engine, strict):
    """The report of ``source``, scored in this process (``seconds`` is set by the caller)."""
    from . import __version__
    from .report import CAUTION

    stage_seconds = {}
    notes = []
    t0 = time.perf_counter()
    table = as_table(source, **(table_options or {}))
    pairs = None
    if cfg.pairs is not None:
        pairs = read_pair_list(cfg.pairs, table)
    elif strict:
        # all pairs: with no genuine or no impostor pair nothing could be computed but nulls
        require_pairs(table, "scoring")
    stage_seconds["load"] = time.perf_counter() - t0
    _guard_memory(table, cfg)
    say("score", f"read {table.n:,} rows, {table.n_identities:,} identities, dimension {table.dim}"
        + (f", {table.dropped:,} invalid rows dropped" if table.dropped else ""), quiet)

    n_pairs = table.n * (table.n - 1) // 2 if pairs is None else pairs[0].size
    ver, stage_seconds["verification"] = _stage(
        "verification", lambda: _verification(table, cfg, pairs, engine), notes, quiet,
        f" over {'all' if pairs is None else 'the listed'} {n_pairs:,} pairs")
    ret, stage_seconds["retrieval"] = _stage("retrieval", lambda: _retrieval(table, cfg), notes, quiet)
    clu = None
    if cfg.clustering:
        clu, stage_seconds["clustering"] = _stage(
            "clustering", lambda: _clustering(table, cfg), notes, quiet,
            f" (k-means, k = {table.n_identities:,})")
    hea, stage_seconds["health"] = _stage("health", lambda: _health(table), notes, quiet)
    return {
        "tripletkit_version": __version__,
        "input": {
            "path": table.source if table.source is not None else (str(source) if isinstance(source, (str, Path))
                                                                    else None),
            "fingerprint": table.fingerprint,
            "rows": int(table.n),
            "identities": int(table.n_identities),
            "dim": int(table.dim),
            "dropped_rows": int(table.dropped),
            "groups": None if table.groups is None else int(len(set(table.groups.tolist()))),
            "pair_list": None if cfg.pairs is None else str(cfg.pairs),
        },
        "config": dataclasses.asdict(cfg),
        "verification": ver,
        "retrieval": ret,
        "clustering": clu,
        "health": hea,
        "warnings": notes,
        "caution": CAUTION,
        "plots": [],
        "seconds": None,
        "stage_seconds": stage_seconds,
    }


# ---------------------------------------------------------------------------------------------
# on a Dask cluster: a driver task scores the table there, its verification tasks spread out
# ---------------------------------------------------------------------------------------------
def _score_on_cluster(source, config, compute, quiet, table_options, strict):
    """The report of ``source`` scored by a driver task on the cluster of ``compute``."""
    from .engines.dask import (cluster, refuse_unsupported, shard_count, submit_driver, table_source, thread_limits,
                               worker_count)

    path, shown, options, expect = table_source(source, table_options)
    refuse_unsupported("score", config)
    run_config = config
    if config.pairs is not None:  # the workers need a path they can resolve
        run_config = dataclasses.replace(config, pairs=str(Path(config.pairs).resolve()))
    limits = thread_limits()
    with cluster(compute) as client:
        parts = shard_count(client, compute)
        say("score", f"on {compute.scheduler} ({worker_count(client)} workers), verification in {parts} task groups",
            quiet)
        report = submit_driver(client, _score_driver, path, options, expect, run_config, limits, parts,
                               compute.no_workers_timeout, strict, name="score",
                               no_workers_timeout=compute.no_workers_timeout)
    # the paths as the caller gave them, as in one process
    report["input"]["path"] = shown
    report["input"]["pair_list"] = None if config.pairs is None else str(config.pairs)
    report["config"] = dataclasses.asdict(config)
    for text in report["warnings"]:
        warnings.warn(text, TripletkitWarning, stacklevel=4)
    return report


def _score_driver(path, options, expect, config, limits, parts, no_workers_timeout, strict):
    """The driver task: read the table on this worker and score it, the verification's tasks run
    by a :class:`~tripletkit.engines.dask.DaskEngine` on the cluster."""
    from distributed import worker_client

    from .engines.dask import DaskEngine, read_table_on_worker, thread_limits_applied, watch_driver

    cancelled = watch_driver()
    table = read_table_on_worker(path, options, expect)
    with thread_limits_applied(limits), worker_client() as client:
        engine = DaskEngine(client, parts, limits, cancelled, no_workers_timeout)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # the report lists them; the client issues them again
            return _score_here(table, config, True, None, engine, strict)
