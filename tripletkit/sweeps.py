"""Margin sweep: one run per margin alpha, scored on held-out identities, with a paired comparison.

Two modes, chosen by ``[sweep] mode`` of a TOML config (see ``configs/sweep.toml``):

- ``fit-head``: for each margin, fit a :class:`tripletkit.head.ProjectionHead` on the frozen
  feature vectors of ``[data] train`` (re-mining every epoch with the ``[mining]`` options), embed
  ``[data] heldout`` with it and score that;
- ``checkpoints``: each ``[[sweep.runs]]`` names the held-out embeddings that a model trained with
  that margin produced (and optionally its training dump, for mining statistics); they are scored
  as they are. Every run must embed the same held-out photos (the same ids and labels).

Every run gets the full evaluation report of :func:`tripletkit.evaluate.score` in
``DIR/runs/margin-<value>/``; ``DIR/sweep.json``, ``DIR/sweep.md`` and the PNG plots put them
side by side.

The comparison
--------------
Runs are ranked by ``primary`` (``"eer"`` or ``"fnmr@<fmr>"``; lower is better; a tie goes to the
smaller margin). The difference between the runner-up and the best run gets an interval from a
paired, identity-level bootstrap [1]_ [2]_: each replicate draws the held-out identities with
replacement (multiplicities m_i) and applies that same draw to every run, so the noise that the
runs share (which identities happen to be in the evaluation set) cancels from the difference. The
verdict says the difference is larger than the noise when the interval excludes 0.

How a replicate is scored (exact): every pair score of the held-out set is computed once per run
(the exact cosines of :mod:`tripletkit._exact`, as in the verification module) and counted at
each distinct value.
In a replicate a genuine pair of identity i carries weight m_i (the pairs inside each drawn copy)
and an impostor pair of identities i, j carries weight m_i * m_j (the pairs between the copies);
pairs between two copies of one identity are not formed, since they would pair a photo with
itself. The weights are whole numbers, so the weighted counts are exact integer counts, and they
go through the verification module's own functions (:func:`~tripletkit.metrics.verification.
equal_error_rate`, :func:`~tripletkit.metrics.verification.fnmr_at_fmr`): the replicate's EER and
FNMR at FMR x have the definitions of the evaluation reports, FNMR at FMR x is not resolvable
(None) when the weighted impostor count is below 3 / x (the rule of 3), and with every m_i = 1 the
value is the report's all-pairs value. (The verification module's own intervals expand the
impostor weights to first order; here they are exact, since the comparison must give exactly 0
for identical runs.)

To keep replicates cheap, only the top tail of the impostor scores is held per replicate: the
pairs at or above the threshold where the full-sample FMR is 2 x EER (primary "eer") or 8 x the
FMR target; the impostors below it enter only through their total weight, which has the closed
form ((sum_i m_i n_i)^2 - sum_i (m_i n_i)^2) / 2 (n_i rows of identity i), lumped at one score
below the cut. Error rates above the cut are then exact; a replicate whose operating point falls
below the cut is recomputed from every pair (counted in ``replicates_on_full_pair_list``). The
pair scores are materialised (about 20 bytes per pair and run, all runs at once), so a sweep is
meant for held-out sets of up to about 6,300 rows (:data:`MAX_PAIRS`); larger sets are refused
with a message that says to sweep on a subset of the held-out identities.

References
----------
.. [1] B. Efron, R. Tibshirani, "An Introduction to the Bootstrap", Chapman & Hall, 1993 (the
   percentile interval; paired resampling of a difference).
.. [2] R. M. Bolle, N. K. Ratha, S. Pankanti, "Error analysis of pattern recognition systems: the
   subsets bootstrap", Computer Vision and Image Understanding 93(1), 2004 (resampling subjects
   rather than pairs, since pairs that share a subject are dependent).
"""

from __future__ import annotations

import dataclasses
import json
import math
import re
import sys
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ._errors import TripletkitError, TripletkitWarning
from ._exact import snap
from ._io import atomic_path, check_not_input, check_output, jsonable
from .config import load_config
from .losses import REGIMES
from .report import CAUTION
from .tables.embeddings import EmbeddingTable, require_pairs

__all__ = ["sweep", "paired_comparison", "parse_primary"]

#: Pair scores held per run by the paired comparison (about 24 bytes each: 480 MB per run at this
#: cap, reached at about 6,300 held-out rows).
MAX_PAIRS = 20_000_000


# ---------------------------------------------------------------------------------------------
# the primary metric
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Primary:
    kind: str  # "eer" or "fnmr"
    fmr: float | None
    text: str

    @property
    def label(self):
        return "EER" if self.kind == "eer" else f"FNMR at FMR = {self.fmr:g}"


def parse_primary(text, fmrs=None, where="primary"):
    """Parse a ranking metric: ``"eer"`` or ``"fnmr@<fmr>"`` (e.g. ``"fnmr@0.001"``).

    Parameters
    ----------
    text : str
    fmrs : sequence of float, optional
        The FMR targets of the evaluation; ``fnmr@x`` must name one of them.
    where : str
        Where the value came from, for messages.

    Returns
    -------
    _Primary
        ``kind`` ("eer" or "fnmr"), ``fmr`` (float or None), ``text``.
    """
    if not isinstance(text, str):
        raise TripletkitError(f"{where} must be a string such as 'eer' or 'fnmr@0.001', got {text!r}")
    t = text.strip().lower()
    if t == "eer":
        return _Primary("eer", None, "eer")
    m = re.fullmatch(r"fnmr@([0-9.eE+-]+)", t)
    x = None
    if m:
        try:
            x = float(m.group(1))
        except ValueError:
            x = None
    if x is None or not (0 < x <= 1) or not math.isfinite(x):
        raise TripletkitError(
            f"{where} is {text!r}; expected 'eer' or 'fnmr@<fmr>' with 0 < fmr <= 1, e.g. 'fnmr@0.001'"
        )
    if fmrs is not None and not any(x == f for f in fmrs):
        raise TripletkitError(
            f"{where} {text!r} asks for FNMR at FMR {x:g}, which is not among [evaluation] fmr "
            f"({', '.join(f'{f:g}' for f in fmrs)}); add it there or pick one of those"
        )
    return _Primary("fnmr", x, f"fnmr@{x:g}")


# ---------------------------------------------------------------------------------------------
# exact pair scores with identity weights (the paired bootstrap)
# ---------------------------------------------------------------------------------------------
class _PairScores:
    """Every pair score of one run's held-out set, grouped by distinct value, with the pair's identities.

    Scores are the exact cosines of :mod:`tripletkit._exact` (as in the verification module).
    Memory: about 16 bytes per impostor pair, 12 per genuine pair and 8 per distinct score, plus
    the replicate tail.
    """

    def __init__(self, embeddings, labels):
        E = snap(np.asarray(embeddings, dtype=np.float32))
        labels = np.asarray(labels, dtype=np.int64)
        n = E.shape[0]
        pairs = n * (n - 1) // 2
        if pairs > MAX_PAIRS:
            raise TripletkitError(
                f"the held-out set has {n} rows ({pairs} pairs); the paired comparison of a sweep holds every "
                f"pair score and allows at most {MAX_PAIRS}; sweep on a subset of the held-out identities"
            )
        scores = np.empty(pairs, dtype=np.float64)
        la = np.empty(pairs, dtype=np.int32)
        lb = np.empty(pairs, dtype=np.int32)
        cols = np.arange(n)
        at = 0
        step = max(1, (1 << 21) // max(n, 1))  # rows per block: about 16 MB of float64 scores
        for s in range(0, n, step):
            rows = cols[s:s + step]
            block = E[rows] @ E.T
            mask = cols[None, :] > rows[:, None]
            c = int(mask.sum())
            scores[at:at + c] = block[mask]
            la[at:at + c] = np.broadcast_to(labels[rows][:, None], mask.shape)[mask]
            lb[at:at + c] = np.broadcast_to(labels[None, :], mask.shape)[mask]
            at += c
        self.thresholds, group = np.unique(scores, return_inverse=True)
        self.thresholds = self.thresholds.astype(np.float64)
        group = group.reshape(-1).astype(np.int32)
        gen = la == lb
        self.gen_group, self.gen_identity = group[gen], la[gen]
        imp = ~gen
        self.imp_group, self.imp_a, self.imp_b = group[imp], la[imp], lb[imp]
        self.rows_per_identity = np.bincount(labels).astype(np.float64)
        self._tail = None

    @property
    def genuine_pairs(self):
        return int(self.gen_group.size)

    @property
    def impostor_pairs(self):
        return int(self.imp_group.size)

    def counts(self, m=None):
        """:class:`ScoreCounts` of the pairs, each weighted by its identities' multiplicities ``m``.

        A genuine pair of identity i weighs m_i, an impostor pair of identities i, j weighs
        m_i * m_j (None: every pair weighs 1). Weights are whole numbers, so the weighted counts
        are exact integers.
        """
        from .metrics.verification import ScoreCounts

        size = self.thresholds.size
        if m is None:
            gen = np.bincount(self.gen_group, minlength=size)
            imp = np.bincount(self.imp_group, minlength=size)
        else:
            # float64 sums of whole numbers are exact below 2**53
            gen = np.bincount(self.gen_group, weights=m[self.gen_identity], minlength=size)
            imp = np.bincount(self.imp_group, weights=m[self.imp_a] * m[self.imp_b], minlength=size)
        return ScoreCounts(self.thresholds, gen.astype(np.int64), imp.astype(np.int64))

    # -- the exact shortcut for replicates ---------------------------------------------------
    def prepare_tail(self, fmr_cut):
        """Keep, for replicates, the impostor pairs scoring at or above the full-sample FMR ``fmr_cut``.

        Impostor pairs below that threshold only enter a replicate through their total weight,
        which has a closed form: every cross-identity row pair is an impostor pair, so the total is
        ((sum_i m_i n_i)^2 - sum_i (m_i n_i)^2) / 2 with n_i rows of identity i. They are lumped at
        the largest score below the cut. Error rates at thresholds at or above the cut are then
        exact, and :meth:`tail_counts` says whether a replicate's operating point lies there.
        """
        full = self.counts()
        imp_ge = np.cumsum(full.impostor[::-1])[::-1]  # impostor pairs scoring >= thresholds[j]
        need = fmr_cut * self.impostor_pairs
        cut = int(np.flatnonzero(imp_ge >= need)[-1]) if fmr_cut < 1 and (imp_ge >= need).any() else 0
        if cut == 0:
            self._tail = None  # the cut keeps (nearly) everything: use the full pair list
            return
        keep_imp = self.imp_group >= cut
        # Thresholds: every genuine score, every kept impostor score, and the lump's score.
        used = np.union1d(np.union1d(self.gen_group, self.imp_group[keep_imp]), [cut - 1])
        remap = np.full(self.thresholds.size, -1, dtype=np.int32)
        remap[used] = np.arange(used.size, dtype=np.int32)
        self._tail = {
            "thresholds": self.thresholds[used],
            "gen_group": remap[self.gen_group],
            "imp_group": remap[self.imp_group[keep_imp]],
            "imp_a": self.imp_a[keep_imp], "imp_b": self.imp_b[keep_imp],
            "lump": int(remap[cut - 1]), "cut": int(remap[cut]),
        }

    def tail_counts(self, m):
        """Weighted counts from the kept tail plus the lump; None when no tail was prepared."""
        from .metrics.verification import ScoreCounts

        t = self._tail
        if t is None:
            return None
        size = t["thresholds"].size
        gen = np.bincount(t["gen_group"], weights=m[self.gen_identity], minlength=size)
        imp = np.bincount(t["imp_group"], weights=m[t["imp_a"]] * m[t["imp_b"]], minlength=size)
        mn = m * self.rows_per_identity
        total = (mn.sum() ** 2 - np.dot(mn, mn)) / 2.0
        imp[t["lump"]] += total - imp.sum()
        return ScoreCounts(t["thresholds"], gen.astype(np.int64), np.rint(imp).astype(np.int64))

    def tail_is_exact_for(self, counts, primary):
        """Whether ``primary`` on ``counts`` (from :meth:`tail_counts`) is decided above the cut."""
        t = self._tail
        n_gen, n_imp = int(counts.genuine.sum()), int(counts.impostor.sum())
        imp_ge_cut = int(counts.impostor[t["cut"]:].sum())
        if primary.kind == "eer":
            # D = FMR - FNMR is non-increasing in the threshold; D >= 0 at the cut puts the last
            # threshold with D >= 0, and the one after it, at or above the cut.
            gen_lt_cut = int(counts.genuine[:t["cut"]].sum())
            return imp_ge_cut * n_gen >= gen_lt_cut * n_imp
        # FMR at the cut above the target: the lowest threshold with FMR <= target lies above the cut.
        return imp_ge_cut / n_imp > primary.fmr


def _metric(ps, m, primary, stats=None):
    """The primary metric of one run for identity multiplicities ``m`` (None: the full sample).

    Returns None where it is undefined: no genuine or no impostor pair, or an FMR target with
    fewer than 3 / FMR impostor pairs (the rule of 3, as in the verification module).
    """
    from .metrics.verification import equal_error_rate, fnmr_at_fmr

    counts = None
    if m is not None:
        counts = ps.tail_counts(m)
        if counts is not None and int(counts.genuine.sum()) and int(counts.impostor.sum()):
            if not ps.tail_is_exact_for(counts, primary):
                counts = None
                if stats is not None:
                    stats["full_list"] += 1
    if counts is None:
        counts = ps.counts(m)
    n_gen, n_imp = int(counts.genuine.sum()), int(counts.impostor.sum())
    if n_gen == 0 or n_imp == 0:
        return None
    if primary.kind == "eer":
        return equal_error_rate(counts)[0]
    if n_imp < 3.0 / primary.fmr:
        return None
    return fnmr_at_fmr(counts, primary.fmr)[0]


#: Replicates keep the impostor tail down to this multiple of the full-sample operating FMR (the
#: EER, or the FMR target); a replicate whose operating point falls below it uses every pair.
_TAIL_FACTOR = {"eer": 2.0, "fnmr": 8.0}


def _interval(values, confidence):
    v = np.asarray([x for x in values if x is not None], dtype=np.float64)
    if v.size == 0:
        return None
    lo, hi = np.quantile(v, [(1 - confidence) / 2, (1 + confidence) / 2])
    return [float(lo), float(hi)]


def _compare(pair_scores, margins, n_identities, primary, bootstrap, confidence, seed):
    """Full-sample values, per-run intervals and the paired comparison of the best two runs."""
    full = [_metric(ps, None, primary) for ps in pair_scores]
    for ps, value in zip(pair_scores, full):
        if value is not None:
            # The operating FMR: the EER itself, or the FMR target.
            op = value if primary.kind == "eer" else primary.fmr
            ps.prepare_tail(min(1.0, _TAIL_FACTOR[primary.kind] * max(op, 1e-12)))
    rng = np.random.default_rng(seed)
    boot = np.full((len(pair_scores), bootstrap), np.nan)
    stats = {"full_list": 0}
    for b in range(bootstrap):
        m = np.bincount(rng.integers(0, n_identities, size=n_identities), minlength=n_identities).astype(np.float64)
        for r, ps in enumerate(pair_scores):
            if full[r] is not None:
                value = _metric(ps, m, primary, stats)
                boot[r, b] = np.nan if value is None else value
    per_run = [{"value": full[r], "ci": _interval(boot[r][np.isfinite(boot[r])].tolist(), confidence)}
               for r in range(len(pair_scores))]
    ranked = sorted((i for i in range(len(margins)) if full[i] is not None), key=lambda i: (full[i], margins[i]))
    comparison = {
        "primary": primary.text, "lower_is_better": True, "bootstrap": bootstrap, "confidence": confidence,
        "seed": seed, "resampled": "held-out identities, the same draw for both runs",
        "best": None, "runner_up": None, "difference": None, "ci": None, "replicates_used": 0,
        "larger_than_noise": None, "replicates_on_full_pair_list": stats["full_list"],
    }
    if not ranked:
        comparison["verdict"] = f"no comparison: {primary.label} is not defined for any run (see each run's report)"
        return per_run, comparison
    best = ranked[0]
    comparison["best"] = {"margin": margins[best], "value": full[best], "ci": per_run[best]["ci"]}
    if len(ranked) < 2:
        comparison["verdict"] = (f"no comparison: only margin {margins[best]:g} has a defined {primary.label}"
                                 if len(margins) > 1 else "no comparison: the sweep has a single run")
        return per_run, comparison
    second = ranked[1]
    comparison["runner_up"] = {"margin": margins[second], "value": full[second], "ci": per_run[second]["ci"]}
    diff = full[second] - full[best]
    d = boot[second] - boot[best]
    d = d[np.isfinite(d)]
    ci = _interval(d.tolist(), confidence)
    comparison.update(difference=float(diff), ci=ci, replicates_used=int(d.size))
    level = f"{confidence:.0%}"
    if ci is None:
        comparison["verdict"] = (f"margin {margins[best]:g} has the lower {primary.label}, but no bootstrap replicate "
                                 "defines it for both runs, so the noise is unknown")
        return per_run, comparison
    larger = bool(ci[0] > 0)
    comparison["larger_than_noise"] = larger
    span = f"{level} interval [{ci[0]:.4g}, {ci[1]:.4g}]"
    if ci[1] < 0:
        # Possible only for a skewed resampling distribution: the full sample and the resamples disagree.
        comparison["verdict"] = (
            f"margin {margins[best]:g} has the lower {primary.label} on the full held-out set, but the resamples "
            f"favour margin {margins[second]:g} ({span}); the ranking is not stable, so the difference is not "
            "larger than the noise")
    elif larger:
        comparison["verdict"] = (
            f"margin {margins[best]:g} beats margin {margins[second]:g} on {primary.label} by {diff:.4g}: the "
            f"difference is larger than the noise ({span} excludes 0)")
    else:
        comparison["verdict"] = (
            f"margin {margins[best]:g} has the lower {primary.label} (by {diff:.4g} over margin {margins[second]:g}), "
            f"but the difference is not larger than the noise ({span} includes 0)")
    return per_run, comparison


def paired_comparison(runs, labels, primary="eer", *, bootstrap=200, confidence=0.95, seed=0):
    """Rank runs by a verification metric and compare the best two with a paired identity bootstrap.

    Parameters
    ----------
    runs : dict of float -> array-like of shape (n, d)
        Held-out embeddings per margin; every run embeds the same n rows (same order, same labels).
        Rows are L2-normalised; scores are cosine similarities.
    labels : array-like of shape (n,)
        Identity of each row.
    primary : str, default "eer"
        ``"eer"`` or ``"fnmr@<fmr>"``; lower is better.
    bootstrap : int, default 200
        Identity resamples; the same resample is applied to every run.
    confidence : float, default 0.95
    seed : int, default 0

    Returns
    -------
    dict
        ``runs``: per margin ``value`` (the primary metric) and ``ci``, its percentile interval;
        ``comparison``: ``best``, ``runner_up``, ``difference`` (runner-up minus best), ``ci``,
        ``larger_than_noise`` and a plain ``verdict``. See the module docstring for the method.
    """
    from ._validate import as_codes, as_embeddings

    p = parse_primary(primary)
    if not isinstance(runs, dict) or not runs:
        raise TripletkitError("runs must be a non-empty dict of margin -> held-out embeddings")
    margins = sorted(float(m) for m in runs)
    mats = [as_embeddings(runs[m], f"run {m:g}", normalise=True) for m in sorted(runs)]
    codes, values = as_codes(labels, n=mats[0].shape[0])
    for m, E in zip(margins, mats):
        if E.shape[0] != codes.shape[0]:
            raise TripletkitError(f"run {m:g} has {E.shape[0]} rows but labels has {codes.shape[0]}; "
                                  "every run must embed the same held-out rows")
    if isinstance(bootstrap, bool) or not isinstance(bootstrap, int) or bootstrap < 1:
        raise TripletkitError(f"bootstrap must be a whole number >= 1, got {bootstrap!r}")
    if not 0 < confidence < 1:
        raise TripletkitError(f"confidence must be between 0 and 1, got {confidence!r}")
    scores = [_PairScores(E, codes) for E in mats]
    per_run, comparison = _compare(scores, margins, int(values.shape[0]), p, bootstrap, confidence, seed)
    return {"runs": {m: r for m, r in zip(margins, per_run)}, "comparison": comparison}


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
    primary: _Primary
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
    primary = parse_primary(sw.primary, cfg.evaluation.fmr, f"{where} [sweep] primary")
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
    if pairs > MAX_PAIRS:
        raise TripletkitError(
            f"{where}: {table.n} held-out rows make {pairs} pairs; the paired comparison of a sweep holds "
            f"every pair score and allows at most {MAX_PAIRS} (about 6,300 rows); sweep on a subset of the "
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
def _say(quiet, text):
    if not quiet:
        print(f"[sweep] {text}", file=sys.stderr, flush=True)


def _mining_stats(table, margin, mining_config):
    from .mining import mine

    summary = mine(table, None, config=dataclasses.replace(mining_config, margin=margin), quiet=True)
    d = jsonable(summary)
    return {
        "triplets": d.get("triplets"),
        "anchors": d.get("anchors"),
        "active_fraction": d.get("active_fraction"),
        "regimes": {r: (d.get("regimes") or {}).get(r, 0) for r in REGIMES},
        "pairs_without_negative": d.get("pairs_without_negative"),
    }


def _headline(report):
    v = report.get("verification") or {}
    r = report.get("retrieval") or {}
    c = report.get("clustering") or {}
    fnmr = {}
    for key, entry in (v.get("fnmr_at_fmr") or {}).items():
        entry = entry or {}
        fnmr[key] = {"fnmr": entry.get("fnmr"), "ci": entry.get("ci"), "threshold": entry.get("threshold")}
    return jsonable({
        "eer": v.get("eer"), "auc": v.get("auc"), "fnmr_at_fmr": fnmr,
        "recall_at_1": (r.get("recall_at_k") or {}).get("1"), "map_at_r": r.get("map_at_r"),
        "purity": c.get("purity"), "nmi": c.get("nmi"),
    })


def _run_folder(margin):
    return f"margin-{float(margin)!r}"


def _fit_run(plan, run, cfg, i, total, quiet):
    from .head import HeadDiverged, _epoch_line, fit_head

    def progress(rec):
        _say(quiet, f"run {i}/{total} " + _epoch_line(run.margin, rec, cfg.head.epochs).replace("[head] ", ""))

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


# ---------------------------------------------------------------------------------------------
# the public entry
# ---------------------------------------------------------------------------------------------
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
        ``comparison``: best, runner-up, paired difference, interval, verdict; ``plots``) plus
        ``out``, the folder written.

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
            warnings.warn(note, TripletkitWarning, stacklevel=2)
            notes.append(note)
    total = len(plan.runs)
    _say(quiet, f"{plan.mode} sweep of {total} margins ({', '.join(f'{r.margin:g}' for r in plan.runs)}), "
                f"ranked by {plan.primary.text}")
    rows, pair_scores, reports = [], [], []
    with atomic_path(out, force=force, directory=True) as tmp:
        (tmp / "runs").mkdir()
        for i, run in enumerate(plan.runs, 1):
            t0 = time.perf_counter()
            folder = _run_folder(run.margin)
            row = {"margin": run.margin, "report": f"runs/{folder}/report.md"}
            if plan.mode == "fit-head":
                _say(quiet, f"run {i}/{total}: margin {run.margin:g}: fitting a {cfg.head.dim}-d head "
                            f"({'linear' if cfg.head.hidden == 0 else f'{cfg.head.hidden} hidden units'}, "
                            f"{cfg.head.epochs} epochs)")
                head, history, held, mining, fit_s, mine_s = _fit_run(plan, run, cfg, i, total, quiet)
                report = _evaluate(held, tmp / "runs" / folder, cfg)
                head.save(tmp / "runs" / folder / "head.npz")
                row["head"] = f"runs/{folder}/head.npz"
                row["loss_curve"] = [h["loss"] for h in history]
                row["epochs"] = history
            else:
                _say(quiet, f"run {i}/{total}: margin {run.margin:g}: scoring {run.heldout_path}")
                held = run.heldout
                t1 = time.perf_counter()
                mining = _mining_stats(run.train, run.margin, cfg.mining) if run.train is not None else None
                mine_s = time.perf_counter() - t1
                fit_s = None
                report = _evaluate(held, tmp / "runs" / folder, cfg)
                row["heldout"] = run.heldout_path
                row["train"] = run.train_path
            reports.append(report)
            row["metrics"] = _headline(report)
            row["mining"] = mining
            pair_scores.append(_PairScores(held.embeddings, held.labels))
            n_identities = held.n_identities
            row["seconds"] = {"fit": fit_s, "mining_stats": mine_s, "total": time.perf_counter() - t0}
            rows.append(row)
            met = row["metrics"]
            _say(quiet, f"run {i}/{total}: margin {run.margin:g}: EER {_num(met['eer'])}, "
                        f"AUC {_num(met['auc'])}, Recall@1 {_num(met['recall_at_1'])} "
                        f"({row['seconds']['total']:.1f} s)")
        margins = [r["margin"] for r in rows]
        _say(quiet, f"paired comparison: {cfg.sweep.bootstrap} identity resamples")
        per_run, comparison = _compare(pair_scores, margins, n_identities, plan.primary, cfg.sweep.bootstrap,
                                       cfg.sweep.confidence, cfg.sweep.seed)
        for row, pr in zip(rows, per_run):
            row["primary"] = {"metric": plan.primary.text, "value": pr["value"], "ci": pr["ci"]}
        plots = _plots(tmp, plan, rows, reports, comparison)
        result = jsonable({
            "mode": plan.mode,
            "config": str(Path(config_path)),
            "primary": plan.primary.text,
            "margins": margins,
            "heldout": {"rows": int(held.n), "identities": int(n_identities),
                        "genuine_pairs": pair_scores[0].genuine_pairs,
                        "impostor_pairs": pair_scores[0].impostor_pairs},
            "runs": rows,
            "comparison": comparison,
            "plots": plots,
            "notes": notes,
            "caution": CAUTION,
            "seconds": time.perf_counter() - t_start,
        })
        (tmp / "sweep.json").write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
        (tmp / "sweep.md").write_text(_markdown(result, plan, cfg), encoding="utf-8")
    _say(quiet, comparison["verdict"])
    _say(quiet, f"wrote {out}/sweep.md ({result['seconds']:.1f} s)")
    return {**result, "out": str(out)}


# ---------------------------------------------------------------------------------------------
# Markdown
# ---------------------------------------------------------------------------------------------
def _num(x, digits=4):
    return "n/a" if x is None else f"{x:.{digits}g}"


def _pct(x):
    return "n/a" if x is None else f"{100 * x:.2f} %"


def _pct_ci(ci):
    return "" if not ci else f" [{100 * ci[0]:.2f}, {100 * ci[1]:.2f}]"


def _markdown(result, plan, cfg):
    rows = result["runs"]
    comp = result["comparison"]
    fmr_keys = list(rows[0]["metrics"]["fnmr_at_fmr"]) if rows else []
    level = f"{cfg.sweep.confidence:.0%}"
    lines = [
        "# Margin sweep",
        "",
        f"Mode `{result['mode']}`, {len(rows)} margins, ranked by **{plan.primary.label}** (lower is better). "
        f"Held-out set: {result['heldout']['rows']} rows, {result['heldout']['identities']} identities, "
        f"{result['heldout']['genuine_pairs']} genuine and {result['heldout']['impostor_pairs']} impostor pairs.",
        "",
        "## Verdict",
        "",
        comp["verdict"][0].upper() + comp["verdict"][1:] + ".",
        "",
    ]
    if comp["difference"] is not None:
        lines += [
            f"Paired difference (runner-up minus best) {comp['difference']:.4g}, {level} interval "
            f"[{comp['ci'][0]:.4g}, {comp['ci'][1]:.4g}]" if comp["ci"] else
            f"Paired difference (runner-up minus best) {comp['difference']:.4g}, no interval",
            f"from {comp['replicates_used']} resamples of the held-out identities (seed {comp['seed']}); each "
            "resample is applied to both runs, so only the difference between the runs varies.",
            "",
        ]
    ranked_by_eer = plan.primary.kind == "eer"
    head = ["margin", *([] if ranked_by_eer else [plan.primary.label + f" ({level} CI)"]),
            f"EER ({level} CI)" if ranked_by_eer else "EER",
            *[f"FNMR@{k}" for k in fmr_keys], "AUC", "Recall@1", "MAP@R", "purity", "NMI", "active",
            "hard / semi-hard / easy"]
    lines += ["## Runs", "", "| " + " | ".join(head) + " |", "|" + "---:|" * len(head)]
    for r in rows:
        m, mi = r["metrics"], r["mining"]
        prim = r["primary"]
        cells = [f"[{r['margin']:g}]({r['report']})"]
        if not ranked_by_eer:
            cells.append(_pct(prim["value"]) + _pct_ci(prim["ci"]))
        cells.append(_pct(m["eer"]) + (_pct_ci(prim["ci"]) if ranked_by_eer else ""))
        for k in fmr_keys:
            e = m["fnmr_at_fmr"].get(k) or {}
            cells.append(_pct(e.get("fnmr")) + _pct_ci(e.get("ci")))
        cells += [_num(m["auc"]), _pct(m["recall_at_1"]), _num(m["map_at_r"]), _num(m["purity"]), _num(m["nmi"])]
        if mi:
            reg = mi["regimes"]
            cells += [_num(mi["active_fraction"], 3), f"{reg['hard']} / {reg['semi-hard']} / {reg['easy']}"]
        else:
            cells += ["n/a", "n/a"]
        lines.append("| " + " | ".join(cells) + " |")
    lines += [
        "",
        "Intervals in the FNMR@ columns come from each run's own evaluation report; the interval of the "
        "ranking metric comes from the sweep's shared identity resamples. 'active' and the regime "
        "counts are the miner's statistics: "
        + ("triplets on the fitted head's training outputs at each margin." if plan.mode == "fit-head"
           else "triplets on each run's training dump (n/a where none was given)."),
        "",
        "## Plots",
        "",
    ]
    for p in result["plots"]:
        lines.append(f"![{p['title']}]({p['file']})")
        lines.append("")
    if plan.mode == "fit-head":
        lines += [
            "Loss curves: the mean hinge loss of the triplets mined at the start of each epoch (solid) and of "
            "the same triplets after the epoch's updates (dashed). Each epoch mines only the regimes asked for "
            f"({', '.join(cfg.mining.regimes)}) on the current head, so the loss measures how hard the remaining "
            "violations are rather than how many there are; the number of mined triplets (right) is the count.",
            "",
        ]
    if result["notes"]:
        lines += ["## Notes", ""] + [f"- {n}" for n in result["notes"]] + [""]
    lines += ["## Caution", "", CAUTION, ""]
    return "\n".join(lines)


# ---------------------------------------------------------------------------------------------
# plots (matplotlib, Agg canvas, no pyplot global state)
# ---------------------------------------------------------------------------------------------
def _figure(width=6.4, height=4.2, ncols=1):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=110)
    FigureCanvasAgg(fig)
    axes = [fig.add_subplot(1, ncols, i + 1) for i in range(ncols)]
    for ax in axes:
        ax.grid(True, color="0.88", linewidth=0.6)
        ax.set_axisbelow(True)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
    return fig, axes


def _margin_axis(ax, margins):
    ax.set_xscale("log")
    ax.set_xticks(margins)
    ax.set_xticklabels([f"{m:g}" for m in margins])
    ax.minorticks_off()
    ax.set_xlabel("margin alpha (squared distance on the unit sphere)")


def _bars(ax, margins, values, cis, colour, label, style="o-"):
    """Values (fractions, drawn in %) against margin with asymmetric interval bars where known."""
    pts = [(m, v, c) for m, v, c in zip(margins, values, cis) if v is not None]
    if not pts:
        return
    x = [p[0] for p in pts]
    y = np.array([100 * p[1] for p in pts])
    lo = np.array([100 * max(p[1] - p[2][0], 0.0) if p[2] else 0.0 for p in pts])
    hi = np.array([100 * max(p[2][1] - p[1], 0.0) if p[2] else 0.0 for p in pts])
    ax.errorbar(x, y, yerr=[lo, hi], fmt=style, color=colour, ecolor=colour, elinewidth=0.8, capsize=4,
                linewidth=1.2, markersize=5, label=label)


def _plots(tmp, plan, rows, reports, comparison):
    plots = []
    margins = [r["margin"] for r in rows]
    best = (comparison.get("best") or {}).get("margin")
    # 1. metric vs margin, with interval bars: the ranking metric (sweep resamples) and the
    # reports' FNMR at each FMR target (their own intervals)
    fig, (ax_p, ax_f) = _figure(width=10.4, ncols=2)
    vals = [r["primary"]["value"] for r in rows]
    cis = [r["primary"]["ci"] for r in rows]
    _bars(ax_p, margins, vals, cis, "#1f4e79", None)
    if best is not None:
        ax_p.plot([best], [100 * comparison["best"]["value"]], marker="*", markersize=15, color="#b03a2e",
                  linestyle="none", label=f"best: margin {best:g}")
        ax_p.legend(frameon=False, fontsize=8)
    ax_p.set_ylabel(f"{plan.primary.label} (%)")
    ax_p.set_title(f"ranking metric ({comparison['confidence']:.0%} identity-resample intervals)", fontsize=9)
    keys = sorted({k for r in rows for k in r["metrics"]["fnmr_at_fmr"]}, key=float)
    colours = ["#1f4e79", "#b03a2e", "#1e8449", "#6c3483", "#ca6f1e", "#34495e", "#138d75", "#7f8c8d"]
    for j, key in enumerate(keys):
        entries = [r["metrics"]["fnmr_at_fmr"].get(key) or {} for r in rows]
        _bars(ax_f, margins, [e.get("fnmr") for e in entries], [e.get("ci") for e in entries],
              colours[j % len(colours)], f"FNMR at FMR {float(key):g}")
    _bars(ax_f, margins, [r["metrics"]["eer"] for r in rows], [None] * len(rows), "0.45", "EER", style="s--")
    ax_f.set_ylim(bottom=0)
    ax_f.set_ylabel("error rate (%)")
    ax_f.set_title("each run's report (FNMR with its report's intervals)", fontsize=9)
    if ax_f.get_legend_handles_labels()[0]:  # nothing labelled when every value is null
        ax_f.legend(frameon=False, fontsize=8)
    for ax in (ax_p, ax_f):
        _margin_axis(ax, margins)
    fig.tight_layout()
    fig.savefig(tmp / "metric_vs_margin.png")
    plots.append({"file": "metric_vs_margin.png", "title": "metric vs margin"})
    # 2. ROC and DET of all runs overlaid, drawn by the report module from each run's report
    from .report import plot_roc_det

    plot_roc_det([(f"margin {r['margin']:g}", rep) for r, rep in zip(rows, reports)], tmp / "roc_det.png",
                 title=f"ROC and DET of every run (markers: FMR targets and EER; ranked by {plan.primary.label})")
    plots.append({"file": "roc_det.png", "title": "ROC and DET of all runs"})
    # 3. loss curves (fit-head mode)
    if plan.mode == "fit-head":
        from matplotlib.ticker import MaxNLocator

        fig, (ax_l, ax_t) = _figure(width=10.4, ncols=2)
        for j, row in enumerate(rows):
            c = colours[j % len(colours)]
            ep = [h["epoch"] for h in row["epochs"]]
            loss = [np.nan if h["loss"] is None else h["loss"] for h in row["epochs"]]
            after = [np.nan if h["loss_after"] is None else h["loss_after"] for h in row["epochs"]]
            ax_l.plot(ep, loss, "o-", color=c, markersize=3, linewidth=1.2, label=f"margin {row['margin']:g}")
            ax_l.plot(ep, after, "v--", color=c, markersize=3, linewidth=0.9)
            ax_t.plot(ep, [h["triplets"] for h in row["epochs"]], "o-", color=c, markersize=3, linewidth=1.2,
                      label=f"margin {row['margin']:g}")
        ax_l.set_ylabel("hinge loss, mean over the epoch's mined triplets")
        ax_l.set_title("loss during the epoch (solid) and after it (dashed)", fontsize=9)
        ax_t.set_ylabel("triplets mined at the start of the epoch")
        ax_t.set_title("triplets in the mined regimes", fontsize=9)
        for ax in (ax_l, ax_t):
            ax.set_xlabel("epoch")
            ax.xaxis.set_major_locator(MaxNLocator(integer=True))
            ax.legend(frameon=False, fontsize=8)
        fig.tight_layout()
        fig.savefig(tmp / "loss.png")
        plots.append({"file": "loss.png", "title": "loss curves"})
    return plots
