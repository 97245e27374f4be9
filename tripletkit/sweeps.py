"""Margin sweep: one run per margin alpha, scored on held-out identities and compared in pairs.

Two modes, chosen by ``[sweep] mode`` of a TOML config (see ``configs/sweep.toml``):
``fit-head`` fits a :class:`tripletkit.head.ProjectionHead` on the frozen feature vectors of
``[data] train`` for each margin (re-mining every epoch with the ``[mining]`` options), embeds
``[data] heldout`` with it and scores that; ``checkpoints`` scores, as they are, the held-out
embeddings that a model trained with each margin produced (``[[sweep.runs]]``, optionally with its
training dump for mining statistics); every run must embed the same held-out photos. Every run
gets the full evaluation report of :func:`tripletkit.evaluate.score` in
``DIR/runs/margin-<value>/``; the runs are ranked and compared by
:mod:`tripletkit.metrics.paired`, and :func:`tripletkit.report.write_sweep_report` puts them side
by side in ``DIR/sweep.json``, ``DIR/sweep.md`` and the PNG plots.
"""

from __future__ import annotations

import dataclasses
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ._errors import TripletkitError, TripletkitWarning
from ._io import atomic_path, check_not_input, check_output, jsonable, say
from .config import load_config
from .mining.regimes import REGIMES
from .metrics import paired
from .report import CAUTION, write_sweep_report
from .report.format import compact, duration, number, percent
from .tables.embeddings import EmbeddingTable, require_pairs

__all__ = ["sweep"]


# ---------------------------------------------------------------------------------------------
# the plan: everything checked before any work or output
# ---------------------------------------------------------------------------------------------
@dataclass
class _RunPlan:
    margin: float
    heldout: EmbeddingTable | None = None
    train: EmbeddingTable | None = None
    heldout_path: str | None = None
    train_path: str | None = None


@dataclass
class _Plan:
    mode: str
    primary: paired.PrimaryMetric
    runs: list
    train: EmbeddingTable | None = None
    heldout: EmbeddingTable | None = None


def _read(path, where):
    if not Path(path).exists():
        raise TripletkitError(
            f"{where}: table {str(path)!r} does not exist; fix the path (relative paths are taken from the "
            "config file's folder)"
        )
    return EmbeddingTable.read(path)


def _plan(cfg, where):
    sw = cfg.sweep
    primary = paired.parse_primary(sw.primary, cfg.evaluation.fmr, f"{where} [sweep] primary")
    if cfg.evaluation.pairs is not None:
        raise TripletkitError(
            f"{where} [evaluation] pairs: a sweep compares runs on all pairs of the held-out set; remove the pair list"
        )
    if sw.mode == "fit-head":
        if sw.runs:
            raise TripletkitError(f"{where}: [[sweep.runs]] belongs to checkpoints mode; remove it or set "
                                  "[sweep] mode = \"checkpoints\"")
        missing = [k for k in ("train", "heldout") if getattr(cfg.data, k) is None]
        if missing:
            raise TripletkitError(f"{where}: fit-head mode needs [data] {' and '.join(missing)} (feature tables)")
        if sw.margins is None:
            raise TripletkitError(f"{where}: fit-head mode needs [sweep] margins, e.g. margins = [0.05, 0.1, 0.2, 0.4]")
        train = _read(cfg.data.train, f"{where} [data] train")
        heldout = _read(cfg.data.heldout, f"{where} [data] heldout")
        if train.dim != heldout.dim:
            raise TripletkitError(
                f"{where}: [data] train has feature dimension {train.dim} but heldout has {heldout.dim}; "
                "both must come from the same backbone"
            )
        _check_size(heldout, f"{where} [data] heldout")
        runs = [_RunPlan(margin=m) for m in sorted(sw.margins)]
        return _Plan("fit-head", primary, runs, train=train, heldout=heldout)
    # checkpoints
    if not sw.runs:
        raise TripletkitError(
            f"{where}: checkpoints mode needs one [[sweep.runs]] table per margin (keys margin, heldout, optional train)"
        )
    if cfg.data.train is not None or cfg.data.heldout is not None:
        raise TripletkitError(f"{where}: [data] belongs to fit-head mode; in checkpoints mode each "
                              "[[sweep.runs]] names its own tables")
    margins = [r.margin for r in sw.runs]
    if len(set(margins)) != len(margins):
        dup = next(m for m in margins if margins.count(m) > 1)
        raise TripletkitError(f"{where}: two [[sweep.runs]] have margin {dup:g}; give one run per margin")
    if sw.margins is not None and sorted(sw.margins) != sorted(margins):
        raise TripletkitError(
            f"{where}: [sweep] margins {list(sw.margins)} differ from the margins of [[sweep.runs]] {margins}; "
            "remove margins or make them match"
        )
    runs = []
    for i, r in sorted(enumerate(sw.runs), key=lambda t: t[1].margin):
        held = _read(r.heldout, f"{where} [sweep] runs[{i}].heldout")
        train = _read(r.train, f"{where} [sweep] runs[{i}].train") if r.train is not None else None
        runs.append(_RunPlan(margin=r.margin, heldout=held, train=train, heldout_path=r.heldout, train_path=r.train))
    ref = runs[0]
    _check_size(ref.heldout, f"{where} [sweep] runs (margin {ref.margin:g}) heldout")
    for run in runs[1:]:
        run.heldout = _align(ref, run, where)
    return _Plan("checkpoints", primary, runs)


def _check_size(table, where):
    pairs = table.n * (table.n - 1) // 2
    if pairs > paired.MAX_PAIRS:
        raise TripletkitError(
            f"{where}: {table.n} held-out rows make {pairs} pairs; the paired comparison of a sweep holds "
            f"every pair score and allows at most {paired.MAX_PAIRS} (about 6,300 rows); sweep on a subset of the "
            "held-out identities"
        )


def _align(ref, run, where):
    """``run.heldout`` reordered to the rows of ``ref.heldout``; the same ids and labels are required."""
    a, b = ref.heldout, run.heldout
    same_kind = (a.ids.dtype == object) == (b.ids.dtype == object)
    if not same_kind or a.n != b.n or not np.array_equal(np.sort(a.ids), np.sort(b.ids)):
        raise TripletkitError(
            f"{where}: the held-out table of margin {run.margin:g} ({run.heldout_path}) has other rows than that of "
            f"margin {ref.margin:g} ({ref.heldout_path}); every checkpoint must embed the same held-out photos"
        )
    order = b.positions(a.ids)
    aligned = b.subset(order)
    bad = aligned.original_labels() != a.original_labels()
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise TripletkitError(
            f"{where}: id {a.ids[i]!r} has label {a.original_labels()[i]!r} at margin {ref.margin:g} but "
            f"{aligned.original_labels()[i]!r} at margin {run.margin:g}; the held-out labels must agree"
        )
    return aligned


# ---------------------------------------------------------------------------------------------
# one run
# ---------------------------------------------------------------------------------------------
def _mining_stats(table, margin, mining_config):
    """The miner's statistics on ``table`` at ``margin`` (nothing is written)."""
    from .mining import mine

    summary = jsonable(mine(table, None, config=dataclasses.replace(mining_config, margin=margin), quiet=True))
    return {
        "triplets": summary.get("triplets"),
        "anchors": summary.get("anchors"),
        "active_fraction": summary.get("active_fraction"),
        "regimes": {r: (summary.get("regimes") or {}).get(r, 0) for r in REGIMES},
        "pairs_without_negative": summary.get("pairs_without_negative"),
    }


def _headline(report):
    """The numbers of a run's report that the sweep puts side by side."""
    verification = report.get("verification") or {}
    retrieval = report.get("retrieval") or {}
    clustering = report.get("clustering") or {}
    fnmr = {}
    for key, entry in (verification.get("fnmr_at_fmr") or {}).items():
        entry = entry or {}
        fnmr[key] = {"fnmr": entry.get("fnmr"), "ci": entry.get("ci"), "threshold": entry.get("threshold")}
    return jsonable({
        "eer": verification.get("eer"), "auc": verification.get("auc"), "fnmr_at_fmr": fnmr,
        "recall_at_1": (retrieval.get("recall_at_k") or {}).get("1"), "map_at_r": retrieval.get("map_at_r"),
        "purity": clustering.get("purity"), "nmi": clustering.get("nmi"),
    })


def _run_folder(margin):
    return f"margin-{float(margin)!r}"


def _fit_run(plan, run, cfg, i, total, quiet):
    """Fit the head of one margin; embed the held-out and training rows with it; mine on the latter."""
    from .head import HeadDiverged, describe_epoch, fit_head

    def progress(record):
        say("sweep", f"run {i}/{total} " + describe_epoch(run.margin, record, cfg.head.epochs), quiet)

    t0 = time.perf_counter()
    head, history = fit_head(plan.train, run.margin, cfg.head, cfg.mining, quiet=True, progress=progress)
    fit_seconds = time.perf_counter() - t0
    try:
        held = plan.heldout.with_embeddings(head.transform(plan.heldout.embeddings))
        train_out = plan.train.with_embeddings(head.transform(plan.train.embeddings))
    except HeadDiverged as exc:
        raise TripletkitError(
            f"the projection head fitted at margin {run.margin:g} diverged on the held-out or training rows: "
            f"{exc.what}; lower [head] learning_rate (now {cfg.head.learning_rate:g})"
        ) from None
    t1 = time.perf_counter()
    mining = _mining_stats(train_out, run.margin, cfg.mining)
    return head, history, held, mining, fit_seconds, time.perf_counter() - t1


def _evaluate(table, folder, cfg):
    from .evaluate import score

    return score(table, out=folder, config=cfg.evaluation, force=False, quiet=True)


def _run(plan, run, cfg, i, total, runs_folder, quiet):
    """One margin: its report in ``runs_folder``, its row of ``sweep.json`` and its pair scores."""
    t0 = time.perf_counter()
    folder = _run_folder(run.margin)
    row = {"margin": run.margin, "report": f"runs/{folder}/report.md"}
    if plan.mode == "fit-head":
        shape = "linear" if cfg.head.hidden == 0 else f"{cfg.head.hidden} hidden units"
        say("sweep", f"run {i}/{total}: margin {compact(run.margin)}: fitting a {cfg.head.dim}-d head "
                     f"({shape}, {cfg.head.epochs} epochs)", quiet)
        head, history, held, mining, fit_s, mine_s = _fit_run(plan, run, cfg, i, total, quiet)
        report = _evaluate(held, runs_folder / folder, cfg)
        head.save(runs_folder / folder / "head.npz")
        row["head"] = f"runs/{folder}/head.npz"
        row["loss_curve"] = [h["loss"] for h in history]
        row["epochs"] = history
    else:
        say("sweep", f"run {i}/{total}: margin {compact(run.margin)}: scoring {run.heldout_path}", quiet)
        held = run.heldout
        t1 = time.perf_counter()
        mining = _mining_stats(run.train, run.margin, cfg.mining) if run.train is not None else None
        mine_s = time.perf_counter() - t1
        fit_s = None
        report = _evaluate(held, runs_folder / folder, cfg)
        row["heldout"] = run.heldout_path
        row["train"] = run.train_path
    row["metrics"] = _headline(report)
    row["mining"] = mining
    scores = paired.PairScores(held.embeddings, held.labels)
    row["seconds"] = {"fit": fit_s, "mining_stats": mine_s, "total": time.perf_counter() - t0}
    return row, report, held, scores


# ---------------------------------------------------------------------------------------------
# the public entry
# ---------------------------------------------------------------------------------------------
def _check_inputs(plan, where):
    """Refuse tables without genuine and impostor pairs; note identities shared by train and held-out."""
    # a comparison needs genuine and impostor pairs; without them every run would only hold nulls
    hint = f"is the label column of the table named in {where} the identity column?"
    if plan.mode == "fit-head":
        require_pairs(plan.heldout, "a sweep on the held-out set", hint=hint)
        require_pairs(plan.train, "fitting a head on the training set", hint=hint)
    else:
        require_pairs(plan.runs[0].heldout, "a sweep on the held-out set", hint=hint)
        for run in plan.runs:
            if run.train is not None:
                require_pairs(run.train, f"mining statistics (margin {run.margin:g})", hint=hint)
    notes = []
    if plan.mode == "fit-head":
        shared = np.intersect1d(plan.train.label_values.astype(str), plan.heldout.label_values.astype(str))
        if shared.size:
            note = (f"{shared.size} held-out identities also occur in [data] train (first: {str(shared[0])!r}); "
                    "held-out error rates are optimistic for them")
            warnings.warn(note, TripletkitWarning, stacklevel=3)
            notes.append(note)
    return notes


def sweep(config_path, out, *, force=False, quiet=False):
    """Run a margin sweep from a TOML config and write its comparison to the folder ``out``.

    Parameters
    ----------
    config_path : str or Path
        TOML config with a ``[sweep]`` section; ``[head]``, ``[data]``, ``[mining]`` and
        ``[evaluation]`` as the mode needs (see ``configs/sweep.toml``).
    out : str or Path
        Folder to create (atomically: an interrupted sweep leaves nothing behind).
    force : bool, default False
        Replace an existing ``out``.
    quiet : bool, default False
        No progress on stderr (one line per run and per epoch otherwise).

    Returns
    -------
    dict
        The content of ``out/sweep.json`` (``mode``, ``primary``, ``runs``: one row per margin with
        the headline metrics, the mining statistics and, in fit-head mode, the loss curve;
        ``comparison``: best, runner-up, paired difference, interval, verdict, see
        :func:`tripletkit.metrics.paired.compare_runs`; ``plots``; ``seconds``, the wall time of
        the runs and the comparison, writing the sweep's own files excluded) plus ``out``, the
        folder written.

    Raises
    ------
    TripletkitError
        For a bad config (unknown key, margin <= 0, missing table, a mode without its keys, a
        primary metric that cannot be parsed or whose FMR is not evaluated), before anything is
        written.
    """
    t_start = time.perf_counter()
    cfg = load_config(config_path)
    where = str(config_path)
    plan = _plan(cfg, where)
    out = Path(out)
    inputs = [config_path, cfg.data.train, cfg.data.heldout]
    inputs += [p for run in plan.runs for p in (run.heldout_path, run.train_path)]
    check_not_input(out, inputs)
    check_output(out, force=force, directory=True)
    notes = _check_inputs(plan, where)
    total = len(plan.runs)
    say("sweep", f"{plan.mode} sweep of {total} margins ({', '.join(compact(r.margin) for r in plan.runs)}), "
                 f"ranked by {plan.primary.text}", quiet)
    rows, pair_scores, reports = [], [], []
    with atomic_path(out, force=force, directory=True) as tmp:
        (tmp / "runs").mkdir()
        for i, run in enumerate(plan.runs, 1):
            row, report, held, scores = _run(plan, run, cfg, i, total, tmp / "runs", quiet)
            rows.append(row)
            reports.append(report)
            pair_scores.append(scores)
            met = row["metrics"]
            say("sweep", f"run {i}/{total}: margin {compact(run.margin)}: EER {percent(met['eer'])}, "
                         f"AUC {number(met['auc'])}, Recall@1 {percent(met['recall_at_1'])} "
                         f"({duration(row['seconds']['total'])})", quiet)
        margins = [r["margin"] for r in rows]
        say("sweep", f"paired comparison: {cfg.sweep.bootstrap} identity resamples", quiet)
        per_run, comparison = paired.compare_runs(pair_scores, margins, held.n_identities, plan.primary,
                                                  cfg.sweep.bootstrap, cfg.sweep.confidence, cfg.sweep.seed)
        for row, value in zip(rows, per_run):
            row["primary"] = {"metric": plan.primary.text, "value": value["value"], "ci": value["ci"]}
        result = jsonable({
            "mode": plan.mode,
            "config": str(Path(config_path)),
            "primary": plan.primary.text,
            "margins": margins,
            "heldout": {"rows": int(held.n), "identities": int(held.n_identities),
                        "genuine_pairs": pair_scores[0].genuine_pairs,
                        "impostor_pairs": pair_scores[0].impostor_pairs},
            "runs": rows,
            "comparison": comparison,
            "plots": [],
            "notes": notes,
            "caution": CAUTION,
            "seconds": time.perf_counter() - t_start,
        })
        result = write_sweep_report(result, tmp, reports=reports, mined_regimes=cfg.mining.regimes)
    say("sweep", comparison["verdict"], quiet)
    say("sweep", f"wrote {out}/sweep.md ({duration(result['seconds'])})", quiet)
    return {**result, "out": str(out)}
