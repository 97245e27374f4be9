"""Score an embedding checkpoint on held-out identities: run the metrics, build the report dict.

:func:`score` is the Python face of ``tripletkit score``. It reads the table (and the optional
pair list), runs the pure metric functions of :mod:`tripletkit.metrics` (verification, retrieval,
clustering, health) and assembles one report dict with stable keys (listed in :func:`score` and
the README). With ``out`` it also writes ``report.json``, ``report.md`` and the PNG plots of
:mod:`tripletkit.report` into a folder, atomically.

Scores are cosine similarities of the unit-normalised embeddings (higher means more alike); a
pair is accepted at threshold t when its score is >= t (ISO/IEC 19795-1 terms, see
:mod:`tripletkit.metrics.verification`).

Legal but degenerate input (one identity, every identity with a single row, two rows) is not an
error: the metric that cannot be computed is ``None`` with a ``reason``, a
:class:`~tripletkit._errors.TripletkitWarning` is issued, and the warning text is also listed
under ``warnings`` in the report.
"""

from __future__ import annotations

import dataclasses
import sys
import time
import warnings
from pathlib import Path

import numpy as np

from ._errors import TripletkitError, TripletkitWarning
from ._io import atomic_path, check_not_input, check_output, read_parquet
from .config import EvaluationConfig
from .tables.embeddings import as_table, source_path
from .tables.pairs import read_pair_list

__all__ = ["score"]

# Prefixes of the RuntimeWarnings that the metric functions issue for degenerate input.
_METRIC_WARNINGS = ("verification:", "retrieval:", "clustering:", "health:")


def _say(quiet, text):
    if not quiet:
        print(f"[score] {text}", file=sys.stderr, flush=True)


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
    _say(quiet, f"{name}{describe} ...")
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
    _say(quiet, f"{name} done in {seconds:.2f} s")
    return result, seconds


# ---------------------------------------------------------------------------------------------
# the public entry
# ---------------------------------------------------------------------------------------------
def _guard_memory(table, cfg):
    """Refuse, with a suggestion, a scoring run whose blocks would not fit in memory."""
    from ._memory import estimate_and_guard, scoring_bytes

    sizes = table.identity_sizes()
    need = scoring_bytes(table.n, table.dim, cfg.block_rows, memory_mb=cfg.memory_mb,
                         genuine_pairs=int((sizes * (sizes - 1) // 2).sum()), identities=table.n_identities,
                         workers=cfg.threads or None)
    estimate_and_guard(f"scoring {table.n:,} x {table.dim} rows", max(0, need - table.n * table.dim * 4),
                       suggestion="lower --memory-mb or --block-rows, or score a fixed --pairs list")


def score(source, out=None, *, config=None, force=False, quiet=False, table_options=None, compute=None,
          engine=None):
    """Score held-out embeddings: verification, retrieval, clustering and embedding health.

    Parameters
    ----------
    source : str, Path, EmbeddingTable or (ids, labels, embeddings[, groups]) tuple
        The held-out embedding table (identities the model never trained on).
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
        With ``compute.scheduler`` set, run on a Dask cluster instead
        (:func:`tripletkit.distributed.score_on_cluster`; ``source`` must then be a Parquet
        path the workers can read); the report is the same.
    engine : object, optional
        Runs the all-pairs verification's tasks (:mod:`tripletkit.engines`; default: threads of
        this process, ``threads`` of the config).

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
    from . import __version__
    from .report import CAUTION, write_report

    t_start = time.perf_counter()
    if config is None:
        config = EvaluationConfig()
    if not isinstance(config, EvaluationConfig):
        raise TripletkitError(
            f"config must be an EvaluationConfig (the [evaluation] section), got {type(config).__name__}"
        )
    if compute is not None and getattr(compute, "scheduler", None) is not None:
        from .engines.dask import score_on_cluster

        return score_on_cluster(source, out, config=config, force=force, quiet=quiet,
                                table_options=table_options, compute=compute)
    if out is not None:
        # fail before the work, not after it; and never replace a folder holding an input
        check_output(out, force=force, directory=True)
        check_not_input(out, [source_path(source), config.pairs])
    cfg = config
    stage_seconds = {}
    notes = []

    t0 = time.perf_counter()
    table = as_table(source, **(table_options or {}))
    pairs = None
    if cfg.pairs is not None:
        pairs = read_pair_list(cfg.pairs, table)
    stage_seconds["load"] = time.perf_counter() - t0
    _guard_memory(table, cfg)
    _say(quiet, f"read {table.n:,} rows, {table.n_identities:,} identities, dimension {table.dim}"
         + (f", {table.dropped:,} invalid rows dropped" if table.dropped else ""))

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

    report = {
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
        "seconds": time.perf_counter() - t_start,
        "stage_seconds": stage_seconds,
    }
    if out is not None:
        _say(quiet, f"writing {out}")
        with atomic_path(out, force=force, directory=True) as tmp:
            report = write_report(report, tmp, plots=cfg.plots)
        _say(quiet, f"report written to {Path(out) / 'report.md'}")
    return report
