"""Mining: choose the easy, semi-hard and hard triplets the next epoch trains on.

From an embedding table (ids, labels, unit rows), :func:`mine` draws anchors, positives of the same
identity and, per (anchor, positive) pair and requested regime, negatives of other identities, and
writes the triplet table of DESIGN.md (Parquet, in row groups as produced, atomically).

Distances and regimes
---------------------
Every decision is made in float64 on the table's float32 unit rows: cos(a, b) is the float64 dot
product of the two stored rows (:func:`tripletkit.index.exact_cosine`), the squared distance is
``max(0, 2 - 2 cos)`` and the Euclidean distance its square root. With margin alpha (boundaries of
:func:`tripletkit.loss.regime_codes`, stated once there and in DESIGN.md):

- hard: d_an < d_ap
- semi-hard: d_ap <= d_an < d_ap + alpha
- easy: d_an >= d_ap + alpha

``d_ap``, ``d_an`` and ``violation = d_ap - d_an + alpha`` are stored as float32, rounded from
those float64 values; the stored regime is the one of the float64 values. A float64 brute force on
the same rows (any summation order) agrees except for a pair within about 1e-15 of a boundary.

Candidate search (one search for all regimes)
---------------------------------------------
Hard and semi-hard negatives of every pair of anchor ``a`` lie within the largest
``d_ap + alpha`` (semi-hard requested) or ``d_ap`` (hard only) of its pairs, i.e. above a cosine
threshold. :meth:`tripletkit.index.SearchIndex.within_pieces` returns every row above each
anchor's threshold: a top-k search (``neighbours``) first, widened by a range search (or by
doubling k for HNSW) for the anchors whose k-th neighbour is still inside the radius, never
truncated. faiss float32 scores only pre-select (with a safety band); membership is decided with
the float64 cosines. With ``index = "exact"`` the candidate sets are exactly those of a brute force
over all rows. Every row is also a query at the duplicate threshold, so the same search finds the
suspect duplicates.

Dense path. On a poorly separated embedding (the first epoch of training, a random projection) most
anchors' bands hold a large share of the table: nearly every anchor widens and the candidate lists
approach rows x rows, whose sorting then dominates. With ``index = "exact"``, when anchors sampled
evenly hold on average at least 3% of the table above their threshold, the whole run takes a dense
path instead: blocks of rows (sized from ``memory_mb``) scored against every row with one float32
matrix product, each anchor's rows ordered by a bin of their score (a radix sort), and exact
float64 cosines computed only where a decision needs them (``hardest``, ``random``) or for every
row (``distance-weighted``, whose weights need them). Membership is decided by the same float64
cosines and the same counts, ranks and draws reach :func:`_choose`, so the output bytes are those
of the search path (tests/test_mining.py checks both paths against each other and a brute force).
``summary.details`` records ``dense_share`` (the sampled share) and ``dense_rows``.

Easy negatives are plentiful and far away, so they are not searched: ``random`` draws them by
rejection sampling from the rows of other identities (up to six rounds of proposals, then an exact
scan of all rows for the pairs still short); ``hardest`` takes the nearest easy ones from the
first top-k when it provably holds them, else from an exact scan; ``distance-weighted`` needs
every easy negative's weight, so it always scans all rows (cost: one exact pass plus work
proportional to pairs x rows).

Selection inside a regime
-------------------------
- ``hardest``: the ``negatives_per_positive`` candidates of smallest d_an (ties by row position);
- ``random``: a uniform sample without replacement (Floyd's algorithm, Bentley & Floyd 1987);
- ``distance-weighted``: a sample without replacement with probability proportional to
  min(lambda, 1/q(d)) for the Euclidean distance d, where
  q(d) ∝ d^(n-2) (1 - d^2/4)^((n-3)/2) is the density of pairwise distances of uniform points on
  the unit sphere in R^n and lambda = 1/q(``weighted_cutoff``) (Wu et al. 2017; their cut-off of
  0.5 is from memory of the paper). Computed in log space; drawn with Gumbel-perturbed log weights
  (equivalent to Efraimidis & Spirakis 2006).

Randomness and reproducibility
------------------------------
All draws come from a counter-based generator: a 64-bit hash (the SplitMix64 finaliser of Steele,
Lea & Flood 2014) of a stream key taken from ``np.random.default_rng(seed)`` and of the draw's
coordinates (anchor row, positive row, regime, candidate row, round). A pair's draws therefore do
not depend on block sizes or on processing order, and the same seed, input and options give the
same bytes (row groups have a fixed size).

References
----------
.. [1] C.-Y. Wu, R. Manmatha, A. J. Smola, P. Kraehenbuehl, "Sampling Matters in Deep Embedding
   Learning", ICCV 2017 (distance-weighted sampling, Sec. 4).
.. [2] F. Schroff, D. Kalenichenko, J. Philbin, "FaceNet: A Unified Embedding for Face Recognition
   and Clustering", CVPR 2015 (semi-hard negatives).
.. [3] J. Bentley, R. Floyd, "Programming pearls: a sample of brilliance", Communications of the
   ACM 30(9), 1987 (sampling without replacement).
.. [4] P. S. Efraimidis, P. G. Spirakis, "Weighted random sampling with a reservoir", Information
   Processing Letters 97(5), 2006.
.. [5] G. L. Steele, D. Lea, C. H. Flood, "Fast splittable pseudorandom number generators",
   OOPSLA 2014 (the SplitMix64 mixing function).
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import sys
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from tqdm import tqdm

from ._errors import TripletkitError, TripletkitWarning
from ._io import PARQUET_WRITE, atomic_paths, check_output
from .config import MiningConfig, override
from .index import (build_index, estimate_recall, exact_cosine, exact_cosine_rows, exact_scores,
                    faiss_threads, query_block_rows, resolve_kind)
from .losses import REGIMES, regime_codes
from .tables.embeddings import EmbeddingTable, as_table, source_path

__all__ = ["mine", "MiningSummary", "REGIMES", "TRIPLET_COLUMNS", "DUPLICATE_COLUMNS",
           "distance_log_weights", "duplicates_path", "triplet_schema"]

#: Columns of the triplet table, in order.
TRIPLET_COLUMNS = ("anchor", "positive", "negative", "anchor_label", "negative_label",
                   "d_ap", "d_an", "violation", "regime")
#: Columns of the suspect-duplicate report.
DUPLICATE_COLUMNS = ("id_a", "id_b", "label_a", "label_b", "cosine")

_EASY, _SEMI, _HARD = REGIMES.index("easy"), REGIMES.index("semi-hard"), REGIMES.index("hard")
# Rows per Parquet row group: fixed, so the bytes do not depend on block sizes.
_ROW_GROUP_ROWS = 1 << 16
# Rejection rounds for easy negatives before the exact scan takes over (proposals double each round).
_EASY_ROUNDS = 6
# Metadata keys are namespaced so they do not collide with other tools' keys.
_META = "tripletkit."
# Dense path (see _Miner._decide_dense): taken with an exact index when the sampled anchors' search
# bands hold at least this share of the table on average. The two paths cost the same at about
# 2% (d = 16) and 1% (d = 128) (docs/benchmarks_mining.md, section 4); 3% takes the dense path
# only where it is clearly faster. A private knob: 0.0 forces the dense path, inf the search path.
_DENSE_SHARE = 0.03
# Anchors sampled (evenly spaced) to estimate the band share.
_DENSE_SAMPLE = 256
# Peak bytes per (row, column) cell of a dense block: float32 scores, float64 cosines and their
# product buffer, distances, the int16 bins, their int64 sort order, masks. distance-weighted
# also holds per-entry draw state (hash counters, keys, noise) for one pair slot at a time.
_DENSE_CELL_BYTES = 56
_DENSE_WEIGHTED_CELL_BYTES = 216


# ---------------------------------------------------------------------------------------------
# summary
# ---------------------------------------------------------------------------------------------
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
        Extra counters (pairs, widened queries, easy scans, index parameters, and for the dense
        path ``dense_share``, the sampled share of the table inside the anchors' bands (None when
        not sampled: approximate index, nothing searched), and ``dense_rows``, the query rows it
        mined); not in ``to_dict``.
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


# ---------------------------------------------------------------------------------------------
# small pure helpers
# ---------------------------------------------------------------------------------------------
def _distance(cos, kind):
    """Distance from float64 cosines: squared ``max(0, 2 - 2 cos)`` or its square root."""
    sq = np.maximum(2.0 - 2.0 * cos, 0.0)
    return sq if kind == "squared" else np.sqrt(sq)


def _distance_inplace(cos, kind):
    """:func:`_distance` overwriting ``cos`` (float64): the same values bit for bit (-2 cos is exact)."""
    cos *= -2.0
    cos += 2.0
    np.maximum(cos, 0.0, out=cos)
    if kind != "squared":
        np.sqrt(cos, out=cos)
    return cos


def _cosine_at(dist, kind):
    """The cosine at which the distance equals ``dist`` (inverse of :func:`_distance`)."""
    sq = dist if kind == "squared" else dist * dist
    return 1.0 - sq / 2.0


def _euclidean(d, kind):
    return np.sqrt(d) if kind == "squared" else d


_ANTIPODAL_GAP = 1e-6


def distance_log_weights(d, dim, cutoff=0.5):
    """Log sampling weights of distance-weighted sampling, log min(lambda, 1/q(d)).

    Parameters
    ----------
    d : array-like of float
        Euclidean distances between unit vectors, in [0, 2].
    dim : int
        Embedding dimension n (>= 2).
    cutoff : float, default 0.5
        lambda = 1/q(cutoff): weights are capped at their value at this distance.

    Returns
    -------
    ndarray of float64
        log weights up to an additive constant, all finite.

    Notes
    -----
    q(d) ∝ d^(n-2) (1 - d^2/4)^((n-3)/2) is the density of the distance between two independent
    uniform points on the unit sphere in R^n [1]_. Sampling negatives with weight 1/q(d) spreads
    the chosen distances evenly instead of concentrating them near sqrt(2); the cap lambda keeps
    very close (often noisy) negatives from dominating.

    Distances are clipped to ``[0, 2 - 1e-6]``: in dimension 2, q diverges at d = 2 and an
    antipodal candidate would otherwise get weight 0, so a pair whose only candidates are
    antipodal would silently get no negative. After the clip it gets the smallest weight.

    References
    ----------
    .. [1] C.-Y. Wu, R. Manmatha, A. J. Smola, P. Kraehenbuehl, "Sampling Matters in Deep
       Embedding Learning", ICCV 2017, Sec. 4 (q(d), and the weights min(lambda, q(d)^-1)).
    """
    d = np.clip(np.asarray(d, dtype=np.float64), 0.0, 2.0 - _ANTIPODAL_GAP)
    return np.minimum(-_log_density(d, dim), -_log_density(np.float64(cutoff), dim))


def _log_density(d, n):
    """log q(d) up to a constant, with 0 * log(0) taken as 0 (n = 2 or 3)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.zeros(np.shape(d))
        if n != 2:
            out = out + (n - 2) * np.log(d)
        if n != 3:
            out = out + 0.5 * (n - 3) * np.log1p(-(d * d) / 4.0)
    return out


_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)


def _mix(x):
    """SplitMix64 finaliser (Steele, Lea & Flood, OOPSLA 2014): a bijective 64-bit scramble."""
    x = x ^ (x >> np.uint64(30))
    x = x * _MIX1
    x = x ^ (x >> np.uint64(27))
    x = x * _MIX2
    return x ^ (x >> np.uint64(31))


def _uniform(key, *counters):
    """Uniform floats in (0, 1), one per broadcast element of ``counters`` (non-negative ints)."""
    with np.errstate(over="ignore"):
        h = np.asarray(key, dtype=np.uint64)
        for c in counters:
            h = _mix(h ^ _mix(np.asarray(c).astype(np.uint64) + _GOLDEN))
    return ((h >> np.uint64(11)).astype(np.float64) + 0.5) * 2.0 ** -53


def _floyd(m, k, key, *counters):
    """Per row, ``min(m[i], k)`` distinct offsets in ``[0, m[i])``, uniformly (Floyd's algorithm).

    Returns an int64 array (len(m), k) padded with -1. Draw ``step`` of row ``i`` is
    ``_uniform(key, *counters[i], step)``, so a row's sample depends only on its counters.
    """
    m = np.asarray(m, dtype=np.int64)
    out = np.full((m.size, k), -1, dtype=np.int64)
    cols = np.arange(k, dtype=np.int64)
    small = m <= k
    if small.any():
        out[small] = np.where(cols[None, :] < m[small, None], cols[None, :], -1)
    big = np.flatnonzero(~small)
    if big.size:
        mb = m[big]
        ctr = [np.broadcast_to(np.asarray(c), m.shape)[big] for c in counters]
        sel = np.empty((big.size, k), dtype=np.int64)
        for step in range(k):
            j = mb - k + step
            t = np.minimum((_uniform(key, *ctr, step) * (j + 1)).astype(np.int64), j)
            if step:
                t = np.where((sel[:, :step] == t[:, None]).any(axis=1), j, t)
            sel[:, step] = t
        out[big] = sel
    return out


def _ragged(counts):
    """Offsets 0..c-1 for each count, concatenated."""
    counts = np.asarray(counts, dtype=np.int64)
    total = int(counts.sum())
    starts = np.cumsum(counts) - counts
    return np.arange(total, dtype=np.int64) - np.repeat(starts, counts)


def _count_below(values, lo, hi, x):
    """Per segment ``values[lo[i]:hi[i]]`` (ascending), how many values are < ``x[i]``."""
    left, right = lo.astype(np.int64).copy(), hi.astype(np.int64).copy()
    active = np.flatnonzero(left < right)
    while active.size:
        mid = (left[active] + right[active]) // 2
        below = values[mid] < x[active]
        left[active[below]] = mid[below] + 1
        right[active[~below]] = mid[~below]
        active = active[left[active] < right[active]]
    return left - lo


def _group_firsts(groups):
    """Boolean mask of the first element of each run of equal (sorted) ``groups`` (n >= 1)."""
    first = np.ones(groups.size, dtype=bool)
    first[1:] = groups[1:] != groups[:-1]
    return first


def _rank_in_groups(groups):
    """0-based position of each element within its run of equal (sorted) ``groups``."""
    n = groups.size
    if not n:
        return np.zeros(0, dtype=np.int64)
    starts = np.flatnonzero(_group_firsts(groups))
    return np.arange(n, dtype=np.int64) - np.repeat(starts, np.diff(np.append(starts, n)))


def _gumbel(u):
    return -np.log(-np.log(u))


def _choose(policy, lo, hi, k, counters, keys, rows=None, logw=None):
    """Choose up to ``k`` entries of each range ``[lo[i], hi[i])`` of a candidate list.

    Parameters
    ----------
    policy : {"hardest", "random", "distance-weighted"}
        ``hardest`` takes the first ``k`` (the list is sorted by distance, then row);
        ``random`` a uniform sample without replacement (Floyd); ``distance-weighted`` a sample
        without replacement with probabilities proportional to ``exp(logw)``: the ``k`` largest
        ``logw + Gumbel noise`` (Gumbel-top-k, equivalent to Efraimidis & Spirakis 2006).
    counters : tuple of arrays (or scalars) broadcastable to ``lo.shape``
        Coordinates of each range's draws (anchor row, positive row, regime code).
    keys : (uint64, uint64)
        Stream keys of the random and weighted draws.
    rows, logw : ndarray, optional
        Row position and log weight of every list entry (weighted only; the noise of an entry is
        drawn at its counters and row, so it does not depend on where the entry sits in the list).

    Returns
    -------
    owner, idx : ndarray of int64
        Range number and list position of each chosen entry.
    """
    L = hi - lo
    if policy == "hardest":
        t = np.minimum(L, k)
        return np.repeat(np.arange(lo.size), t), np.repeat(lo, t) + _ragged(t)
    if policy == "random":
        off = _floyd(L, k, keys[0], *counters)
        owner, col = np.nonzero(off >= 0)
        return owner, lo[owner] + off[owner, col]
    owner = np.repeat(np.arange(lo.size), L)
    idx = np.repeat(lo, L) + _ragged(L)
    ctr = [np.broadcast_to(np.asarray(c), lo.shape)[owner] for c in counters]
    score = logw[idx] + _gumbel(_uniform(keys[1], *ctr, rows[idx]))
    ok = np.isfinite(score)  # weight 0 (log -inf) is never drawn
    owner, idx, score = owner[ok], idx[ok], score[ok]
    pick = _top_in_groups(owner, score, rows[idx], k)
    return owner[pick], idx[pick]


def _top_in_groups(groups, score, rows, k):
    """Positions of the ``k`` entries of largest ``score`` (ties: smallest row) of each run of equal
    ``groups`` (sorted), in (group, -score, row) order: what a lexsort by (group, -score, row)
    would put first, found with ``k`` passes of a per-group maximum instead of a sort of every
    entry. Rows are distinct within a group (candidate rows of one anchor)."""
    if not groups.size:
        return np.zeros(0, dtype=np.int64)
    first = _group_firsts(groups)
    starts = np.flatnonzero(first)
    member = np.cumsum(first) - 1  # group number of each entry
    live = score.astype(np.float64, copy=True)
    big = np.iinfo(np.int64).max
    found, steps = [], []
    for step in range(k):
        top = np.maximum.reduceat(live, starts)
        best = (live == top[member]) & np.isfinite(top[member])
        if not best.any():
            break
        low = np.minimum.reduceat(np.where(best, rows, big), starts)
        hit = np.flatnonzero(best & (rows == low[member]))
        live[hit] = -np.inf
        found.append(hit)
        steps.append(np.full(hit.size, step, dtype=np.int64))
    if not found:
        return np.zeros(0, dtype=np.int64)
    hit, step = np.concatenate(found), np.concatenate(steps)
    return hit[np.lexsort((step, groups[hit]))]


def duplicates_path(out):
    """Path of the suspect-duplicate report written beside a triplet table ``out``."""
    out = Path(out)
    stem = out.stem if out.suffix == ".parquet" else out.name
    return out.with_name(f"{stem}.duplicates.parquet")


# ---------------------------------------------------------------------------------------------
# the miner
# ---------------------------------------------------------------------------------------------
class _Miner:
    """State of one mining run: anchors, pairs, thresholds, random streams, counters."""

    def __init__(self, table, cfg, index):
        self.t = table
        self.cfg = cfg
        self.index = index
        self.X = table.embeddings
        self.n, self.dim = table.n, table.dim
        self.lab = table.labels
        self.sizes = table.identity_sizes()
        self.kind = cfg.distance
        self.margin = float(cfg.margin)
        self.npp = int(cfg.negatives_per_positive)
        self.dup_cos = float(cfg.duplicate_cosine)
        self.slack = index.slack
        self.memory_mb = int(cfg.memory_mb)
        self.order = list(cfg.regimes)
        self.codes = [REGIMES.index(r) for r in self.order]
        self.position = np.zeros(len(REGIMES), dtype=np.int64)
        self.position[self.codes] = np.arange(len(self.codes))
        self.searched = [c for c in self.codes if c != _EASY]
        keys = np.random.default_rng(cfg.seed).integers(0, 2 ** 63 - 1, size=8, dtype=np.int64)
        (self.k_anchor, self.k_pos, self.k_random, self.k_weight, self.k_easy, self.k_scan,
         self.k_recall, _) = keys.astype(np.uint64)
        self.by_label = np.argsort(self.lab, kind="stable")
        self.label_start = np.concatenate([[0], np.cumsum(self.sizes)[:-1]]).astype(np.int64)
        self.without = {r: 0 for r in self.order}
        self.counts = np.zeros(len(REGIMES), dtype=np.int64)
        self.active = 0
        self.dups = []
        self.widened = 0
        self.easy_scanned = 0
        self.dense_rows = 0
        self._plan()
        self._decide_dense()

    # -- anchors and positives ----------------------------------------------------------------
    def _plan(self):
        cfg, lab, n = self.cfg, self.lab, self.n
        eligible = self.sizes[lab] >= 2
        self.singletons = int((~eligible).sum())
        rows = np.flatnonzero(eligible)
        if cfg.max_per_identity is not None and rows.size:
            u = _uniform(self.k_anchor, rows)
            order = np.lexsort((rows, u, lab[rows]))
            ranked = rows[order]
            keep = _rank_in_groups(lab[ranked]) < cfg.max_per_identity
            rows = np.sort(ranked[keep])
        self.anchors = rows.astype(np.int64)
        self.anchor_of_row = np.full(n, -1, dtype=np.int64)
        self.anchor_of_row[self.anchors] = np.arange(self.anchors.size)
        # positives: Floyd draws among the anchor's identity-mates (its own position skipped)
        rank_in_label = np.empty(n, dtype=np.int64)
        rank_in_label[self.by_label] = np.arange(n) - self.label_start[lab[self.by_label]]
        a = self.anchors
        la = lab[a]
        off = _floyd(self.sizes[la] - 1, cfg.positives_per_anchor, self.k_pos, a)
        owner, col = np.nonzero(off >= 0)
        o = off[owner, col]
        o = o + (o >= rank_in_label[a[owner]])
        pos = self.by_label[self.label_start[la[owner]] + o]
        order = np.lexsort((pos, owner))
        self.pair_anchor = owner[order].astype(np.int64)
        self.pair_a = a[self.pair_anchor]
        self.pair_p = pos[order].astype(np.int64)
        self.plims = np.zeros(a.size + 1, dtype=np.int64)
        np.cumsum(np.bincount(self.pair_anchor, minlength=a.size), out=self.plims[1:])
        self.d_ap = _distance(exact_cosine(self.X, self.pair_a, self.pair_p), self.kind)
        # search radius per anchor: the loosest bound of its pairs
        if _SEMI in self.searched:
            bound = self.d_ap + self.margin
        else:
            bound = self.d_ap
        self.radius = np.full(a.size, -np.inf)
        if self.searched and a.size:
            np.maximum.at(self.radius, self.pair_anchor, bound)
        # query thresholds: every row at the duplicate threshold, anchors also at their radius
        self.thresholds = np.full(n, self.dup_cos, dtype=np.float64)
        if self.searched and a.size:
            # 1e-12 below the exact cosine of the radius, so float64 rounding cannot drop a row
            c = _cosine_at(self.radius, self.kind) - 1e-12
            self.thresholds[a] = np.minimum(self.thresholds[a], c)

    # -- dense path --------------------------------------------------------------------------------
    def _decide_dense(self):
        """Choose between the search path and the dense path for the whole run.

        When an embedding separates its identities poorly (first epoch of training), most anchors'
        search bands hold a large share of the table: the top-k search is widened for nearly every
        anchor and the candidate lists approach rows x rows. The dense path then scores blocks of
        anchors against every row instead (same exact float64 cosines, same membership rule, same
        draws, so the same output) and never sorts the candidates. It is taken only with
        ``index = "exact"`` (an approximate index would become exact, changing its output) and an
        in-process index, when the sampled anchors' bands hold at least ``_DENSE_SHARE`` of the
        table on average.
        """
        self.dense, self.dense_share = False, None
        if (self.index.kind != "exact" or getattr(self.index, "plan", None) is not None
                or not self.searched or not self.anchors.size or self.t.n_identities < 2):
            return
        m = min(_DENSE_SAMPLE, self.anchors.size)
        take = self.anchors[np.unique(np.linspace(0, self.anchors.size - 1, m).astype(np.int64))]
        low = self.thresholds[take] - self.slack
        chunk = int(max(1, self.memory_mb * 2 ** 20 // 4 // (8 * self.n)))
        inside = 0
        for c in range(0, take.size, chunk):
            S = exact_scores(self.X, self.X[take[c:c + chunk]])
            inside += int(np.count_nonzero(S >= low[c:c + chunk, None]))
        self.dense_share = inside / (take.size * self.n)
        self.dense = self.dense_share >= _DENSE_SHARE
        if self.dense and self.cfg.select == "distance-weighted":
            self._XT = np.ascontiguousarray(self.X.T)  # for exact_cosine_rows

    def dense_block_rows(self):
        """Query rows per block of the dense path: a quarter of ``memory_mb`` for one block."""
        per = _DENSE_WEIGHTED_CELL_BYTES if self.cfg.select == "distance-weighted" else _DENSE_CELL_BYTES
        rows = self.memory_mb * 2 ** 20 // 4 // (per * self.n)
        if self.cfg.block_rows:
            rows = min(rows, self.cfg.block_rows)
        return int(max(1, min(self.n, rows)))

    def _dense_block(self, s, e, need_topk, picks):
        """Rows [s, e) against every row: duplicates of every row, candidates of the anchors.

        The same decisions as the search path: a faiss-free float32 product pre-selects the
        duplicate candidates (score >= ``duplicate_cosine`` - slack) and float64 cosines decide;
        the anchors' cosines with every row come from :func:`exact_cosine_rows`, bit for bit those
        of :func:`exact_cosine`.
        """
        X, lab = self.X, self.lab
        S = exact_scores(X, X[s:e])
        low = self.dup_cos - self.slack
        hit = np.flatnonzero(S.max(axis=1) >= low)  # most rows have no duplicate candidate
        qi, cj = np.nonzero(S[hit] >= low)
        qr, cj = s + hit[qi].astype(np.int64), cj.astype(np.int64)
        other = lab[cj] != lab[qr]
        qr, cj = qr[other], cj[other]
        dup_q, dup_c = qr[:0], cj[:0]
        if qr.size:
            cos = exact_cosine(X, qr, cj)
            dup = cos > self.dup_cos
            if dup.any():
                dup_q, dup_c = qr[dup], cj[dup]
                self.dups.append((np.minimum(dup_q, dup_c), np.maximum(dup_q, dup_c), cos[dup]))
        topk = None
        if need_topk:
            k = int(min(max(1, self.cfg.neighbours), self.n))
            D, I = self.index.search(X[s:e], k)
            topk = (D, I, self.index._bound(D, I, k))
        self.dense_rows += e - s
        A = self.anchor_of_row[s:e]
        local = np.flatnonzero(A >= 0)
        A = A[local]
        if not A.size:
            return topk
        if self.cfg.select == "distance-weighted":
            del S
            self._dense_weighted(A, picks)
        else:
            S = S[local] if local.size < S.shape[0] else S
            self._dense_ranked(A, S, dup_q, dup_c, picks)
        return topk

    def _pairs_of(self, A):
        """Pairs of anchors ``A``: (anchor number within A per pair, pair positions)."""
        npairs = self.plims[A + 1] - self.plims[A]
        seg = np.repeat(np.arange(A.size), npairs)
        return seg, np.repeat(self.plims[A], npairs) + _ragged(npairs)

    def _dense_bins(self):
        """Bins of the dense path: (count nb, scale) with nb bins of 1 - cosine over [0, 2]."""
        # Approximate bin values are off by at most a quarter of a bin: the float32 score's error
        # (slack), the float32 rounding of 1 - score and of the product with the scale, and the
        # float64 rounding of a distance threshold; with windows of three bins that is what keeps
        # every cell outside a window on its side of the decision (see _dense_ranked).
        err = self.slack + 3e-7 + 1e-12
        cap = int(2 * 0.25 / err)
        nb = int(max(2, min(16384, max(16, self.n // 2), cap)))
        return nb, nb / 2.0

    def _dense_ranked(self, A, S, dup_q, dup_c, picks):
        """Hard and semi-hard picks of anchors ``A`` (indices into ``self.anchors``) for ``hardest``
        and ``random``, from their float32 scores ``S`` against every row.

        Every row of an anchor gets a bin from its float32 score, ``trunc(min((1 - s) * scale,
        nb - 1))``; rows of the anchor's identity (and suspect duplicates when those are excluded)
        go to a last bin ``nb``. A bin value is off the exact one, (1 - cos) * scale, by at most a
        quarter of a bin (:meth:`_dense_bins`). Hence for a distance threshold t in bin b_t every
        row in a bin <= b_t - 2 is closer than t and every row in a bin >= b_t + 2 is not: the
        count of rows with d < t is the first count plus an exact count over the three bins
        b_t - 1 .. b_t + 1. Likewise the row at rank g in (distance, row) order among the valid
        rows, whose bin holds rank g, lies in the three bins around it, and every row outside
        them ranks wholly before or after it: sorting those three bins by exact distance finds it.
        Exact distances (float64 cosines of :func:`exact_cosine`) are computed only for the rows
        of these windows. The counts and ranks are those of the search path's sorted candidate
        list, so :func:`_choose` draws the same offsets and picks the same rows; the rows are
        sorted by bin only (a linear-time radix sort of int16 keys), never by distance.
        """
        n, lab = self.n, self.lab
        rows = self.anchors[A]
        m = rows.size
        nb, scale = self._dense_bins()
        v = np.subtract(np.float32(1.0), S, dtype=np.float32)
        del S
        v *= np.float32(scale)
        np.minimum(v, np.float32(nb - 1), out=v)
        bins = v.astype(np.int16)
        del v
        bins[lab[None, :] == lab[rows][:, None]] = nb  # sorted after every valid row
        if self.cfg.exclude_duplicates and dup_q.size:
            at = self.anchor_of_row[dup_q]
            where = np.searchsorted(A, at)
            ok = (at >= 0) & (where < A.size)
            ok[ok] = A[where[ok]] == at[ok]
            bins[where[ok], dup_c[ok]] = nb
        order = np.argsort(bins, axis=1, kind="stable")  # radix sort; rows ascending within a bin
        cum = np.zeros((m, nb + 2), dtype=np.int64)
        for i in range(m):
            np.cumsum(np.bincount(bins[i], minlength=nb + 1), out=cum[i, 1:])
        del bins

        def window(i, b):
            """Rows of bins b-1 .. b+1 of anchor i (per request): owner, columns, exact distances,
            and how many valid rows lie in the bins below the window."""
            lo = np.clip(b - 1, 0, nb)
            hi = np.clip(b + 2, 0, nb)
            start = cum[i, lo]
            L = cum[i, hi] - start
            owner = np.repeat(np.arange(i.size), L)
            cols = order[i[owner], np.repeat(start, L) + _ragged(L)]
            dv = _distance(exact_cosine(self.X, rows[i[owner]], cols), self.kind)
            return owner, cols, dv, start

        def bin_of_distance(t):
            return np.floor((t / 2.0 if self.kind == "squared" else t * t / 2.0) * scale).astype(np.int64)

        def n_below(seg, t):
            owner, _, dv, start = window(seg, bin_of_distance(t))
            return start + np.bincount(owner[dv < t[owner]], minlength=seg.size)

        seg, P = self._pairs_of(A)
        d_ap = self.d_ap[P]
        n_hard = n_below(seg, d_ap)
        n_band = n_below(seg, d_ap + self.margin)
        starts = (np.arange(m, dtype=np.int64)[:, None] * n + cum[:, :nb + 1]).ravel()
        base = seg * n
        for code in self.searched:
            rlo, rhi = (base, base + n_hard) if code == _HARD else (base + n_hard, base + n_band)
            self.without[REGIMES[code]] += int((rhi == rlo).sum())
            owner, idx = self._select(P, rlo, rhi, None, None, code)
            if not owner.size:
                continue
            # rank -> (anchor, bin holding it) -> its window, sorted by (distance, column)
            fb = np.searchsorted(starts, idx, side="right") - 1
            i, b = fb // (nb + 1), fb % (nb + 1)
            req, cols, dv, below = window(i, b)
            srt = np.lexsort((cols, dv, req))
            first = np.searchsorted(req[srt], np.arange(i.size), side="left")
            at = srt[first + (idx - i * n - below)]
            picks.append((P[owner], cols[at], dv[at], np.full(owner.size, code, dtype=np.int8)))

    def _dense_weighted(self, A, picks):
        """distance-weighted picks of anchors ``A``: every entry of a band needs its exact weight,
        so the anchors' float64 cosines with every row come from :func:`exact_cosine_rows` (bit
        for bit those of :func:`exact_cosine`); one pair slot (j-th pair of each anchor) at a
        time, and the draw of an entry hangs on its row, not on its place in the list."""
        lab = self.lab
        rows = self.anchors[A]
        cos = exact_cosine_rows(self.X, rows, self._XT)
        valid = lab[None, :] != lab[rows][:, None]
        if self.cfg.exclude_duplicates:
            valid &= ~(cos > self.dup_cos)
        d = _distance_inplace(cos, self.kind)
        del cos
        seg, P = self._pairs_of(A)
        slot = _ragged(np.bincount(seg, minlength=d.shape[0]))
        d_ap = self.d_ap[P]
        for code in self.searched:
            lo_t = np.full(P.size, -np.inf) if code == _HARD else d_ap
            hi_t = d_ap if code == _HARD else d_ap + self.margin
            for j in range(int(slot.max()) + 1 if slot.size else 0):
                w = np.flatnonzero(slot == j)
                i = seg[w]
                dj = d[i]
                mask = valid[i] & (dj >= lo_t[w, None]) & (dj < hi_t[w, None])
                oi, cols = np.nonzero(mask)
                dv = dj[oi, cols]
                del dj, mask
                L = np.bincount(oi, minlength=w.size)
                hi = np.cumsum(L)
                lo = hi - L
                self.without[REGIMES[code]] += int((L == 0).sum())
                logw = distance_log_weights(_euclidean(dv, self.kind), self.dim, self.cfg.weighted_cutoff)
                owner, idx = self._select(P[w], lo, hi, cols, logw, code)
                if owner.size:
                    picks.append((P[w][owner], cols[idx], dv[idx], np.full(owner.size, code, dtype=np.int8)))

    # -- recall of an approximate index ---------------------------------------------------------
    def recall(self):
        """Fraction of the exact hard and semi-hard candidates of sampled anchors the index finds."""
        cfg = self.cfg
        if not self.index.approximate or not self.anchors.size:
            return None, 0
        u = _uniform(self.k_recall, self.anchors)
        take = np.sort(np.argsort(u, kind="stable")[:cfg.recall_sample])
        counts = self.plims[take + 1] - self.plims[take]
        pairs = np.repeat(self.plims[take], counts) + _ragged(counts)
        # hard and semi-hard as requested; both when the run asks for easy only
        bound = self.d_ap[pairs] if self.searched == [_HARD] else self.d_ap[pairs] + self.margin
        thr = _cosine_at(bound, self.kind) - 1e-12
        found, relevant = estimate_recall(self.index, self.X, self.pair_a[pairs], thr, labels=self.lab,
                                          k=cfg.neighbours, memory_mb=self.memory_mb)
        if relevant == 0:
            warnings.warn("recall is undefined: the sampled anchors have no hard or semi-hard candidate "
                          "(reported as null)", TripletkitWarning, stacklevel=3)
            return None, 0
        return found / relevant, relevant

    # -- one block of query rows ---------------------------------------------------------------
    def block(self, s, e):
        """Mine anchors in rows [s, e); return the block's triplets as arrays, in output order."""
        cfg = self.cfg
        need_topk = _EASY in self.codes and cfg.select == "hardest"
        picks = []
        topk = None
        if self.dense:
            topk = self._dense_block(s, e, need_topk, picks)
        else:
            for sel, nb in self.index.within_pieces(self.X[s:e], self.thresholds[s:e], cfg.neighbours,
                                                    memory_mb=self.memory_mb, keep_topk=need_topk):
                if nb.topk is not None:
                    topk = nb.topk
                self.widened += nb.widened
                self._piece(s, sel, nb, picks)
        a0, a1 = np.searchsorted(self.anchors, [s, e])
        P = np.arange(self.plims[a0], self.plims[a1], dtype=np.int64)
        if _EASY in self.codes and P.size:
            self._easy(P, topk, s, picks)
        if not picks:
            return None
        pid = np.concatenate([p[0] for p in picks])
        neg = np.concatenate([p[1] for p in picks])
        d_an = np.concatenate([p[2] for p in picks])
        code = np.concatenate([p[3] for p in picks]).astype(np.int8)
        order = np.lexsort((neg, d_an, self.position[code], pid))
        pid, neg, d_an, code = pid[order], neg[order], d_an[order], code[order]
        d_ap = self.d_ap[pid]
        check = regime_codes(d_ap, d_an, self.margin)
        if not np.array_equal(check, code):  # an internal inconsistency, never user input
            raise RuntimeError("mined triplets disagree with the regime boundaries; please report this")
        violation = d_ap - d_an + self.margin
        self.active += int((violation > 0).sum())
        self.counts += np.bincount(code, minlength=len(REGIMES))
        return {"anchor": self.pair_a[pid], "positive": self.pair_p[pid], "negative": neg,
                "d_ap": d_ap.astype(np.float32), "d_an": d_an.astype(np.float32),
                "violation": violation.astype(np.float32), "regime": code}

    def _piece(self, s, sel, nb, picks):
        """Duplicates and hard/semi-hard picks from one piece of the candidate search."""
        qrow = s + np.repeat(sel, np.diff(nb.lims))
        r = nb.rows
        other = self.lab[r] != self.lab[qrow]
        qrow, r = qrow[other], r[other]
        cos = exact_cosine(self.X, qrow, r)
        dup = cos > self.dup_cos
        if dup.any():
            self.dups.append((np.minimum(qrow[dup], r[dup]), np.maximum(qrow[dup], r[dup]), cos[dup]))
        if not self.searched:
            return
        aidx = self.anchor_of_row[qrow]
        d = _distance(cos, self.kind)
        keep = aidx >= 0
        keep[keep] = d[keep] < self.radius[aidx[keep]]
        if self.cfg.exclude_duplicates:
            keep &= ~dup
        aidx, r, d = aidx[keep], r[keep], d[keep]
        order = np.lexsort((r, d, aidx))
        aidx, r, d = aidx[order], r[order], d[order]
        A = self.anchor_of_row[s + sel]
        A = A[A >= 0]
        if not A.size:
            return
        starts = np.searchsorted(aidx, A, side="left")
        ends = np.searchsorted(aidx, A, side="right")
        npairs = self.plims[A + 1] - self.plims[A]
        seg = np.repeat(np.arange(A.size), npairs)
        P = np.repeat(self.plims[A], npairs) + _ragged(npairs)
        lo, hi = starts[seg], ends[seg]
        d_ap = self.d_ap[P]
        n_hard = _count_below(d, lo, hi, d_ap)
        n_band = _count_below(d, lo, hi, d_ap + self.margin)
        logw = None
        if self.cfg.select == "distance-weighted":
            logw = distance_log_weights(_euclidean(d, self.kind), self.dim, self.cfg.weighted_cutoff)
        for code in self.searched:
            rlo, rhi = (lo, lo + n_hard) if code == _HARD else (lo + n_hard, lo + n_band)
            self.without[REGIMES[code]] += int((rhi == rlo).sum())
            owner, idx = self._select(P, rlo, rhi, r, logw, code)
            if owner.size:
                picks.append((P[owner], r[idx], d[idx], np.full(owner.size, code, dtype=np.int8)))

    def _select(self, P, lo, hi, rows, logw, code):
        """Choose up to ``npp`` candidates in each range ``[lo, hi)`` -> (pair position, index)."""
        return _choose(self.cfg.select, lo, hi, self.npp, (self.pair_a[P], self.pair_p[P], code),
                       (self.k_random, self.k_weight), rows, logw)

    # -- easy negatives --------------------------------------------------------------------------
    def _easy(self, P, topk, s, picks):
        policy = self.cfg.select
        k = self.npp
        taken = np.full((P.size, k), -1, dtype=np.int64)
        others = self.n - self.sizes[self.lab[self.pair_a[P]]]
        if policy == "random":
            taken = self._easy_rejection(P, others)
            todo = ((taken >= 0).sum(axis=1) < k) & (others > 0)
        elif policy == "hardest":
            taken, settled = self._easy_from_topk(P, topk, s)
            todo = ~settled & (others > 0)
            taken[todo] = -1
        else:
            todo = others > 0
        if todo.any():
            idx = np.flatnonzero(todo)
            taken[idx] = self._easy_scan(P[idx], taken[idx])
            self.easy_scanned += int(idx.size)
        got = (taken >= 0).sum(axis=1)
        self.without["easy"] += int((got == 0).sum())
        owner, col = np.nonzero(taken >= 0)
        if owner.size:
            neg = taken[owner, col]
            d = _distance(exact_cosine(self.X, self.pair_a[P[owner]], neg), self.kind)
            picks.append((P[owner], neg, d, np.full(owner.size, _EASY, dtype=np.int8)))

    def _other_row(self, la, j):
        """The j-th row (in label order) among rows whose label is not ``la``."""
        st = self.label_start[la]
        g = np.where(j < st, j, j + self.sizes[la])
        return self.by_label[g]

    def _easy_rejection(self, P, others):
        """Uniform easy negatives without replacement by rejection sampling (unfilled: -1)."""
        k = self.npp
        a, p = self.pair_a[P], self.pair_p[P]
        la = self.lab[a]
        bound = self.d_ap[P] + self.margin
        taken = np.full((P.size, k), -1, dtype=np.int64)
        filled = np.zeros(P.size, dtype=np.int64)
        for rnd in range(_EASY_ROUNDS):
            act = np.flatnonzero((filled < k) & (others > 0))
            if not act.size:
                break
            slots = k * 2 ** (rnd + 1)
            u = _uniform(self.k_easy, a[act, None], p[act, None], rnd, np.arange(slots)[None, :])
            j = np.minimum((u * others[act, None]).astype(np.int64), others[act, None] - 1)
            cand = self._other_row(la[act, None], j)
            cos = exact_cosine(self.X, np.repeat(a[act], slots), cand.ravel()).reshape(cand.shape)
            ok = _distance(cos, self.kind) >= bound[act, None]
            if self.cfg.exclude_duplicates:
                ok &= ~(cos > self.dup_cos)
            ok &= ~(cand[:, :, None] == taken[act][:, None, :]).any(axis=2)
            # keep only the first proposal of a row within this round (sampling without replacement)
            srt = np.argsort(cand, axis=1, kind="stable")
            cs = np.take_along_axis(cand, srt, axis=1)
            first_sorted = np.ones(cand.shape, dtype=bool)
            first_sorted[:, 1:] = cs[:, 1:] != cs[:, :-1]
            first = np.empty_like(first_sorted)
            np.put_along_axis(first, srt, first_sorted, axis=1)
            ok &= first
            c = np.cumsum(ok, axis=1)
            room = k - filled[act]
            take = ok & (c <= room[:, None])
            ti, tj = np.nonzero(take)
            taken[act[ti], filled[act[ti]] + c[ti, tj] - 1] = cand[ti, tj]
            filled[act] += take.sum(axis=1)
        return taken

    def _easy_from_topk(self, P, topk, s):
        """Nearest easy negatives from the first top-k, and whether the top-k provably holds them."""
        k = self.npp
        D, I, bound = topk
        a = self.pair_a[P]
        q = a - s
        cand = I[q]
        valid = (cand >= 0)
        valid[valid] = self.lab[cand[valid]] != np.repeat(self.lab[a], valid.sum(axis=1))
        pi, cj = np.nonzero(valid)
        rows = cand[pi, cj]
        cos = exact_cosine(self.X, a[pi], rows)
        d = _distance(cos, self.kind)
        ok = d >= self.d_ap[P][pi] + self.margin
        if self.cfg.exclude_duplicates:
            ok &= ~(cos > self.dup_cos)
        pi, rows, d, cos = pi[ok], rows[ok], d[ok], cos[ok]
        order = np.lexsort((rows, d, pi))
        pi, rows, cos = pi[order], rows[order], cos[order]
        first = _rank_in_groups(pi) < k
        pi, rows, cos = pi[first], rows[first], cos[first]
        taken = np.full((P.size, k), -1, dtype=np.int64)
        col = _rank_in_groups(pi)
        taken[pi, col] = rows
        got = np.bincount(pi, minlength=P.size)
        last = np.full(P.size, np.inf)
        if pi.size:
            # rows are in (pair, distance) order: the last of each pair is its farthest choice
            end = np.ones(pi.size, dtype=bool)
            end[:-1] = pi[1:] != pi[:-1]
            last[pi[end]] = cos[end]
        b = bound[q]
        settled = np.isneginf(b) | ((got == k) & (last > b))
        return taken, settled

    def _easy_scan(self, P, taken):
        """Exact easy negatives for pairs ``P`` by scanning every row (``taken`` rows are kept)."""
        k = self.npp
        n = self.n
        out = taken.copy()
        policy = self.cfg.select
        # half the budget for the (pairs, n) scores, masks, keys and hash temporaries (~64 bytes a cell)
        chunk = int(max(1, min(4096, self.memory_mb * 2 ** 20 // (128 * n))))
        cols = np.arange(n, dtype=np.int64)
        for c0 in range(0, P.size, chunk):
            Pc = P[c0:c0 + chunk]
            tk = out[c0:c0 + chunk]
            a, p = self.pair_a[Pc], self.pair_p[Pc]
            ua, inv = np.unique(a, return_inverse=True)
            S = exact_scores(self.X, self.X[ua])[inv]
            bound = self.d_ap[Pc] + self.margin
            valid = self.lab[None, :] != self.lab[a][:, None]
            valid &= self._refined(S, a, _cosine_at(bound, self.kind),
                                   lambda cos, i: _distance(cos, self.kind) >= bound[i])
            if self.cfg.exclude_duplicates:
                dup_thr = np.full(Pc.size, self.dup_cos)
                valid &= ~self._refined(S, a, dup_thr, lambda cos, i: cos > self.dup_cos, above=True)
            ti, tj = np.nonzero(tk >= 0)
            valid[ti, tk[ti, tj]] = False
            need = k - (tk >= 0).sum(axis=1)
            if policy == "random":
                key = _uniform(self.k_scan, a[:, None], p[:, None], cols[None, :])
            elif policy == "hardest":
                key = S.astype(np.float64)
            else:
                d32 = _distance(S.astype(np.float64), self.kind)
                key = (distance_log_weights(_euclidean(d32, self.kind), self.dim, self.cfg.weighted_cutoff)
                       + _gumbel(_uniform(self.k_weight, a[:, None], p[:, None], _EASY, cols[None, :])))
            key = np.where(valid, key, -np.inf)
            del S
            m = min(k, n)
            top = np.argpartition(-key, m - 1, axis=1)[:, :m]
            tkey = np.take_along_axis(key, top, axis=1)
            if policy == "hardest":
                chosen = self._exact_hardest(a, key, tkey, need)
            else:
                order = np.argsort(-tkey, axis=1, kind="stable")
                top, tkey = np.take_along_axis(top, order, axis=1), np.take_along_axis(tkey, order, axis=1)
                ok = np.isfinite(tkey) & (np.arange(m)[None, :] < need[:, None])
                chosen = np.where(ok, top, -1)
            # rows already taken first, then the new choices; -1 padding last
            comb = np.concatenate([tk, chosen], axis=1)
            order = np.argsort(comb < 0, axis=1, kind="stable")
            tk = np.take_along_axis(comb, order, axis=1)[:, :k]
            out[c0:c0 + chunk] = tk
        return out

    def _refined(self, S, a, thr, exact_test, above=False):
        """Boolean (pairs, rows): score below ``thr`` (or above it, ``above=True``), with entries
        within the float32 slack of the threshold decided by ``exact_test`` on float64 cosines."""
        lo = (thr - self.slack)[:, None]
        hi = (thr + self.slack)[:, None]
        res = (S > hi) if above else (S < lo)
        unsure = (S >= lo) & (S <= hi)
        ui, uj = np.nonzero(unsure)
        if ui.size:
            cos = exact_cosine(self.X, a[ui], uj)
            res[ui, uj] = exact_test(cos, ui)
        return res

    def _exact_hardest(self, a, key, tkey, need):
        """The ``need`` valid rows of smallest exact distance per pair (ties by row position).

        float32 order is trusted only outside the slack band: every valid row within 2 * slack of
        the need-th best float32 score is re-ranked by its exact distance (a row below that has
        an exact cosine below at least ``need`` others).
        """
        k = tkey.shape[1]
        out = np.full((a.size, k), -1, dtype=np.int64)
        srt = -np.sort(-tkey, axis=1)
        kth = srt[np.arange(a.size), np.clip(need - 1, 0, k - 1)]
        cut = kth - 2 * self.slack
        pi, rj = np.nonzero(np.isfinite(key) & (key >= cut[:, None]) & (need[:, None] > 0))
        if not pi.size:
            return out
        d = _distance(exact_cosine(self.X, a[pi], rj), self.kind)
        order = np.lexsort((rj, d, pi))
        pi, rj = pi[order], rj[order]
        rank = _rank_in_groups(pi)
        keep = rank < need[pi]
        out[pi[keep], rank[keep]] = rj[keep]
        return out

    # -- duplicates ------------------------------------------------------------------------------
    def duplicate_pairs(self):
        """Unique unordered suspect pairs (row_a < row_b) and their cosines, most similar first."""
        if not self.dups:
            return np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.float64)
        i = np.concatenate([d[0] for d in self.dups])
        j = np.concatenate([d[1] for d in self.dups])
        c = np.concatenate([d[2] for d in self.dups])
        _, first = np.unique(i * np.int64(self.n) + j, return_index=True)
        i, j, c = i[first], j[first], c[first]
        order = np.lexsort((j, i, -c))
        return i[order], j[order], c[order]


# ---------------------------------------------------------------------------------------------
# output
# ---------------------------------------------------------------------------------------------
def _arrow_type(values):
    return pa.string() if values.dtype == object else pa.int64()


def _arrow(values, typ):
    if typ == pa.string():
        return pa.array(values, type=pa.string())
    return pa.array(np.asarray(values, dtype=np.int64), type=pa.int64())


class _TripletWriter:
    """Buffers triplet arrays and writes fixed-size row groups to a ParquetWriter."""

    def __init__(self, path, table, metadata):
        self.t = table
        self.id_type = _arrow_type(table.ids)
        self.label_type = _arrow_type(table.label_values)
        self.schema = triplet_schema(self.id_type, self.label_type, metadata)
        self.writer = pq.ParquetWriter(str(path), self.schema, **PARQUET_WRITE) if path else None
        self.buffer, self.buffered = [], 0

    def add(self, arrays):
        if self.writer is None:
            return
        t = self.t
        lab = t.labels
        cols = [
            _arrow(t.ids[arrays["anchor"]], self.id_type),
            _arrow(t.ids[arrays["positive"]], self.id_type),
            _arrow(t.ids[arrays["negative"]], self.id_type),
            _arrow(t.label_values[lab[arrays["anchor"]]], self.label_type),
            _arrow(t.label_values[lab[arrays["negative"]]], self.label_type),
            pa.array(arrays["d_ap"], type=pa.float32()),
            pa.array(arrays["d_an"], type=pa.float32()),
            pa.array(arrays["violation"], type=pa.float32()),
            pa.DictionaryArray.from_arrays(pa.array(arrays["regime"], type=pa.int8()),
                                           pa.array(list(REGIMES), type=pa.string())),
        ]
        self.buffer.append(pa.Table.from_arrays(cols, schema=self.schema))
        self.buffered += len(arrays["anchor"])
        while self.buffered >= _ROW_GROUP_ROWS:
            self._flush(_ROW_GROUP_ROWS)

    def _flush(self, rows):
        whole = pa.concat_tables(self.buffer)
        head = whole.slice(0, rows).combine_chunks()
        self.writer.write_table(head, row_group_size=rows)
        rest = whole.slice(rows)
        self.buffer = [rest] if rest.num_rows else []
        self.buffered = rest.num_rows

    def close(self):
        if self.writer is None:
            return
        if self.buffered:
            self._flush(self.buffered)
        self.writer.close()
        self.writer = None


def triplet_schema(id_type=pa.int64(), label_type=pa.int64(), metadata=None):
    """The Arrow schema of a triplet table (DESIGN.md), with optional key-value metadata."""
    fields = [pa.field("anchor", id_type, nullable=False), pa.field("positive", id_type, nullable=False),
              pa.field("negative", id_type, nullable=False),
              pa.field("anchor_label", label_type, nullable=False),
              pa.field("negative_label", label_type, nullable=False),
              pa.field("d_ap", pa.float32(), nullable=False), pa.field("d_an", pa.float32(), nullable=False),
              pa.field("violation", pa.float32(), nullable=False),
              pa.field("regime", pa.dictionary(pa.int8(), pa.string()), nullable=False)]
    return pa.schema(fields, metadata=metadata)


def _write_duplicates(path, table, i, j, c, metadata):
    id_type, label_type = _arrow_type(table.ids), _arrow_type(table.label_values)
    lab = table.labels
    schema = pa.schema([pa.field("id_a", id_type, nullable=False), pa.field("id_b", id_type, nullable=False),
                        pa.field("label_a", label_type, nullable=False),
                        pa.field("label_b", label_type, nullable=False),
                        pa.field("cosine", pa.float64(), nullable=False)], metadata=metadata)
    cols = [_arrow(table.ids[i], id_type), _arrow(table.ids[j], id_type),
            _arrow(table.label_values[lab[i]], label_type), _arrow(table.label_values[lab[j]], label_type),
            pa.array(c, type=pa.float64())]
    pq.write_table(pa.Table.from_arrays(cols, schema=schema), str(path), **PARQUET_WRITE)


def _metadata(cfg, table, index, recall, extra=None):
    values = {
        "margin": cfg.margin, "distance": cfg.distance, "regimes": list(cfg.regimes), "select": cfg.select,
        "index": index.kind, "index_params": index.params, "seed": cfg.seed, "rows": table.n,
        "fingerprint": table.fingerprint, "recall": recall, "version": _version(),
        "options": {f.name: (list(v) if isinstance(v := getattr(cfg, f.name), tuple) else v)
                    for f in dataclasses.fields(cfg)},
    }
    values.update(extra or {})
    return {f"{_META}{k}": json.dumps(v, sort_keys=True) for k, v in values.items()}


def _version():
    from . import __version__

    return __version__


# ---------------------------------------------------------------------------------------------
# the public entry point
# ---------------------------------------------------------------------------------------------
def _config(config, options):
    if config is None:
        config = MiningConfig()
    elif not isinstance(config, MiningConfig):
        raise TripletkitError(f"config must be a MiningConfig (or None), got {type(config).__name__}")
    if isinstance(options.get("regimes"), str):
        options = {**options, "regimes": (options["regimes"],)}
    return override(config, **options)


def mine(source, out=None, *, config=None, force=False, quiet=False, return_triplets=False, compute=None,
         table_options=None, **options):
    """Mine easy, semi-hard and hard triplets from an embedding table.

    Parameters
    ----------
    source : str, Path, EmbeddingTable or (ids, labels, embeddings) tuple
        The embeddings of the training set (see :func:`tripletkit.table.as_table`).
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
        (:func:`tripletkit.distributed.mine_on_cluster`): ``source`` must be a Parquet path the
        workers can read, and ``out`` becomes a folder of part files; same triplets.
    table_options : dict, optional
        Column names and ``drop_invalid`` for reading a path ``source`` (see
        :meth:`EmbeddingTable.read`).
    **options
        Override fields of ``config`` (validated like config keys), e.g. ``margin=0.3``,
        ``regimes=("hard",)``, ``select="hardest"``.

    Returns
    -------
    MiningSummary

    Notes
    -----
    Output rows are ordered by anchor row position, then positive row position, then regime in
    the order of ``regimes``, then d_an and negative row position. Metadata keys (JSON values):
    ``tripletkit.margin``, ``.distance``, ``.regimes``, ``.select``, ``.index``,
    ``.index_params``, ``.seed``, ``.rows`` (input rows), ``.fingerprint`` (of the input),
    ``.recall``, ``.version``, ``.options`` (every mining option).

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> X = rng.standard_normal((60, 8)); y = np.repeat(np.arange(6), 10)
    >>> s = mine((np.arange(60), y, X), regimes=("hard",), select="hardest", quiet=True)
    >>> s.to_dict()["index"]
    'exact'
    """
    t0 = time.perf_counter()
    cfg = _config(config, options)
    if compute is not None and compute.scheduler is not None:
        from .engines.dask import mine_on_cluster  # its output is a folder, checked there

        return mine_on_cluster(source, out, config=cfg, compute=compute, force=force, quiet=quiet,
                               return_triplets=return_triplets, table_options=table_options)
    if out is not None:
        out = Path(out)
        dup_out = duplicates_path(out)
        check_output(out, force=force)
        check_output(dup_out, force=force)
        src = source_path(source)
        if src is not None and Path(src).resolve() in (out.resolve(), dup_out.resolve()):
            raise TripletkitError(f"output {str(out)!r} would overwrite the input table; choose another --out")
    table = as_table(source, **(table_options or {}))
    _guard_memory(table, cfg, return_triplets)
    # The triplet table and its duplicate report are published together or not at all.
    with atomic_paths([] if out is None else [out, dup_out], force=force) as tmps:
        tmp_out, tmp_dup = tmps or (None, None)
        summary = _mine_table(table, cfg, tmp_out, tmp_dup, quiet=quiet, return_triplets=return_triplets)
    summary.seconds = time.perf_counter() - t0
    if out is not None:
        summary.out, summary.duplicates_out = str(out), str(dup_out)
    return summary


def _guard_memory(table, cfg, return_triplets):
    """Refuse, with a suggestion, a run whose index and blocks would not fit in memory."""
    from ._memory import estimate_and_guard, mining_bytes

    n, d = table.n, table.dim
    need = mining_bytes(n, d, cfg.block_rows, cfg.neighbours, cfg.index, exact_below=cfg.exact_below,
                        hnsw_m=cfg.hnsw_m, ivf_nlist=cfg.ivf_nlist, memory_mb=cfg.memory_mb,
                        positives_per_anchor=cfg.positives_per_anchor,
                        triplets=n * cfg.positives_per_anchor * cfg.negatives_per_positive * len(cfg.regimes)
                        if return_triplets else 0)
    # The table is already loaded: its matrix is no longer part of what must still fit.
    estimate_and_guard(f"mining {n:,} x {d} rows", max(0, need - n * d * 4),
                       suggestion="lower --memory-mb or --block-rows, or use --index ivf")


def _mine_table(table, cfg, tmp_out, tmp_dup, *, quiet=False, return_triplets=False, build=build_index,
                writer_class=None):
    """The body of :func:`mine` on a validated table, writing to paths that already are temporary.

    ``build`` makes the search index (:func:`tripletkit.index.build_index` or one of the same
    signature) and ``writer_class(path, table, metadata)`` the triplet writer (default
    :class:`_TripletWriter`); ``tripletkit.distributed`` passes its own.
    """
    t0 = time.perf_counter()
    if cfg.select == "distance-weighted" and table.dim < 2:
        raise TripletkitError(f"select = distance-weighted needs embeddings of dimension >= 2, got {table.dim}")
    kind = resolve_kind(cfg.index, table.n, cfg.exact_below)
    with faiss_threads(cfg.threads):
        index = build(table.embeddings, kind, nlist=cfg.ivf_nlist, nprobe=cfg.ivf_nprobe,
                      hnsw_m=cfg.hnsw_m, ef_search=cfg.hnsw_ef_search,
                      ef_construction=cfg.hnsw_ef_construction, seed=cfg.seed)
        miner = _Miner(table, cfg, index)
        _warn_degenerate(miner)
        recall, relevant = miner.recall()
        meta = _metadata(cfg, table, index, recall)
        collected = [] if return_triplets else None
        with contextlib.ExitStack() as stack:
            writer = (writer_class or _TripletWriter)(tmp_out, table, meta)
            stack.callback(_close_quietly, writer)
            n = table.n
            if miner.dense:
                block = miner.dense_block_rows()
            else:
                block = query_block_rows(n, min(cfg.neighbours, n), cfg.memory_mb, cfg.block_rows)
            plan = getattr(index, "plan", None)
            if plan is not None:  # an index that searches ahead of the blocks (tripletkit.distributed)
                plan(miner.X, miner.thresholds, block)
            bar = tqdm(total=n, desc="mine", unit="row", file=sys.stderr, leave=False,
                       disable=quiet or not _is_tty(sys.stderr))
            with bar:
                for s in range(0, n, block):
                    e = min(n, s + block)
                    arrays = miner.block(s, e)
                    if arrays is not None:
                        writer.add(arrays)
                        if collected is not None:
                            collected.append(arrays)
                    bar.update(e - s)
            writer.close()
            di, dj, dc = miner.duplicate_pairs()
            if tmp_dup is not None:
                _write_duplicates(tmp_dup, table, di, dj, dc,
                                  _metadata(cfg, table, index, recall, {"duplicate_cosine": cfg.duplicate_cosine}))
    total = int(miner.counts.sum())
    if total == 0 and miner.anchors.size and table.n_identities > 1:
        warnings.warn("no triplet was mined (see pairs_without_negative); active_fraction is null",
                      TripletkitWarning, stacklevel=3)
    summary = MiningSummary(
        n_triplets=total,
        anchors=int(miner.anchors.size),
        regimes={r: int(miner.counts[REGIMES.index(r)]) for r in cfg.regimes},
        active_fraction=(miner.active / total) if total else None,
        pairs_without_negative=dict(miner.without),
        singletons_skipped=miner.singletons,
        suspect_duplicates=int(di.size),
        index=index.kind,
        recall=recall,
        seconds=time.perf_counter() - t0,
        triplets=_gather(collected, table) if return_triplets else None,
        details={"pairs": int(miner.pair_a.size), "widened_queries": miner.widened,
                 "easy_scanned_pairs": miner.easy_scanned, "index_params": index.params,
                 "recall_relevant": relevant, "dense_rows": miner.dense_rows,
                 "dense_share": miner.dense_share},
    )
    return summary


def _close_quietly(writer):
    with contextlib.suppress(Exception):
        if writer.writer is not None:
            writer.writer.close()


def _is_tty(stream):
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False


def _warn_degenerate(miner):
    if not miner.anchors.size:
        warnings.warn("no identity has two rows, so there is no anchor; nothing will be mined",
                      TripletkitWarning, stacklevel=4)
    elif miner.t.n_identities < 2:
        warnings.warn("the table has a single identity, so there are no negatives; nothing will be mined",
                      TripletkitWarning, stacklevel=4)


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
