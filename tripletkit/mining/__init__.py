"""Mining: choose the easy, semi-hard and hard triplets the next epoch trains on.

:func:`mine` draws anchors and positives from an embedding table and, per (anchor, positive) pair
and requested regime, negatives of other identities, and writes the triplet table (Parquet, in
fixed row groups, atomically) with a report of suspect duplicates beside it. The work is a plan
(:mod:`.plan`) of independent blocks of query rows (:mod:`.candidates`), merged in row order
(:mod:`.run`); regimes are decided in :mod:`.regimes` on exact float64 cosines, and every draw is
counter-based (:mod:`.select`), so the same seed, input and options give the same bytes whatever
the block sizes. Importing this package does not load faiss; :func:`mine` does.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path

from .regimes import REGIMES

__all__ = ["mine", "MiningSummary", "resolve_config", "REGIMES"]


@dataclass
class MiningSummary:
    """What :func:`mine` did.

    Attributes
    ----------
    n_triplets : int
        Triplets written (``to_dict()["triplets"]``).
    anchors : int
        Anchors drawn (rows of identities with at least two rows, capped by ``max_per_identity``).
    regimes : dict of str -> int
        Triplets per requested regime.
    active_fraction : float or None
        Fraction of triplets with violation > 0 (None when there are none).
    pairs_without_negative : dict of str -> int
        Per requested regime, the (anchor, positive) pairs that have no negative in it.
    singletons_skipped : int
        Rows of identities with a single row (they cannot be anchors).
    suspect_duplicates : int
        Unordered pairs of rows with different labels and cosine > ``duplicate_cosine``.
    index : str
        Index kind used (``auto`` resolved).
    recall : float or None
        For ivf/hnsw: fraction of the exact hard and semi-hard candidates of a sample of anchors
        that the index found; None for exact (and, with a warning, when the sample has none).
    seconds : float
        Wall time of the call.
    out, duplicates_out : str or None
        Paths written.
    triplets : dict of str -> ndarray or None
        With ``return_triplets=True``: ``anchor``, ``positive``, ``negative`` (row positions,
        int64), ``anchor_id``, ``positive_id``, ``negative_id``, ``anchor_label``,
        ``negative_label`` (original values), ``d_ap``, ``d_an``, ``violation`` (float32) and
        ``regime`` (int8 codes into :data:`REGIMES`).
    details : dict
        Extra counters, not in ``to_dict``: ``pairs``, ``widened_queries``,
        ``easy_scanned_pairs``, ``index_params``, ``recall_relevant``, ``dense_rows`` (query rows
        mined on the dense path) and ``dense_share`` (the sampled share of the table inside the
        anchors' bands that chose the path; None when not sampled: approximate index, nothing
        searched, or the path forced with ``dense``).
    """

    n_triplets: int
    anchors: int
    regimes: dict
    active_fraction: float | None
    pairs_without_negative: dict
    singletons_skipped: int
    suspect_duplicates: int
    index: str
    recall: float | None
    seconds: float
    out: str | None = None
    duplicates_out: str | None = None
    triplets: dict | None = field(default=None, repr=False)
    details: dict = field(default_factory=dict, repr=False)

    def to_dict(self):
        """The summary as a JSON-ready dict (the keys of ``tripletkit mine --json``)."""
        return {
            "triplets": int(self.n_triplets),
            "anchors": int(self.anchors),
            "regimes": {k: int(v) for k, v in self.regimes.items()},
            "active_fraction": None if self.active_fraction is None else float(self.active_fraction),
            "pairs_without_negative": {k: int(v) for k, v in self.pairs_without_negative.items()},
            "singletons_skipped": int(self.singletons_skipped),
            "suspect_duplicates": int(self.suspect_duplicates),
            "index": self.index,
            "recall": None if self.recall is None else float(self.recall),
            "seconds": float(self.seconds),
            "out": self.out,
            "duplicates_out": self.duplicates_out,
        }


def resolve_config(config, options):
    """The mining options of a run: ``config`` (default ``MiningConfig()``) with ``options`` applied.

    Parameters
    ----------
    config : MiningConfig or None
    options : dict
        Fields to override, validated like config keys (a single regime may be a string).

    Returns
    -------
    MiningConfig
    """
    from .._errors import TripletkitError
    from ..config import MiningConfig, override

    if config is None:
        config = MiningConfig()
    elif not isinstance(config, MiningConfig):
        raise TripletkitError(f"config must be a MiningConfig (or None), got {type(config).__name__}")
    if isinstance(options.get("regimes"), str):
        options = {**options, "regimes": (options["regimes"],)}
    return override(config, **options)


def mine(source, out=None, *, config=None, force=False, quiet=False, return_triplets=False, compute=None,
         table_options=None, dense=None, strict=False, config_file=None, **options):
    """Mine easy, semi-hard and hard triplets from an embedding table.

    Parameters
    ----------
    source : str, Path, EmbeddingTable, table object or (ids, labels, embeddings) tuple
        The embeddings of the training set: anything :func:`tripletkit.tables.embeddings.as_table`
        accepts (a DataFrame, an Arrow table, ...).
    out : str or Path, optional
        Parquet path of the triplet table. The suspect-duplicate report is written beside it as
        ``<stem>.duplicates.parquet`` (columns id_a, id_b, label_a, label_b, cosine). Both are
        written atomically; existing files are replaced only with ``force``. None: write nothing.
    config : MiningConfig, optional
        Options (defaults: ``MiningConfig()``).
    force : bool, default False
        Replace existing outputs.
    quiet : bool, default False
        No progress bar (it is also off when stderr is not a terminal).
    return_triplets : bool, default False
        Also return the triplets as arrays (``summary.triplets``).
    compute : ComputeConfig, optional
        With ``compute.scheduler`` set, run on a Dask cluster
        (:func:`tripletkit.engines.dask_mining.mine_on_cluster`): ``source`` must be a Parquet path the
        workers can read, and ``out`` becomes a folder of part files; same triplets.
    table_options : dict, optional
        Column names and ``drop_invalid`` for reading a path ``source`` (see
        :meth:`EmbeddingTable.read`).
    dense : bool, optional
        The candidate path of an exact index: None (default) takes the dense path when the
        sampled anchors' search bands hold at least :data:`~tripletkit.mining.plan.DENSE_SHARE`
        of the table, True always, False never (the index search). Both paths write the same
        bytes; the knob is for tests and benchmarks. Not available with a scheduler.
    strict : bool, default False
        Refuse (:class:`TripletkitError`) a table with no genuine or no impostor pair instead of
        warning and mining nothing (the command is strict).
    config_file : str or Path, optional
        The TOML file ``config`` was read from, never to be replaced by ``out``.
    **options
        Override fields of ``config`` (validated like config keys), e.g. ``margin=0.3``,
        ``regimes=("hard",)``, ``select="hardest"``.

    Returns
    -------
    MiningSummary

    Notes
    -----
    Output rows are ordered by anchor row position, then positive row position, then regime in
    the order of ``regimes``, then d_an and negative row position. ``d_ap``, ``d_an`` and
    ``violation = d_ap - d_an + margin`` are stored as float32, rounded from the float64 values
    the regime was decided on (exact cosines of the stored unit rows); a float64 brute force on the
    same rows, in any summation order, agrees except for a pair within about 1e-15 of a boundary.
    Metadata keys (JSON values): ``tripletkit.margin``, ``.distance``,
    ``.regimes``, ``.select``, ``.index``, ``.index_params``, ``.seed``, ``.rows`` (input rows),
    ``.fingerprint`` (of the input), ``.recall``, ``.version``, ``.options`` (every mining option).

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> X = rng.standard_normal((60, 8)); y = np.repeat(np.arange(6), 10)
    >>> s = mine((np.arange(60), y, X), regimes=("hard",), select="hardest", quiet=True)
    >>> s.to_dict()["index"]
    'exact'
    """
    from .._errors import TripletkitError
    from .._io import atomic_paths
    from .._validate import check_flag
    from ..tables.embeddings import as_table, require_pairs

    t0 = time.perf_counter()
    cfg = resolve_config(config, options)
    if dense is not None:
        dense = check_flag(dense, "dense")
    if compute is not None and compute.scheduler is not None:
        if dense is not None:
            raise TripletkitError("dense applies to mining in one process; leave it unset with a scheduler")
        from ..engines.dask_mining import mine_on_cluster  # its output is a folder, checked there

        return mine_on_cluster(source, out, config=cfg, compute=compute, force=force, quiet=quiet,
                               return_triplets=return_triplets, table_options=table_options, strict=strict,
                               config_file=config_file)
    outputs = _check_outputs(source, out, force, config_file)
    table = as_table(source, **(table_options or {}))
    if strict:
        require_pairs(table, "mining")
    _guard_memory(table, cfg, return_triplets)
    from . import run

    # The triplet table and its duplicate report are published together or not at all.
    with atomic_paths(outputs, force=force) as tmps:
        tmp_out, tmp_dup = tmps or (None, None)
        summary = run.mine_table(table, cfg, tmp_out, tmp_dup, quiet=quiet, return_triplets=return_triplets,
                                 dense=dense)
    summary.seconds = time.perf_counter() - t0
    if outputs:
        summary.out, summary.duplicates_out = (str(p) for p in outputs)
    return summary


def _check_outputs(source, out, force, config_file=None):
    """The triplet table and duplicate report paths of ``out`` ([] for None), refused when they
    exist (without ``force``) or would overwrite an input."""
    from .._io import check_not_input, check_output
    from ..tables.embeddings import source_path
    from ..tables.triplets import duplicates_path

    if out is None:
        return []
    out = Path(out)
    dup_out = duplicates_path(out)
    check_output(out, force=force)
    check_output(dup_out, force=force)
    for path in (out, dup_out):
        check_not_input(path, [source_path(source), config_file])
    return [out, dup_out]


def _guard_memory(table, cfg, return_triplets):
    """Refuse, with a suggestion, a run whose index and blocks would not fit in memory."""
    from .._memory import estimate_and_guard
    from .plan import mining_bytes

    n, d = table.n, table.dim
    need = mining_bytes(n, d, cfg.block_rows, cfg.neighbours, cfg.index, exact_below=cfg.exact_below,
                        hnsw_m=cfg.hnsw_m, ivf_nlist=cfg.ivf_nlist, memory_mb=cfg.memory_mb,
                        positives_per_anchor=cfg.positives_per_anchor,
                        triplets=n * cfg.positives_per_anchor * cfg.negatives_per_positive * len(cfg.regimes)
                        if return_triplets else 0)
    # The table is already loaded: its matrix is no longer part of what must still fit.
    estimate_and_guard(f"mining {n:,} x {d} rows", max(0, need - n * d * 4),
                       suggestion="lower memory_mb=... or block_rows=..., or use index='ivf'")
