"""The paired comparison of runs: rank runs by a verification metric and test the best two with an identity bootstrap.

Runs (one per margin of a sweep) embed the same held-out rows. They are ranked by a primary
metric (``"eer"`` or ``"fnmr@<fmr>"``; lower is better; a tie goes to the smaller margin), and
the difference between the runner-up and the best run gets an interval from a paired,
identity-level bootstrap [1]_ [2]_: each replicate draws the held-out identities with replacement
(multiplicities m_i) and applies that same draw to every run, so the noise that the runs share
(which identities happen to be in the evaluation set) cancels from the difference.

Replicates are exact: a genuine pair of identity i weighs m_i and an impostor pair of identities
i, j weighs m_i * m_j (pairs between two copies of one identity are not formed: they would pair a
photo with itself), so the weighted counts are whole numbers and go through the verification
module's own error rates; identical runs therefore differ by exactly 0.

References
----------
.. [1] B. Efron, R. Tibshirani, "An Introduction to the Bootstrap", Chapman & Hall, 1993 (the
   percentile interval; paired resampling of a difference).
.. [2] R. M. Bolle, N. K. Ratha, S. Pankanti, "Error analysis of pattern recognition systems: the
   subsets bootstrap", Computer Vision and Image Understanding 93(1), 2004 (resampling subjects
   rather than pairs, since pairs that share a subject are dependent).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from .._errors import TripletkitError
from .._exact import snap
from .._validate import as_codes, as_embeddings, whole_number
from ..report.format import bracketed, compact, level, metric_label, significant
from .rates import ScoreCounts, equal_error_rate, fnmr_at_fmr

__all__ = ["MAX_PAIRS", "PrimaryMetric", "parse_primary", "PairScores", "primary_value", "compare_runs",
           "paired_comparison"]

#: Pair scores held per run (about 24 bytes each: 480 MB per run at this cap, reached at about
#: 6,300 held-out rows).
MAX_PAIRS = 20_000_000

#: Replicates keep the impostor tail down to this multiple of the full-sample operating FMR (the
#: EER, or the FMR target); a replicate whose operating point falls below it uses every pair.
_TAIL_FACTOR = {"eer": 2.0, "fnmr": 8.0}


# ---------------------------------------------------------------------------------------------
# the primary metric
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class PrimaryMetric:
    """A ranking metric: ``kind`` ("eer" or "fnmr"), ``fmr`` (the target, or None) and ``text``."""

    kind: str
    fmr: float | None
    text: str

    @property
    def label(self):
        """Its name for people: ``EER`` or ``FNMR at FMR = 0.001``."""
        return metric_label(self.text)


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
    PrimaryMetric
    """
    if not isinstance(text, str):
        raise TripletkitError(f"{where} must be a string such as 'eer' or 'fnmr@0.001', got {text!r}")
    spelt = text.strip().lower()
    if spelt == "eer":
        return PrimaryMetric("eer", None, "eer")
    match = re.fullmatch(r"fnmr@([0-9.eE+-]+)", spelt)
    x = None
    if match:
        try:
            x = float(match.group(1))
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
    return PrimaryMetric("fnmr", x, f"fnmr@{x:g}")


# ---------------------------------------------------------------------------------------------
# exact pair scores with identity weights
# ---------------------------------------------------------------------------------------------
class PairScores:
    """Every pair score of one run's held-out set, grouped by distinct value, with the pair's identities.

    Scores are the exact cosines of :mod:`tripletkit._exact` (as in the verification module), so
    with every identity drawn once the counts are those of the run's all-pairs verification.
    Memory: about 16 bytes per impostor pair, 12 per genuine pair and 8 per distinct score, plus
    the replicate tail.

    Parameters
    ----------
    embeddings : array-like of shape (n, d)
        Unit rows of the held-out set.
    labels : array-like of int, shape (n,)
        Identity codes 0..k-1.
    """

    def __init__(self, embeddings, labels):
        rows = snap(np.asarray(embeddings, dtype=np.float32))
        labels = np.asarray(labels, dtype=np.int64)
        n = rows.shape[0]
        pairs = n * (n - 1) // 2
        if pairs > MAX_PAIRS:
            raise TripletkitError(
                f"the held-out set has {n} rows ({pairs} pairs); the paired comparison of a sweep holds every "
                f"pair score and allows at most {MAX_PAIRS}; sweep on a subset of the held-out identities"
            )
        scores = np.empty(pairs, dtype=np.float64)
        first = np.empty(pairs, dtype=np.int32)
        second = np.empty(pairs, dtype=np.int32)
        cols = np.arange(n)
        at = 0
        step = max(1, (1 << 21) // max(n, 1))  # rows per block: about 16 MB of float64 scores
        for start in range(0, n, step):
            block_rows = cols[start:start + step]
            block = rows[block_rows] @ rows.T
            upper = cols[None, :] > block_rows[:, None]
            count = int(upper.sum())
            scores[at:at + count] = block[upper]
            first[at:at + count] = np.broadcast_to(labels[block_rows][:, None], upper.shape)[upper]
            second[at:at + count] = np.broadcast_to(labels[None, :], upper.shape)[upper]
            at += count
        self.thresholds, group = np.unique(scores, return_inverse=True)
        self.thresholds = self.thresholds.astype(np.float64)
        group = group.reshape(-1).astype(np.int32)
        genuine = first == second
        self.gen_group, self.gen_identity = group[genuine], first[genuine]
        impostor = ~genuine
        self.imp_group, self.imp_a, self.imp_b = group[impostor], first[impostor], second[impostor]
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
        exact, and :meth:`tail_is_exact_for` says whether a replicate's operating point lies there.
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
        tail = self._tail
        if tail is None:
            return None
        size = tail["thresholds"].size
        gen = np.bincount(tail["gen_group"], weights=m[self.gen_identity], minlength=size)
        imp = np.bincount(tail["imp_group"], weights=m[tail["imp_a"]] * m[tail["imp_b"]], minlength=size)
        mn = m * self.rows_per_identity
        total = (mn.sum() ** 2 - np.dot(mn, mn)) / 2.0
        imp[tail["lump"]] += total - imp.sum()
        return ScoreCounts(tail["thresholds"], gen.astype(np.int64), np.rint(imp).astype(np.int64))

    def tail_is_exact_for(self, counts, primary):
        """Whether ``primary`` on ``counts`` (from :meth:`tail_counts`) is decided above the cut."""
        tail = self._tail
        n_gen, n_imp = int(counts.genuine.sum()), int(counts.impostor.sum())
        imp_ge_cut = int(counts.impostor[tail["cut"]:].sum())
        if primary.kind == "eer":
            # D = FMR - FNMR is non-increasing in the threshold; D >= 0 at the cut puts the last
            # threshold with D >= 0, and the one after it, at or above the cut.
            gen_lt_cut = int(counts.genuine[:tail["cut"]].sum())
            return imp_ge_cut * n_gen >= gen_lt_cut * n_imp
        # FMR at the cut above the target: the lowest threshold with FMR <= target lies above the cut.
        return imp_ge_cut / n_imp > primary.fmr


def primary_value(pair_scores, m, primary, stats=None):
    """The primary metric of one run for identity multiplicities ``m`` (None: the full sample).

    Parameters
    ----------
    pair_scores : PairScores
    m : ndarray of float64, shape (k,), or None
        How often each identity was drawn (whole numbers).
    primary : PrimaryMetric
    stats : dict, optional
        ``stats["full_list"]`` counts the replicates that fell below the tail's cut.

    Returns
    -------
    float or None
        None where the metric is undefined: no genuine or no impostor pair, or an FMR target with
        fewer than 3 / FMR impostor pairs (the rule of 3, as in the verification module).
    """
    counts = None
    if m is not None:
        counts = pair_scores.tail_counts(m)
        if counts is not None and int(counts.genuine.sum()) and int(counts.impostor.sum()):
            if not pair_scores.tail_is_exact_for(counts, primary):
                counts = None
                if stats is not None:
                    stats["full_list"] += 1
    if counts is None:
        counts = pair_scores.counts(m)
    n_gen, n_imp = int(counts.genuine.sum()), int(counts.impostor.sum())
    if n_gen == 0 or n_imp == 0:
        return None
    if primary.kind == "eer":
        return equal_error_rate(counts)[0]
    if n_imp < 3.0 / primary.fmr:
        return None
    return fnmr_at_fmr(counts, primary.fmr)[0]


def _interval(values, confidence):
    """The percentile interval of the defined values, or None when there are none."""
    v = np.asarray([x for x in values if x is not None], dtype=np.float64)
    if v.size == 0:
        return None
    lo, hi = np.quantile(v, [(1 - confidence) / 2, (1 + confidence) / 2])
    return [float(lo), float(hi)]


# ---------------------------------------------------------------------------------------------
# the comparison
# ---------------------------------------------------------------------------------------------
def _replicates(pair_scores, full, n_identities, primary, bootstrap, seed):
    """The primary metric of every run in every identity resample: float64 (runs, bootstrap), NaN where undefined.

    Only the top tail of each run's impostor scores is held per replicate: the pairs at or above
    the threshold where the full-sample FMR is :data:`_TAIL_FACTOR` times the operating FMR (the
    EER, or the FMR target); a replicate whose operating point falls below that cut is
    recomputed from every pair. Also returns how many replicates needed the full pair list.
    """
    for ps, value in zip(pair_scores, full):
        if value is not None:
            operating = value if primary.kind == "eer" else primary.fmr
            ps.prepare_tail(min(1.0, _TAIL_FACTOR[primary.kind] * max(operating, 1e-12)))
    rng = np.random.default_rng(seed)
    boot = np.full((len(pair_scores), bootstrap), np.nan)
    stats = {"full_list": 0}
    for b in range(bootstrap):
        m = np.bincount(rng.integers(0, n_identities, size=n_identities), minlength=n_identities).astype(np.float64)
        for r, ps in enumerate(pair_scores):
            if full[r] is not None:
                value = primary_value(ps, m, primary, stats)
                boot[r, b] = np.nan if value is None else value
    return boot, stats["full_list"]


def compare_runs(pair_scores, margins, n_identities, primary, bootstrap, confidence, seed):
    """Full-sample values, per-run intervals and the paired comparison of the best two runs.

    Parameters
    ----------
    pair_scores : list of PairScores
        One per run, all of the same held-out rows.
    margins : list of float
        The margin of each run (ties of the metric go to the smaller margin).
    n_identities : int
        Identities of the held-out set (the codes of ``pair_scores`` are 0..n_identities-1).
    primary : PrimaryMetric
    bootstrap : int
        Identity resamples, each applied to every run.
    confidence : float
    seed : int

    Returns
    -------
    per_run : list of dict
        ``value`` and ``ci`` of each run.
    comparison : dict
        ``best``, ``runner_up``, ``difference`` (runner-up minus best), ``ci``,
        ``replicates_used``, ``larger_than_noise``, ``replicates_on_full_pair_list`` and a plain
        ``verdict``, with the settings of the comparison.
    """
    full = [primary_value(ps, None, primary) for ps in pair_scores]
    boot, on_full_list = _replicates(pair_scores, full, n_identities, primary, bootstrap, seed)
    per_run = [{"value": full[r], "ci": _interval(boot[r][np.isfinite(boot[r])].tolist(), confidence)}
               for r in range(len(pair_scores))]
    ranked = sorted((i for i in range(len(margins)) if full[i] is not None), key=lambda i: (full[i], margins[i]))
    comparison = {
        "primary": primary.text, "lower_is_better": True, "bootstrap": bootstrap, "confidence": confidence,
        "seed": seed, "resampled": "held-out identities, the same draw for both runs",
        "best": None, "runner_up": None, "difference": None, "ci": None, "replicates_used": 0,
        "larger_than_noise": None, "replicates_on_full_pair_list": on_full_list,
    }
    if not ranked:
        comparison["verdict"] = f"no comparison: {primary.label} is not defined for any run (see each run's report)"
        return per_run, comparison
    best = ranked[0]
    comparison["best"] = {"margin": margins[best], "value": full[best], "ci": per_run[best]["ci"]}
    if len(ranked) < 2:
        comparison["verdict"] = (f"no comparison: only margin {compact(margins[best])} has a defined {primary.label}"
                                 if len(margins) > 1 else "no comparison: the sweep has a single run")
        return per_run, comparison
    second = ranked[1]
    comparison["runner_up"] = {"margin": margins[second], "value": full[second], "ci": per_run[second]["ci"]}
    difference = full[second] - full[best]
    paired = boot[second] - boot[best]
    paired = paired[np.isfinite(paired)]
    ci = _interval(paired.tolist(), confidence)
    comparison.update(difference=float(difference), ci=ci, replicates_used=int(paired.size))
    if ci is not None:
        comparison["larger_than_noise"] = bool(ci[0] > 0)
    comparison["verdict"] = _verdict(margins[best], margins[second], difference, ci, primary.label, confidence)
    return per_run, comparison


def _verdict(best, second, difference, ci, label, confidence):
    """The comparison of the best two runs in one sentence."""
    if ci is None:
        return (f"margin {compact(best)} has the lower {label}, but no bootstrap replicate defines it for both runs, "
                "so the noise is unknown")
    span = f"{level(confidence)} interval {bracketed(ci)}"
    if ci[1] < 0:
        # Possible only for a skewed resampling distribution: the full sample and the resamples disagree.
        return (f"margin {compact(best)} has the lower {label} on the full held-out set, but the resamples "
                f"favour margin {compact(second)} ({span}); the ranking is not stable, so the difference is not "
                "larger than the noise")
    if ci[0] > 0:
        return (f"margin {compact(best)} beats margin {compact(second)} on {label} by {significant(difference)}: "
                f"the difference is larger than the noise ({span} excludes 0)")
    return (f"margin {compact(best)} has the lower {label} (by {significant(difference)} over margin "
            f"{compact(second)}), but the difference is not larger than the noise ({span} includes 0)")


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
        ``comparison``: as :func:`compare_runs` returns it.
    """
    metric = parse_primary(primary)
    if not isinstance(runs, dict) or not runs:
        raise TripletkitError("runs must be a non-empty dict of margin -> held-out embeddings")
    margins = sorted(float(m) for m in runs)
    matrices = [as_embeddings(runs[m], f"run {m:g}", normalise=True) for m in sorted(runs)]
    codes, values = as_codes(labels, n=matrices[0].shape[0])
    for margin, matrix in zip(margins, matrices):
        if matrix.shape[0] != codes.shape[0]:
            raise TripletkitError(f"run {margin:g} has {matrix.shape[0]} rows but labels has {codes.shape[0]}; "
                                  "every run must embed the same held-out rows")
    bootstrap = whole_number(bootstrap, "bootstrap", low=1)
    if not 0 < confidence < 1:
        raise TripletkitError(f"confidence must be between 0 and 1, got {confidence!r}")
    scores = [PairScores(matrix, codes) for matrix in matrices]
    per_run, comparison = compare_runs(scores, margins, int(values.shape[0]), metric, bootstrap, confidence, seed)
    return {"runs": {m: r for m, r in zip(margins, per_run)}, "comparison": comparison}
