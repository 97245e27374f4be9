"""TOML configs -> frozen dataclasses.

Every section is a frozen dataclass whose fields carry their own checks (``choices``, ``low``,
``high``, ``open_low``, ``open_high``) in ``field(metadata=...)``. Unknown sections, unknown
keys, wrong types and out-of-range values are errors naming the file, the section and the key. Command-line
options are generated from the same fields (see ``cli.py``), so a key and its option cannot drift
apart. No code runs from a config: it is parsed with :mod:`tomllib` only.
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path

from ._errors import TripletkitError

__all__ = [
    "MiningConfig", "EvaluationConfig", "SweepConfig", "SweepRun", "HeadConfig", "DataConfig",
    "ComputeConfig", "Config", "load_config", "section_from_dict", "override", "unwrap_optional",
]

REGIME_NAMES = ("easy", "semi-hard", "hard")


def _opt(default, help, **checks):
    """A dataclass field with a help text and checks (choices, low, high, open_low, each)."""
    return field(default=default, metadata={"help": help, **checks})


@dataclass(frozen=True)
class MiningConfig:
    """Options of ``tripletkit mine`` (TOML section ``[mining]``)."""

    margin: float = _opt(0.2, "margin alpha of the triplet loss, in (0, 4) for squared and (0, 2) for euclidean "
                         "distances", low=0.0, open_low=True)
    distance: str = _opt("squared", "distance on unit vectors (squared: ||a-b||^2, euclidean: ||a-b||)",
                         choices=("squared", "euclidean"))
    regimes: tuple[str, ...] = _opt(("semi-hard", "hard"), "regimes to mine, one or more",
                                    each=REGIME_NAMES)
    positives_per_anchor: int = _opt(4, "positives drawn per anchor", low=1)
    negatives_per_positive: int = _opt(1, "negatives per (anchor, positive) pair and regime", low=1)
    select: str = _opt("random", "how a negative is chosen inside its regime",
                       choices=("hardest", "random", "distance-weighted"))
    max_per_identity: int | None = _opt(None, "cap on anchors drawn from one identity (none: no cap)", low=1)
    index: str = _opt("auto", "candidate search (auto: exact below exact_below rows, ivf from there)",
                      choices=("auto", "exact", "ivf", "hnsw"))
    exact_below: int = _opt(200_000, "with index=auto: exact search below this many rows", low=1)
    neighbours: int = _opt(100, "nearest neighbours searched first per anchor (widened when needed)", low=1)
    ivf_nlist: int = _opt(0, "IVF lists (0: about 4*sqrt(rows))", low=0)
    ivf_nprobe: int = _opt(32, "IVF lists visited per query", low=1)
    hnsw_m: int = _opt(32, "HNSW links per node", low=2)
    hnsw_ef_search: int = _opt(128, "HNSW search depth", low=1)
    hnsw_ef_construction: int = _opt(80, "HNSW construction depth", low=1)
    recall_sample: int = _opt(500, "anchors sampled to measure an approximate index's recall", low=1)
    duplicate_cosine: float = _opt(0.98, "cross-label pairs above this cosine are reported as suspect duplicates",
                                   low=-1.0, high=1.0)
    exclude_duplicates: bool = _opt(False, "keep suspect duplicates out of the negatives")
    block_rows: int = _opt(0, "anchors per search block (0: sized from memory_mb)", low=0)
    memory_mb: int = _opt(1024, "memory budget for search blocks, in MB", low=16)
    seed: int = _opt(0, "random seed; the same seed, input and options give the same bytes", low=0)
    weighted_cutoff: float = _opt(0.5, "distance-weighted: weights are capped at their value at this Euclidean "
                                  "distance (the cut-off of Wu et al. 2017)", low=0.0, high=2.0, open_low=True)
    threads: int = _opt(0, "faiss threads for this run (0: faiss's default); hnsw output is reproducible "
                        "only with 1", low=0)


@dataclass(frozen=True)
class EvaluationConfig:
    """Options of ``tripletkit score`` (TOML section ``[evaluation]``)."""

    fmr: tuple[float, ...] = _opt((0.0001, 0.001, 0.01), "false match rates at which FNMR is reported",
                                  low=0.0, high=1.0, open_low=True)
    bootstrap: int = _opt(200, "identity-level bootstrap replicates for intervals (0: none)", low=0)
    confidence: float = _opt(0.95, "confidence level of the intervals", low=0.0, high=1.0, open_low=True,
                             open_high=True)
    recall_k: tuple[int, ...] = _opt((1, 5, 10), "K values of Recall@K", low=1)
    pairs: str | None = _opt(None, "Parquet pair list (left, right[, same]) instead of all pairs")
    clustering: bool = _opt(True, "run k-means clustering metrics")
    plots: bool = _opt(True, "write PNG plots")
    block_rows: int = _opt(0, "rows per scoring block (0: sized from memory_mb)", low=0)
    memory_mb: int = _opt(512, "memory budget for scoring blocks, in MB", low=16)
    threads: int = _opt(0, "threads that score blocks of pairs side by side (0: one per CPU within memory_mb); "
                        "the report does not depend on it", low=0)
    seed: int = _opt(0, "random seed for bootstrap and k-means", low=0)


@dataclass(frozen=True)
class SweepRun:
    """One ``[[sweep.runs]]`` entry of checkpoints mode."""

    margin: float = _opt(None, "margin the checkpoint was trained with", low=0.0, open_low=True)
    heldout: str = _opt(None, "held-out embedding table of that checkpoint")
    train: str | None = _opt(None, "training dump of that checkpoint (for mining statistics)")


@dataclass(frozen=True)
class SweepConfig:
    """The ``[sweep]`` section."""

    margins: tuple[float, ...] | None = _opt(
        None, "margins to compare (required in fit-head mode; in checkpoints mode they come from the runs "
        "and, if given, must list the same values)", low=0.0, open_low=True)
    mode: str = _opt("fit-head", "fit-head (fit a projection per margin on frozen features) or checkpoints (score given runs)",
                     choices=("fit-head", "checkpoints"))
    primary: str = _opt("fnmr@0.001", "metric that ranks the runs (lower is better): eer or fnmr@<fmr>, "
                        "the FMR one of [evaluation] fmr")
    bootstrap: int = _opt(200, "identity resamples for the paired comparison", low=1)
    confidence: float = _opt(0.95, "confidence level of the paired interval", low=0.0, high=1.0, open_low=True,
                             open_high=True)
    seed: int = _opt(0, "seed of the paired resampling", low=0)
    runs: tuple[SweepRun, ...] = _opt((), "checkpoints mode: one [[sweep.runs]] per margin")


@dataclass(frozen=True)
class HeadConfig:
    """The ``[head]`` section: the projection head fitted in fit-head mode."""

    dim: int = _opt(16, "output dimension", low=1)
    hidden: int = _opt(0, "hidden units of one ReLU layer (0: a linear head)", low=0)
    epochs: int = _opt(8, "epochs (the miner runs once per epoch)", low=1)
    learning_rate: float = _opt(0.01, "step size", low=0.0, open_low=True)
    batch_triplets: int = _opt(256, "triplets per gradient step", low=1)
    optimizer: str = _opt("adam", "optimiser (sgd: with momentum)", choices=("adam", "sgd"))
    momentum: float = _opt(0.9, "SGD momentum", low=0.0, high=1.0)
    seed: int = _opt(0, "seed of initialisation and batching", low=0)


@dataclass(frozen=True)
class DataConfig:
    """The ``[data]`` section: feature tables for fit-head mode."""

    train: str | None = _opt(None, "training feature table")
    heldout: str | None = _opt(None, "held-out feature table (identities never in train)")


@dataclass(frozen=True)
class ComputeConfig:
    """The ``[compute]`` section: where blocked plans run."""

    scheduler: str | None = _opt(None, "Dask scheduler address or 'local-cluster' (none: this process)")
    workers: int = _opt(2, "workers of a local cluster", low=1)
    partitions: int = _opt(0, "row partitions of the work (0: twice the workers)", low=0)
    no_workers_timeout: float = _opt(300.0, "seconds a run waits while its cluster has no worker before it stops "
                                     "with nothing written", low=0.0, open_low=True)


@dataclass(frozen=True)
class Config:
    """A whole config file: one attribute per section."""

    mining: MiningConfig = field(default_factory=MiningConfig)
    evaluation: EvaluationConfig = field(default_factory=EvaluationConfig)
    sweep: SweepConfig = field(default_factory=SweepConfig)
    head: HeadConfig = field(default_factory=HeadConfig)
    data: DataConfig = field(default_factory=DataConfig)
    compute: ComputeConfig = field(default_factory=ComputeConfig)
    path: str | None = None


_SECTIONS = {k: v for k, v in typing.get_type_hints(Config).items() if k != "path"}
_PATH_KEYS = {("data", "train"), ("data", "heldout"), ("evaluation", "pairs"), ("run", "heldout"), ("run", "train")}


def _hint(cls):
    return typing.get_type_hints(cls)


def unwrap_optional(tp):
    """``(inner type, whether None is allowed)`` of a field's type hint (``int | None`` -> ``(int, True)``)."""
    if typing.get_origin(tp) in (typing.Union, types.UnionType):
        args = [a for a in typing.get_args(tp) if a is not type(None)]
        return args[0], True
    return tp, False


def _type_name(tp):
    tp, _ = unwrap_optional(tp)
    if typing.get_origin(tp) is tuple:
        inner = typing.get_args(tp)[0]
        return f"a list of {_type_name(inner)}s" if inner in (int, float, str) else "a list of tables"
    return {float: "number", int: "whole number", str: "string", bool: "true/false"}.get(tp, str(tp))


def _coerce_scalar(value, tp, where):
    if tp is bool:
        if isinstance(value, bool):
            return value
    elif tp is int:
        if isinstance(value, int) and not isinstance(value, bool):
            return value
    elif tp is float:
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            try:
                number = float(value)
            except OverflowError:  # an integer beyond float range
                number = math.inf
            if not math.isfinite(number):
                # TOML spells these nan and inf; no option of ours has a meaning for them
                raise TripletkitError(f"{where} must be a finite number, got {value!r}")
            return number
    elif tp is str:
        if isinstance(value, str):
            return value
    else:
        raise TypeError(tp)
    raise TripletkitError(f"{where} must be a {_type_name(tp)}, got {value!r}")


def _check_range(value, meta, where):
    low, high = meta.get("low"), meta.get("high")
    if low is not None and (value <= low if meta.get("open_low") else value < low):
        rel = ">" if meta.get("open_low") else ">="
        raise TripletkitError(f"{where} must be {rel} {low}, got {value!r}")
    if high is not None and (value >= high if meta.get("open_high") else value > high):
        rel = "<" if meta.get("open_high") else "<="
        raise TripletkitError(f"{where} must be {rel} {high}, got {value!r}")
    choices = meta.get("choices") or meta.get("each")
    if choices is not None and value not in choices:
        raise TripletkitError(f"{where} must be one of {', '.join(choices)}; got {value!r}")


def _coerce(value, tp, meta, where, base):
    inner, optional = unwrap_optional(tp)
    if value is None:
        if optional:
            return None
        raise TripletkitError(f"{where} needs a value")
    if typing.get_origin(inner) is tuple:
        elem = typing.get_args(inner)[0]
        if isinstance(value, (str, bytes)) or not isinstance(value, (list, tuple)):
            raise TripletkitError(f"{where} must be {_type_name(inner)}, got {value!r}")
        if dataclasses.is_dataclass(elem):
            return tuple(section_from_dict(elem, v, f"{where}[{i}]", base, "run") for i, v in enumerate(value))
        out = tuple(_coerce(v, elem, meta, f"{where}[{i}]", base) for i, v in enumerate(value))
        if not out:
            raise TripletkitError(f"{where} must not be empty")
        if len(set(out)) != len(out):
            raise TripletkitError(f"{where} has repeated values {list(value)!r}")
        return out
    if dataclasses.is_dataclass(inner):
        return section_from_dict(inner, value, where, base, None)
    out = _coerce_scalar(value, inner, where)
    _check_range(out, meta, where)
    return out


def section_from_dict(cls, values, where, base=None, section=None):
    """Build section ``cls`` from a dict of TOML values; unknown keys and bad values are errors."""
    if not isinstance(values, dict):
        raise TripletkitError(f"{where} must be a table of keys, got {values!r}")
    hints = _hint(cls)
    fields = {f.name: f for f in dataclasses.fields(cls)}
    unknown = [k for k in values if k not in fields]
    if unknown:
        raise TripletkitError(
            f"{where}: unknown key {unknown[0]!r}; known keys: {', '.join(fields)}"
        )
    kwargs = {}
    for key, value in values.items():
        f = fields[key]
        v = _coerce(value, hints[key], f.metadata, f"{where}.{key}", base)
        name = "run" if cls is SweepRun else section
        if base is not None and isinstance(v, str) and (name, key) in _PATH_KEYS:
            v = str((Path(base) / v)) if not Path(v).is_absolute() else v
        kwargs[key] = v
    for name, f in fields.items():
        if name not in kwargs and f.default is None and not unwrap_optional(hints[name])[1]:
            raise TripletkitError(f"{where}: key {name!r} is required")
    out = cls(**kwargs)
    if cls is MiningConfig:
        _reach(out.margin, out.distance, f"{where}.margin")
    return out


def load_config(path):
    """Parse a TOML config file into a :class:`Config`.

    Relative table paths in the file are taken relative to the file's folder.
    """
    p = Path(path)
    if not p.is_file():
        raise TripletkitError(f"config file {str(p)!r} does not exist")
    try:
        raw = tomllib.loads(p.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise TripletkitError(f"config file {str(p)!r} is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise TripletkitError(f"config file {str(p)!r} is not valid TOML: {exc}") from None
    unknown = [k for k in raw if k not in _SECTIONS]
    if unknown:
        raise TripletkitError(
            f"{p}: unknown section [{unknown[0]}]; known sections: {', '.join('[' + s + ']' for s in _SECTIONS)}"
        )
    base = p.parent
    sections = {name: section_from_dict(_SECTIONS[name], raw[name], f"{p} [{name}]", base, name) for name in raw}
    config = Config(**sections, path=str(p))
    # a sweep mines and trains with its margins under the [mining] distance
    distance = config.mining.distance
    for i, margin in enumerate(config.sweep.margins or ()):
        _reach(margin, distance, f"{p} [sweep].margins[{i}]")
    for i, run in enumerate(config.sweep.runs):
        _reach(run.margin, distance, f"{p} [sweep].runs[{i}].margin")
    return config


def override(section, where="option", **values):
    """A copy of ``section`` with ``values`` replaced (``None`` values are ignored), validated.

    The fields not replaced are validated too (a section built in Python, not read from a file,
    has not been checked yet); an error names a replaced key as its option (``--margin``) and
    another as the section's field (``MiningConfig.margin``).
    """
    cls = type(section)
    hints = _hint(cls)
    fields = {f.name: f for f in dataclasses.fields(section)}
    changes = {}
    for key, value in values.items():
        if value is None:
            continue
        if key not in fields:
            raise TripletkitError(f"unknown {where} {key!r}; known: {', '.join(fields)}")
        if isinstance(value, list):
            value = tuple(value)
        if isinstance(value, tuple) and typing.get_origin(unwrap_optional(hints[key])[0]) is tuple:
            value = list(value)
        changes[key] = _coerce(value, hints[key], fields[key].metadata, _option(key), None)
    for key, f in fields.items():
        inner = unwrap_optional(hints[key])[0]
        nested = typing.get_origin(inner) is tuple and dataclasses.is_dataclass(typing.get_args(inner)[0])
        if key in changes or nested or dataclasses.is_dataclass(inner):
            continue
        value = getattr(section, key)
        _coerce(list(value) if isinstance(value, tuple) else value, hints[key], f.metadata,
                f"{cls.__name__}.{key}", None)
    out = dataclasses.replace(section, **changes)
    if cls is MiningConfig:
        _reach(out.margin, out.distance, _option("margin") if "margin" in changes else
                     "margin" if "distance" in changes else f"{cls.__name__}.margin")
    return out


def _option(key):
    return f"--{key.replace('_', '-')}"


def _reach(margin, distance, where):
    """:func:`tripletkit._validate.check_margin`, imported on use (configs are read before numpy loads)."""
    from ._validate import check_margin

    check_margin(margin, distance, where)
