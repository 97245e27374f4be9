"""The plan of a mining run: everything decided before the first block of rows is mined.

From the table and the options, :func:`make_plan` draws the anchors (rows of identities with at
least two rows, optionally capped per identity) and their positives, computes the anchor-positive
distances, each anchor's search radius and cosine threshold, the random streams, the candidate
path (index search, or dense products on a poorly separated table) and the block size. Blocks of
query rows are then independent of each other given the plan. :func:`mining_bytes` estimates the
memory the run will ask for, which the memory guard checks before anything is built.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from .._validate import whole_number
from .cosines import cosine_chunk_pairs, exact_cosine, exact_scores
from .index import resolve_kind
from .regimes import EASY, REGIMES, SEMI_HARD, cosine_at, distance_from_cosine
from .select import floyd, rank_in_groups, ragged, uniform

if TYPE_CHECKING:
    from ..config import MiningConfig

__all__ = ["Plan", "Streams", "make_plan", "query_threshold", "DENSE_SHARE", "query_block_rows", "dense_block_rows",
           "mining_bytes"]

#: The dense path is taken (with an exact index) when the sampled anchors' search bands hold at
#: least this share of the table on average. The two paths cost the same at about 2% (d = 16) and
#: 1% (d = 128) (docs/benchmarks_mining.md, section 4); 3% takes the dense path only where it is
#: clearly faster.
DENSE_SHARE = 0.03
# Anchors sampled (evenly spaced) to estimate the band share.
_DENSE_SAMPLE = 256
# Peak bytes per (row, column) cell of a dense block: float32 scores, float64 cosines and their
# product buffer, distances, the int16 bins, their int64 sort order, masks. distance-weighted
# also holds per-entry draw state (hash counters, keys, noise) for one pair slot at a time.
_DENSE_CELL_BYTES = 56
_DENSE_WEIGHTED_CELL_BYTES = 216
# Float64 rounding margin of a query threshold below the exact cosine of its radius.
_THRESHOLD_MARGIN = 1e-12
_MB = 2**20
# Bytes of bookkeeping per neighbour of a search block (the rule of query_block_rows).
_BYTES_PER_NEIGHBOUR = 64
# Per-row state of the run (ids, label codes, positions, counters: a few int64 arrays).
_BYTES_PER_ROW = 48
# One stored triplet when they are returned as arrays: 3 positions and 3 ids (int64), 3 float32,
# an int8 regime and two labels.
_BYTES_PER_TRIPLET = 80


@dataclass(frozen=True)
class Streams:
    """Keys of the run's counter-based random streams, one per kind of draw."""

    anchors: np.uint64
    positives: np.uint64
    random: np.uint64  # random selection of hard and semi-hard negatives
    weighted: np.uint64  # the noise of distance-weighted selection
    easy: np.uint64  # easy negatives by rejection sampling
    scan: np.uint64  # random easy negatives of the exact scan
    recall: np.uint64  # anchors sampled for the recall estimate

    @classmethod
    def from_seed(cls, seed):
        """The keys drawn from ``np.random.default_rng(seed)`` (eight are drawn; one is spare)."""
        keys = np.random.default_rng(seed).integers(0, 2 ** 63 - 1, size=8, dtype=np.int64).astype(np.uint64)
        return cls(*keys[:7])


@dataclass(frozen=True, eq=False)
class Plan:
    """What every block of a mining run reads (built by :func:`make_plan`; arrays are not copied).

    Attributes
    ----------
    config : MiningConfig
    embeddings : ndarray of float32, shape (n, d)
        The table's unit rows.
    labels : ndarray of int64, shape (n,)
        Identity codes.
    distance : str
    margin, duplicate_cosine : float
    negatives_per_positive, memory_mb : int
    slack : float
        Bound on the error of the index's float32 scores.
    regime_order : tuple of int
        Codes of the requested regimes, in the order of ``config.regimes``.
    searched : tuple of int
        The codes of ``regime_order`` found by the candidate search (hard, semi-hard).
    regime_position : ndarray of int64, shape (3,)
        Position of each regime code in ``regime_order`` (the output order within a pair).
    streams : Streams
    identity_sizes, rows_by_label, label_start : ndarray of int64
        Rows per identity; rows sorted by identity (stable); where each identity starts there.
    singletons : int
        Rows of identities with one row (never anchors).
    anchors : ndarray of int64
        Anchor rows, ascending.
    anchor_of_row : ndarray of int64, shape (n,)
        Anchor number of each row (-1: not an anchor).
    pair_owner, pair_anchors, pair_positives : ndarray of int64
        Per (anchor, positive) pair: the anchor's number, its row and the positive's row; pairs
        are sorted by anchor, then positive.
    pair_limits : ndarray of int64
        The pairs of anchor ``i`` are ``pair_limits[i]:pair_limits[i + 1]``.
    d_ap : ndarray of float64
        Anchor-positive distance of each pair.
    radius : ndarray of float64
        Per anchor, the largest distance its hard or semi-hard negatives can have.
    thresholds : ndarray of float64, shape (n,)
        Per row, the cosine above which the search must return every row: the duplicate
        threshold, lowered to the radius for anchors.
    dense : bool
        Whether the run takes the dense path.
    dense_share : float or None
        The sampled share of the table inside the anchors' bands (None: not sampled).
    transposed : ndarray of float32 or None
        ``embeddings.T`` (C-contiguous), for the dense path of distance-weighted selection.
    block_rows : int
        Query rows per block.
    """

    config: MiningConfig
    embeddings: np.ndarray
    labels: np.ndarray
    distance: str
    margin: float
    negatives_per_positive: int
    duplicate_cosine: float
    memory_mb: int
    slack: float
    regime_order: tuple
    searched: tuple
    regime_position: np.ndarray
    streams: Streams
    identity_sizes: np.ndarray
    rows_by_label: np.ndarray
    label_start: np.ndarray
    singletons: int
    anchors: np.ndarray
    anchor_of_row: np.ndarray
    pair_owner: np.ndarray
    pair_anchors: np.ndarray
    pair_positives: np.ndarray
    pair_limits: np.ndarray
    d_ap: np.ndarray
    radius: np.ndarray
    thresholds: np.ndarray
    dense: bool
    dense_share: float | None
    transposed: np.ndarray | None
    block_rows: int

    @property
    def n(self):
        """Rows of the table."""
        return self.embeddings.shape[0]

    @property
    def dim(self):
        """Dimension of the embeddings."""
        return self.embeddings.shape[1]

    def pairs_of(self, anchor_numbers):
        """The pairs of anchors ``anchor_numbers``: (position of the anchor in the argument per
        pair, pair numbers), in anchor order."""
        counts = self.pair_limits[anchor_numbers + 1] - self.pair_limits[anchor_numbers]
        owner = np.repeat(np.arange(anchor_numbers.size), counts)
        return owner, np.repeat(self.pair_limits[anchor_numbers], counts) + ragged(counts)


def make_plan(table, config, index, *, dense=None):
    """The plan of mining ``table`` with ``config`` and the search index ``index``.

    Parameters
    ----------
    table : EmbeddingTable
    config : MiningConfig
        Validated options.
    index : SearchIndex
        The candidate index (its ``kind``, ``slack`` and whether it searches ahead, ``plan``).
    dense : bool, optional
        Force the dense path (True) or the index search (False) where the dense path applies (an
        exact index in this process, hard or semi-hard requested, anchors and two identities);
        None chooses from the sampled band share (:data:`DENSE_SHARE`).

    Returns
    -------
    Plan
    """
    labels = table.labels
    regime_order = tuple(REGIMES.index(r) for r in config.regimes)
    searched = tuple(c for c in regime_order if c != EASY)
    position = np.zeros(len(REGIMES), dtype=np.int64)
    position[list(regime_order)] = np.arange(len(regime_order))
    streams = Streams.from_seed(config.seed)
    sizes = table.identity_sizes()
    rows_by_label = np.argsort(labels, kind="stable")
    label_start = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64)
    anchors, singletons = _draw_anchors(labels, sizes, config.max_per_identity, streams.anchors)
    pair_owner, pair_positives = _draw_positives(labels, sizes, rows_by_label, label_start, anchors,
                                                 config.positives_per_anchor, streams.positives)
    pair_anchors = anchors[pair_owner]
    pair_limits = np.zeros(anchors.size + 1, dtype=np.int64)
    np.cumsum(np.bincount(pair_owner, minlength=anchors.size), out=pair_limits[1:])
    d_ap = distance_from_cosine(exact_cosine(table.embeddings, pair_anchors, pair_positives), config.distance)
    radius, thresholds = _radii_and_thresholds(d_ap, pair_owner, anchors, table.n, searched, config)
    eligible = (index.kind == "exact" and getattr(index, "plan", None) is None and bool(searched)
                and bool(anchors.size) and table.n_identities >= 2)
    share = None
    if eligible and dense is None:
        share = _band_share(table.embeddings, anchors, thresholds, index.slack, int(config.memory_mb))
        dense = share >= DENSE_SHARE
    dense = bool(eligible and dense)
    transposed = None
    if dense and config.select == "distance-weighted":
        transposed = np.ascontiguousarray(table.embeddings.T)  # for exact_cosine_rows
    if dense:
        block = dense_block_rows(table.n, config.select, int(config.memory_mb), config.block_rows)
    else:
        block = query_block_rows(table.n, min(config.neighbours, table.n), config.memory_mb, config.block_rows)
    return Plan(
        config=config, embeddings=table.embeddings, labels=labels, distance=config.distance,
        margin=float(config.margin), negatives_per_positive=int(config.negatives_per_positive),
        duplicate_cosine=float(config.duplicate_cosine), memory_mb=int(config.memory_mb), slack=index.slack,
        regime_order=regime_order, searched=searched, regime_position=position, streams=streams,
        identity_sizes=sizes, rows_by_label=rows_by_label, label_start=label_start, singletons=singletons,
        anchors=anchors, anchor_of_row=_numbering(anchors, table.n), pair_owner=pair_owner,
        pair_anchors=pair_anchors, pair_positives=pair_positives, pair_limits=pair_limits, d_ap=d_ap,
        radius=radius, thresholds=thresholds, dense=dense, dense_share=share, transposed=transposed,
        block_rows=block)


def _draw_anchors(labels, sizes, max_per_identity, key):
    """Anchor rows (ascending) and the number of singleton rows.

    Every row of an identity with two or more rows, or ``max_per_identity`` of them drawn
    uniformly per identity (rows ranked by a uniform draw at their position).
    """
    eligible = sizes[labels] >= 2
    rows = np.flatnonzero(eligible)
    if max_per_identity is not None and rows.size:
        u = uniform(key, rows)
        order = np.lexsort((rows, u, labels[rows]))
        ranked = rows[order]
        keep = rank_in_groups(labels[ranked]) < max_per_identity
        rows = np.sort(ranked[keep])
    return rows.astype(np.int64), int((~eligible).sum())


def _draw_positives(labels, sizes, rows_by_label, label_start, anchors, per_anchor, key):
    """Up to ``per_anchor`` positives per anchor, drawn with :func:`floyd` among the anchor's
    identity-mates (its own position skipped) -> (anchor number, positive row) per pair, sorted."""
    n = labels.size
    rank_in_label = np.empty(n, dtype=np.int64)
    rank_in_label[rows_by_label] = np.arange(n) - label_start[labels[rows_by_label]]
    anchor_labels = labels[anchors]
    offsets = floyd(sizes[anchor_labels] - 1, per_anchor, key, anchors)
    owner, col = np.nonzero(offsets >= 0)
    offset = offsets[owner, col]
    offset = offset + (offset >= rank_in_label[anchors[owner]])
    positives = rows_by_label[label_start[anchor_labels[owner]] + offset]
    order = np.lexsort((positives, owner))
    return owner[order].astype(np.int64), positives[order].astype(np.int64)


def _radii_and_thresholds(d_ap, pair_owner, anchors, n, searched, config):
    """Per anchor the loosest bound of its pairs (``d_ap + margin`` with semi-hard requested, else
    ``d_ap``), and per row its query threshold (the duplicate cosine, the radius for anchors)."""
    bound = d_ap + float(config.margin) if SEMI_HARD in searched else d_ap
    radius = np.full(anchors.size, -np.inf)
    if searched and anchors.size:
        np.maximum.at(radius, pair_owner, bound)
    thresholds = np.full(n, float(config.duplicate_cosine), dtype=np.float64)
    if searched and anchors.size:
        thresholds[anchors] = np.minimum(thresholds[anchors], query_threshold(radius, config.distance))
    return radius, thresholds


def query_threshold(bound, distance):
    """The cosine a search must go down to so that it returns every row closer than ``bound``.

    Just below the exact cosine of the bound (by 1e-12), so that float64 rounding cannot drop a
    row.
    """
    return cosine_at(bound, distance) - _THRESHOLD_MARGIN


def _numbering(anchors, n):
    """Anchor number of each of ``n`` rows (-1 for rows that are not anchors)."""
    out = np.full(n, -1, dtype=np.int64)
    out[anchors] = np.arange(anchors.size)
    return out


def _band_share(embeddings, anchors, thresholds, slack, memory_mb):
    """Share of the table whose float32 score with an anchor is >= its threshold - ``slack``, on
    average over anchors sampled evenly.

    On a poorly separated embedding (the first epoch of training) most anchors' search bands hold
    a large share of the table: the top-k search is widened for nearly every anchor and the
    candidate lists approach rows x rows. Above :data:`DENSE_SHARE`, scoring blocks of anchors
    against every row (the dense path: same cosines, same membership rule, same draws, so the same
    output) is faster.
    """
    n = embeddings.shape[0]
    m = min(_DENSE_SAMPLE, anchors.size)
    take = anchors[np.unique(np.linspace(0, anchors.size - 1, m).astype(np.int64))]
    low = thresholds[take] - slack
    chunk = int(max(1, memory_mb * _MB // 4 // (8 * n)))
    inside = 0
    for c in range(0, take.size, chunk):
        scores = exact_scores(embeddings, embeddings[take[c:c + chunk]])
        inside += int(np.count_nonzero(scores >= low[c:c + chunk, None]))
    return inside / (take.size * n)


# ---------------------------------------------------------------------------------------------
# block sizes and the memory estimate
# ---------------------------------------------------------------------------------------------
def query_block_rows(n, k, memory_mb, requested=0):
    """Queries per search block: ``requested`` if given, else sized so one block's top-k results
    and their bookkeeping (about 64 bytes per neighbour) fit in a quarter of ``memory_mb``."""
    if requested:
        return int(max(1, min(requested, n)))
    budget = memory_mb * _MB // 4
    rows = budget // max(1, _BYTES_PER_NEIGHBOUR * k)
    return int(max(1, min(n, max(256, min(rows, 16384)))))


def dense_block_rows(n, select, memory_mb, requested=0):
    """Query rows per block of the dense path: one block in a quarter of ``memory_mb`` (capped at
    ``requested`` when given)."""
    per = _DENSE_WEIGHTED_CELL_BYTES if select == "distance-weighted" else _DENSE_CELL_BYTES
    rows = memory_mb * _MB // 4 // (per * n)
    if requested:
        rows = min(rows, requested)
    return int(max(1, min(n, rows)))


def mining_bytes(n, d, block_rows, k, index, *, exact_below=200_000, hnsw_m=32, ivf_nlist=0,
                 memory_mb=1024, positives_per_anchor=4, triplets=0):
    """Estimated peak bytes of mining an ``n x d`` table.

    Parameters
    ----------
    n, d : int
        Rows and dimension of the embedding table.
    block_rows : int
        Anchors per search block (0: sized from ``memory_mb`` as the run does).
    k : int
        Neighbours searched first per anchor (``neighbours``).
    index : {"exact", "ivf", "hnsw", "auto"}
        Index kind; ``auto`` resolves with ``exact_below`` as the run does.
    hnsw_m, ivf_nlist : int
        Index knobs (``ivf_nlist`` 0: about 4 sqrt(n) lists).
    memory_mb : int
        The run's block budget (``memory_mb``), used when ``block_rows`` is 0.
    positives_per_anchor : int
        Positives per anchor (sets how many pairs the exact float64 cosines are computed for).
    triplets : int
        Triplets returned as arrays (``return_triplets=True``); 0 when they are only written.

    Returns
    -------
    int
        The table (float32), the index's own copy of the vectors (+ HNSW links, or IVF ids and
        centroids with the slack of lists that grow by doubling), the per-row state of the run,
        one search block of top-k results with their bookkeeping, a quarter of ``memory_mb`` for
        the widened (range) searches of a block or, on the dense path, for one dense block (at
        least one row against every row: up to 216 bytes a cell with distance-weighted
        selection), the dense path's transposed float32 copy of the table (exact index: counted
        whichever path the run takes, which is chosen at run time), the working set of the exact
        float64 cosines (a chunk of up to 16,384 pairs: both sides' rows as float32 and float64,
        so it grows with ``d``), and the returned triplets. Checked against the mining benchmark
        (bench/results/mining.log: 500,000 x 128 exact, about 800 MB above the interpreter's own;
        IVF about 1.5 GB including the benchmark's data).
    """
    for name, value in dict(n=n, d=d, block_rows=block_rows, k=k, hnsw_m=hnsw_m, ivf_nlist=ivf_nlist,
                            memory_mb=memory_mb, positives_per_anchor=positives_per_anchor,
                            triplets=triplets).items():
        whole_number(value, name)
    kind = resolve_kind(index, n, exact_below)
    vectors = n * d * 4
    if kind == "hnsw":
        # level 0 keeps 2 * M int32 links per node; the upper levels add about 1/M of that again
        index_bytes = vectors + int(n * 2 * hnsw_m * 4 * (1 + 1 / max(hnsw_m, 1)))
    elif kind == "ivf":
        nlist = ivf_nlist or max(1, int(4 * n**0.5))
        # the inverted lists grow by doubling while rows are added: up to twice the vectors and ids
        index_bytes = 2 * (vectors + n * 8) + nlist * d * 4
    else:
        index_bytes = vectors
    kk = max(1, min(k, n))
    block = query_block_rows(max(n, 1), kk, memory_mb, block_rows)
    # results of the widened (range) searches of a block: sized like the top-k block, a quarter
    # of the budget; the dense path uses the same quarter for one block, but a block has at least
    # one row
    widened = max(memory_mb * _MB // 4, _DENSE_WEIGHTED_CELL_BYTES * n)
    transposed = vectors if kind == "exact" else 0
    # one chunk of exact_cosine: both sides as float32 and float64 (12 bytes per value and side),
    # at most 16 MiB
    cosines = 2 * min(cosine_chunk_pairs(d), n * positives_per_anchor) * d * 12
    return int(vectors + index_bytes + n * _BYTES_PER_ROW + block * kk * _BYTES_PER_NEIGHBOUR
               + widened + transposed + cosines + triplets * _BYTES_PER_TRIPLET)
