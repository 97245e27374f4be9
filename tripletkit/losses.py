"""Triplet losses and their gradients on unit vectors (numpy only, no training framework).

Every function here L2-normalises its raw inputs first and measures distances on the unit sphere:

- ``"squared"`` (default): d(a, b) = ||a - b||^2 = 2 - 2 cos(a, b), in [0, 4];
- ``"euclidean"``: d(a, b) = ||a - b||, in [0, 2].

A triplet (anchor a, positive p of the same identity, negative n of another identity) has, for a
margin alpha >= 0,

- the hinge loss ``max(0, d_ap - d_an + alpha)`` (Schroff et al., 2015), or
- the soft-margin loss ``log(1 + exp(d_ap - d_an))`` (Hermans et al., 2017), which has no margin;

and falls in one of three regimes, whose boundaries are stated once, in
:mod:`tripletkit.mining.regimes`. A triplet is *active* when it violates the margin,
``d_ap - d_an + alpha > 0``, i.e. when it is not easy. For the hinge that is exactly "the loss is
non-zero"; the soft-margin loss is positive for every triplet, so it uses the same margin-based
definition to keep active fractions comparable.

Gradients are taken with respect to the raw (pre-normalisation) vectors, through the Jacobian of
x -> x / ||x||, which is (I - u u^T) / ||x|| with u = x / ||x||. Everything that feeds a gradient
is computed in float64. At a hinge kink (violation exactly 0), at an exact tie for the hardest
positive or negative, and at a zero Euclidean distance, the functions return one fixed subgradient
(documented on each function).

References
----------
.. [1] F. Schroff, D. Kalenichenko, J. Philbin, "FaceNet: A Unified Embedding for Face Recognition
   and Clustering", CVPR 2015 (Sec. 3.1: triplet constraint and hinge loss on the unit
   hypersphere, squared Euclidean distance; the margin alpha = 0.2 of their experiments).
.. [2] A. Hermans, L. Beyer, B. Leibe, "In Defense of the Triplet Loss for Person
   Re-Identification", arXiv:1703.07737, 2017 (batch-hard and batch-all reductions, the average
   over non-zero terms, the soft margin log(1 + exp(x))).
"""

from __future__ import annotations

import os
import warnings
from dataclasses import dataclass, field

import numpy as np

from ._errors import TripletkitError
from ._threads import run_in_threads
from ._validate import (as_codes, as_embeddings, check_choice, check_distance, check_flag, check_same_length,
                        margin_number, row_norms)
from ._validate import DISTANCES as _DISTANCES
from .mining.regimes import distance_from_cosine

__all__ = [
    "DISTANCES",
    "rowwise_distance",
    "loss_terms",
    "unit_triplet_terms",
    "BatchLoss",
    "pair_distance",
    "triplet_loss",
    "triplet_loss_grad",
    "batch_all_loss",
    "batch_hard_loss",
]

#: Accepted values of every ``distance`` argument (tripletkit._validate.DISTANCES).
DISTANCES = _DISTANCES
_REDUCTIONS = ("mean", "sum", "none")
_AVERAGES = ("all", "active")

# Transient memory allowed for one block of a blocked computation (batch-all, score_triplets).
_BLOCK_BYTES = 32 * 2**20


# -- validation of scalar options (array inputs go through _validate) -------------------------
def _check_block(block_size, name="block_size"):
    if block_size is None:
        return None
    if isinstance(block_size, (bool, np.bool_)) or not isinstance(block_size, (int, np.integer)) or block_size < 1:
        raise TripletkitError(f"{name} must be a positive integer or None, got {block_size!r}")
    return int(block_size)


def _raw_rows(x, name):
    """Validate raw vectors and return them as float64 unit rows plus their norms.

    Shapes, finiteness and zero norms are checked by the shared helper (which works in the
    package's float32 embedding dtype); the arithmetic then uses float64 copies of the input.
    """
    as_embeddings(x, name, normalise=True)
    x64 = np.asarray(x, dtype=np.float64)
    norms = row_norms(x64)  # no overflow for rows of huge finite values
    return x64 / norms[:, None], norms


def _check_same_dim(**arrays):
    dims = {k: np.shape(v)[1] for k, v in arrays.items()}
    if len(set(dims.values())) > 1:
        desc = ", ".join(f"{k}={v}" for k, v in dims.items())
        raise TripletkitError(f"inputs must have the same dimension, got {desc}; embed them with one model")


def _warn(message):
    warnings.warn(message, RuntimeWarning, stacklevel=3)


# -- the shared arithmetic (inputs trusted) ---------------------------------------------------
def _back_through_normalise(g_u, u, norms):
    # d(x/||x||)/dx = (I - u u^T)/||x||: drop the radial part of the gradient, rescale by 1/||x||.
    radial = np.einsum("ij,ij->i", g_u, u)
    return (g_u - u * radial[:, None]) / norms[:, None]


def rowwise_distance(ua, ub, distance):
    """Row-wise distances and the difference vectors ``ua - ub`` (kept for the gradient)."""
    diff = ua - ub
    # The difference form is accurate for nearby points, where 2 - 2 cos would cancel.
    sq = np.einsum("ij,ij->i", diff, diff)
    return (sq if distance == "squared" else np.sqrt(sq)), diff


def _slope_factor(dist, distance):
    """d(distance)/d(ua) = factor * (ua - ub): 2 for squared, 1/||ua - ub|| for Euclidean."""
    if distance == "squared":
        return np.full_like(dist, 2.0)
    out = np.zeros_like(dist)
    # Subgradient 0 at a zero Euclidean distance, where sqrt is not differentiable.
    np.divide(1.0, dist, out=out, where=dist > 0)
    return out


def _pairwise(u, distance):
    """All-pairs distances of unit rows, (n, n) float64, via the Gram matrix.

    The absolute error of a squared distance is about 1e-15 (cancellation in 2 - 2 cos).
    """
    sq = u @ u.T
    sq *= -2.0  # in place: 2 - 2 cos without extra (n, n) temporaries
    sq += 2.0
    np.clip(sq, 0.0, 4.0, out=sq)  # rounding can step just outside [0, 4]
    np.fill_diagonal(sq, 0.0)
    return sq if distance == "squared" else np.sqrt(sq)


def loss_terms(d_ap, d_an, margin, soft):
    """Per-triplet loss, d(loss)/d(d_ap) (= -d(loss)/d(d_an)) and the active mask."""
    # (d_ap + margin) - d_an is zero or negative exactly when d_an >= d_ap + margin, so in floating
    # point the zero-loss set of the hinge coincides with the 'easy' regime of regimes.classify.
    violation = (d_ap + margin) - d_an
    active = violation > 0
    if soft:
        z = d_ap - d_an
        loss = np.logaddexp(0.0, z)  # log(1 + exp(z)) without overflow
        slope = np.exp(z - loss)  # the logistic sigmoid of z, stable for both signs
    else:
        loss = np.maximum(violation, 0.0) + 0.0  # + 0.0 turns -0.0 into 0.0
        slope = active.astype(np.float64)  # subgradient 0 at the kink
    return loss, slope, active


def _grad_from_pair_weights(weights, u, norms, dist, distance):
    """Gradient w.r.t. the raw rows from ``weights[i, j] = dL/dD[i, j]`` of a pairwise matrix D."""
    # D[i, j] depends on u_i and u_j symmetrically, so row i collects weights from both D[i, j]
    # and D[j, i]; both have derivative factor * (u_i - u_j) with respect to u_i.
    w = weights + weights.T
    if distance == "squared":
        w *= 2.0
    else:
        # in place to keep the peak at a few (n, n) arrays; subgradient 0 at a zero distance
        np.divide(w, dist, out=w, where=dist > 0)
        w[dist == 0] = 0.0
    g_u = w.sum(axis=1)[:, None] * u - w @ u
    return _back_through_normalise(g_u, u, norms)


# -- public: distances and per-triplet losses -----------------------------------------------
def pair_distance(a, b, distance="squared"):
    """Row-wise distance between the directions of ``a`` and ``b``.

    Parameters
    ----------
    a, b : array-like of shape (n, d)
        Raw vectors; each row is L2-normalised first.
    distance : {"squared", "euclidean"}, default "squared"
        ``"squared"`` gives ||u_a - u_b||^2 = 2 - 2 cos(a, b) in [0, 4]; ``"euclidean"`` its square
        root, in [0, 2].

    Returns
    -------
    ndarray of float64, shape (n,)

    Examples
    --------
    >>> pair_distance([[1.0, 0.0]], [[0.0, 3.0]]).tolist()
    [2.0]
    """
    distance = check_distance(distance)
    ua, _ = _raw_rows(a, "a")
    ub, _ = _raw_rows(b, "b")
    check_same_length(a=ua, b=ub)
    _check_same_dim(a=ua, b=ub)
    return rowwise_distance(ua, ub, distance)[0]


# -- the per-triplet path: chunks of rows, unit rows used as they are ---------------------------
# Rows of one chunk of the per-triplet losses: the three input chunks (and the gradient's) stay
# in the CPU cache between the passes over them.
_CHUNK_BYTES = 1 << 21
# From this many values per input, the chunks are shared out to the CPUs.
_PARALLEL_CELLS = 1 << 22


def _triplet_arrays(anchor, positive, negative):
    """The three inputs as 2-D float arrays of one type: float32 stays float32 (no copy), anything
    else becomes float64; shapes and dimensions checked."""
    arrays = []
    for name, x in (("anchor", anchor), ("positive", positive), ("negative", negative)):
        arr = np.asarray(x)
        if arr.ndim != 2 or arr.shape[1] < 1 or not np.issubdtype(arr.dtype, np.number) \
                or np.issubdtype(arr.dtype, np.complexfloating):
            as_embeddings(arr, name)  # raises the shared message
        arrays.append(arr)
    dtype = np.float32 if all(a.dtype == np.float32 for a in arrays) else np.float64
    arrays = [np.ascontiguousarray(a, dtype=dtype) for a in arrays]
    check_same_length(anchor=arrays[0], positive=arrays[1], negative=arrays[2])
    _check_same_dim(anchor=arrays[0], positive=arrays[1], negative=arrays[2])
    return arrays


def _unit_tolerance(dtype, dim):
    """|squared norm - 1| below which a row counts as unit and is used as it is (a few roundings)."""
    return 8.0 * float(np.finfo(dtype).eps) * max(1.0, float(np.sqrt(dim)))


def _unit_chunk(chunk, whole, name):
    """``(unit rows, norms)`` of a chunk: rows already unit are used as they are (norms None).

    Other rows are divided by their norms (computed without overflow); a chunk with NaN/Inf or
    zero rows checks the whole input to raise the shared message with its row positions.
    """
    sq = np.einsum("ij,ij->i", chunk, chunk)
    if np.all(np.abs(sq - 1.0) <= _unit_tolerance(chunk.dtype, chunk.shape[1])):
        return chunk, None
    norms = row_norms(chunk)
    if not np.all(np.isfinite(norms) & (norms > 0)):
        as_embeddings(whole, name, normalise=True, dtype=whole.dtype)  # raises with the positions
    return (chunk / norms[:, None]).astype(chunk.dtype, copy=False), norms


def _cosine_weights(cos, distance, dloss):
    """``(distances, dloss/dcos)`` for float64 cosines of unit rows and ``dloss`` = dloss/ddistance."""
    dist = distance_from_cosine(cos, distance)
    if distance == "squared":
        return dist, -2.0 * dloss
    weight = np.zeros_like(dist)
    # Subgradient 0 at a zero Euclidean distance, where sqrt is not differentiable.
    np.divide(-dloss, dist, out=weight, where=dist > 0)
    return dist, weight


def _chunks(n, dim):
    step = int(max(1, _CHUNK_BYTES // (8 * max(1, dim))))
    return [(s, min(n, s + step)) for s in range(0, n, step)]


def _in_parts(part, n, dim):
    """``part(None, ranges, stopped)`` over the chunks of n rows: the chunks of a large input are
    shared out to the CPUs, whose threads run numpy's loops side by side (each chunk writes its own
    rows of the outputs, so the results do not depend on the split)."""
    chunks = _chunks(n, dim)
    threads = min(os.cpu_count() or 1, len(chunks) // 8) if n * dim >= _PARALLEL_CELLS else 1
    threads = max(1, threads)
    run_in_threads(part, None, [chunks[i::threads] for i in range(threads)], threads)


def unit_triplet_terms(a, p, q, distance, margin, soft):
    """``(cos_ap, cos_an, d_ap, d_an, loss, slope)`` of triplets of unit rows (float64 results; the
    cosines in the rows' float type). Inputs are trusted: what the public functions build on."""
    cos_ap = np.einsum("ij,ij->i", a, p).astype(np.float64)
    cos_an = np.einsum("ij,ij->i", a, q).astype(np.float64)
    d_ap = distance_from_cosine(cos_ap, distance)
    d_an = distance_from_cosine(cos_an, distance)
    loss, slope, _ = loss_terms(d_ap, d_an, margin, soft)
    return cos_ap, cos_an, d_ap, d_an, loss, slope


def triplet_loss(anchor, positive, negative, margin=0.2, distance="squared", soft=False):
    """Per-triplet loss of raw embeddings (rows are L2-normalised first).

    Parameters
    ----------
    anchor, positive, negative : array-like of shape (n, d)
        Raw embeddings; row i of the three arrays forms triplet i. float32 inputs are used as
        they are (and rows that are already unit are not copied); other types work in float64.
    margin : float, default 0.2
        The margin alpha >= 0 of the hinge (0.2 is the value of [1]_). Ignored by the loss value
        when ``soft`` is true.
    distance : {"squared", "euclidean"}, default "squared"
    soft : bool, default False
        Use the soft margin log(1 + exp(d_ap - d_an)) of [2]_ instead of the hinge.

    Returns
    -------
    ndarray of float64, shape (n,)
        ``max(0, d_ap - d_an + margin)`` or ``log(1 + exp(d_ap - d_an))``; never negative.
        Distances come from the cosines of the unit rows (``2 - 2 cos``), computed in the input's
        float type: about 1e-7 absolute for float32 inputs.

    References
    ----------
    .. [1] F. Schroff, D. Kalenichenko, J. Philbin, "FaceNet", CVPR 2015, Sec. 3.1.
    .. [2] A. Hermans, L. Beyer, B. Leibe, "In Defense of the Triplet Loss for Person
       Re-Identification", arXiv:1703.07737, 2017.
    """
    distance = check_distance(distance)
    margin = margin_number(margin)
    soft = check_flag(soft, "soft")
    anchor, positive, negative = _triplet_arrays(anchor, positive, negative)
    out = np.empty(anchor.shape[0])

    def part(_, ranges, stopped):
        for s, e in ranges:
            a = _unit_chunk(anchor[s:e], anchor, "anchor")[0]
            p = _unit_chunk(positive[s:e], positive, "positive")[0]
            q = _unit_chunk(negative[s:e], negative, "negative")[0]
            out[s:e] = unit_triplet_terms(a, p, q, distance, margin, soft)[4]

    _in_parts(part, *anchor.shape)
    return out


def triplet_loss_grad(anchor, positive, negative, margin=0.2, distance="squared", soft=False,
                      reduction="mean"):
    """Triplet loss and its gradients with respect to the raw (pre-normalisation) inputs.

    Parameters
    ----------
    anchor, positive, negative : array-like of shape (n, d)
        Raw embeddings, as in :func:`triplet_loss`.
    margin, distance, soft
        As in :func:`triplet_loss`.
    reduction : {"mean", "sum", "none"}, default "mean"
        ``"mean"``/``"sum"`` reduce the n losses to one float; ``"none"`` returns the (n,) losses,
        and row i of each gradient is then the gradient of loss i alone.

    Returns
    -------
    loss : float or ndarray of shape (n,)
        NaN (with a RuntimeWarning) for ``reduction="mean"`` on zero triplets.
    grad_anchor, grad_positive, grad_negative : ndarray of shape (n, d)
        In the inputs' float type (float32 for float32 inputs, else float64). Row i is the
        gradient with respect to row i of the corresponding input. When the same raw vector
        appears in several rows (e.g. rows gathered from one matrix), sum its rows, e.g. with
        ``np.add.at``.

    Notes
    -----
    With unit rows u and cosines c = u_a . u_p, the loss depends on the rows through the cosines:
    dL/du_a = w_ap u_p + w_an u_n, dL/du_p = w_ap u_a, dL/du_n = w_an u_a with w = dL/dc; the
    Jacobian of x -> x / ||x||, (I - u u^T) / ||x||, then drops the radial part (u . dL/du is
    known from the cosines). Subgradients: at a hinge kink (d_ap - d_an + margin exactly 0) the
    loss is 0 and its gradient is taken as 0; at a zero Euclidean distance the gradient of that
    distance is taken as 0. Memory: the three gradients (as large as the inputs) and chunks.
    """
    distance = check_distance(distance)
    margin = margin_number(margin)
    soft = check_flag(soft, "soft")
    reduction = check_choice(reduction, "reduction", _REDUCTIONS)
    anchor, positive, negative = _triplet_arrays(anchor, positive, negative)
    n = anchor.shape[0]
    scale = 1.0
    if reduction == "mean" and n:
        scale = 1.0 / n
    losses = np.empty(n)
    grads = [np.empty_like(anchor), np.empty_like(positive), np.empty_like(negative)]

    def part(_, ranges, stopped):
        scratch = None
        for s, e in ranges:
            if scratch is None or scratch.shape[0] < e - s:
                scratch = np.empty((e - s, anchor.shape[1]), anchor.dtype)
            buffer = scratch[: e - s]
            a, norm_a = _unit_chunk(anchor[s:e], anchor, "anchor")
            p, norm_p = _unit_chunk(positive[s:e], positive, "positive")
            q, norm_n = _unit_chunk(negative[s:e], negative, "negative")
            cos_ap, cos_an, d_ap, d_an, loss, slope = unit_triplet_terms(a, p, q, distance, margin, soft)
            losses[s:e] = loss
            # d loss / d cos, per triplet (the hinge's and soft margin's slope is d loss / d d_ap)
            w_ap = _cosine_weights(cos_ap, distance, slope * scale)[1]
            w_an = _cosine_weights(cos_an, distance, -slope * scale)[1]
            _project(grads[0][s:e], (w_ap, p), (w_an, q), a, w_ap * cos_ap + w_an * cos_an, norm_a, buffer)
            _project(grads[1][s:e], (w_ap, a), None, p, w_ap * cos_ap, norm_p, buffer)
            _project(grads[2][s:e], (w_an, a), None, q, w_an * cos_an, norm_n, buffer)

    _in_parts(part, *anchor.shape)
    if reduction == "mean":
        if n == 0:
            _warn("triplet_loss_grad got zero triplets; the mean loss is undefined (NaN)")
            value = float("nan")
        else:
            value = float(losses.sum() / n)
    elif reduction == "sum":
        value = float(losses.sum())
    else:
        value = losses
    return (value, *grads)


def _project(out, first, second, unit, radial, norms, scratch):
    """``out = (w1 v1 [+ w2 v2] - radial u) / ||x||``: a gradient on unit rows taken back through the
    normalisation (its radial part dropped), in ``out``'s float type; ``scratch`` is a buffer of
    ``out``'s shape, so that no pass allocates."""
    dtype = out.dtype.type
    np.multiply(first[1], first[0].astype(dtype)[:, None], out=out)
    if second is not None:
        np.multiply(second[1], second[0].astype(dtype)[:, None], out=scratch)
        out += scratch
    np.multiply(unit, radial.astype(dtype)[:, None], out=scratch)
    out -= scratch
    if norms is not None:
        out /= norms.astype(dtype)[:, None]


# -- public: reductions over a labelled batch -------------------------------------------------
@dataclass(frozen=True, eq=False)
class BatchLoss:
    """Result of a batch reduction.

    Attributes
    ----------
    loss : float
        The averaged loss that ``grad`` is the gradient of.
    grad : ndarray of float64, shape (n, d)
        Gradient of ``loss`` with respect to the raw batch rows.
    triplets : int
        Number of triplets that entered the reduction.
    active : int
        How many of them violate the margin (d_ap - d_an + margin > 0).
    active_fraction : float
        ``active / triplets``.
    loss_all : float
        Mean loss over all ``triplets``.
    loss_active : float
        Mean loss over the active triplets (0.0 when none is active).

    With no valid triplet (a single identity, or no identity with two rows) the floats are NaN,
    ``grad`` is zero and a RuntimeWarning says why.
    """

    loss: float
    grad: np.ndarray = field(repr=False)
    triplets: int
    active: int
    active_fraction: float
    loss_all: float
    loss_active: float


def _batch_inputs(X, labels):
    u, norms = _raw_rows(X, "X")
    codes, _ = as_codes(labels, n=u.shape[0], name="labels")
    same = codes[:, None] == codes[None, :]
    pos = same.copy()
    np.fill_diagonal(pos, False)
    return u, norms, pos, ~same


def _empty_batch(u, what):
    _warn(f"{what}: the batch has no valid triplet (it needs an identity with two rows and a second "
          "identity); the loss is undefined (NaN)")
    nan = float("nan")
    return BatchLoss(loss=nan, grad=np.zeros_like(u), triplets=0, active=0, active_fraction=nan,
                     loss_all=nan, loss_active=nan)


def _pair_block(n):
    # About 5 float64-sized (block, n) temporaries live at once per block of positive pairs.
    return max(1, _BLOCK_BYTES // (40 * max(n, 1)))


def batch_all_loss(X, labels, margin=0.2, distance="squared", soft=False, *, average="all",
                   block_size=None):
    """Triplet loss over every valid triplet of a labelled batch ("batch-all" of [2]_).

    A valid triplet is (a, p, n) with a != p, label(p) == label(a) and label(n) != label(a).

    Parameters
    ----------
    X : array-like of shape (n, d)
        Raw embeddings of the batch; rows are L2-normalised first.
    labels : array-like of shape (n,)
        Identity of each row (any hashable values).
    margin, distance, soft
        As in :func:`triplet_loss`.
    average : {"all", "active"}, default "all"
        Which mean ``loss`` and ``grad`` refer to: over all valid triplets, or over the active ones
        only (the "non-zero terms" average of [2]_; the active count is held fixed, which is its
        exact derivative away from kinks). Both means are always reported.
    block_size : int or None
        Anchor-positive pairs handled per block; None sizes blocks to about 32 MB.

    Returns
    -------
    BatchLoss

    Notes
    -----
    Vectorised over blocks of anchor-positive pairs, each against all n rows. Memory is O(n^2):
    the distance matrix, its gradient weights and boolean masks, about 3.5 float64 (n, n) arrays
    at the peak (measured: 440 MB at n = 4096), plus about 32 MB per block; time is O(P * n) for
    P anchor-positive pairs (about 4 s for n = 4096, 117M triplets, on a 2-core laptop-class CPU).

    References
    ----------
    .. [1] F. Schroff, D. Kalenichenko, J. Philbin, "FaceNet", CVPR 2015, Sec. 3.1.
    .. [2] A. Hermans, L. Beyer, B. Leibe, "In Defense of the Triplet Loss for Person
       Re-Identification", arXiv:1703.07737, 2017.
    """
    distance = check_distance(distance)
    margin = margin_number(margin)
    soft = check_flag(soft, "soft")
    average = check_choice(average, "average", _AVERAGES)
    block_size = _check_block(block_size)
    u, norms, pos, neg = _batch_inputs(X, labels)
    n = u.shape[0]
    n_neg = neg.sum(axis=1)
    anchors, positives = np.nonzero(pos & (n_neg > 0)[:, None])  # row-major: anchors sorted
    triplets = int(n_neg[anchors].sum())
    if triplets == 0:
        return _empty_batch(u, "batch_all_loss")
    dist = _pairwise(u, distance)
    weights = np.zeros((n, n))  # dL/d dist[a, j], filled block by block
    total = total_active = 0.0
    active = 0
    step = block_size or _pair_block(n)
    for start in range(0, anchors.shape[0], step):
        a = anchors[start:start + step]
        p = positives[start:start + step]
        mask = neg[a]  # (b, n): the negatives of each anchor
        loss, slope, act = loss_terms(dist[a, p][:, None], dist[a], margin, soft)
        act &= mask
        loss = np.where(mask, loss, 0.0)
        total += float(loss.sum())
        total_active += float(loss[act].sum())
        active += int(act.sum())
        w = np.where(mask if average == "all" else act, slope, 0.0)
        # (a, p) pairs are unique, so plain fancy-index += is safe for the positive side; anchors
        # repeat within a block, so the negative side needs an unbuffered add.
        weights[a, p] += w.sum(axis=1)
        np.add.at(weights, a, -w)
    loss_all = total / triplets
    loss_active = total_active / active if active else 0.0
    count = triplets if average == "all" else active
    if count:
        weights /= count
    grad = _grad_from_pair_weights(weights, u, norms, dist, distance)
    return BatchLoss(loss=loss_all if average == "all" else loss_active, grad=grad, triplets=triplets,
                     active=active, active_fraction=active / triplets, loss_all=loss_all,
                     loss_active=loss_active)


def batch_hard_loss(X, labels, margin=0.2, distance="squared", soft=False):
    """Triplet loss of the hardest positive and hardest negative of each anchor ("batch-hard" of [2]_).

    For each anchor a: p* = argmax d(a, p) over its positives (same label, p != a) and
    n* = argmin d(a, n) over its negatives; the loss is the mean of the per-anchor losses of
    (a, p*, n*). Anchors without a positive or without a negative are skipped.

    Parameters
    ----------
    X : array-like of shape (n, d)
        Raw embeddings of the batch; rows are L2-normalised first.
    labels : array-like of shape (n,)
    margin, distance, soft
        As in :func:`triplet_loss`.

    Returns
    -------
    BatchLoss
        ``triplets`` is the number of anchors used; ``loss == loss_all``.

    Notes
    -----
    Exact ties for the hardest positive or negative go to the lowest row index (``argmax`` /
    ``argmin``), which also fixes the subgradient there. Memory O(n^2): about 3.5 float64 (n, n)
    arrays at the peak (measured: 430 MB at n = 4096).

    References
    ----------
    .. [2] A. Hermans, L. Beyer, B. Leibe, "In Defense of the Triplet Loss for Person
       Re-Identification", arXiv:1703.07737, 2017.
    """
    distance = check_distance(distance)
    margin = margin_number(margin)
    soft = check_flag(soft, "soft")
    u, norms, pos, neg = _batch_inputs(X, labels)
    n = u.shape[0]
    valid = pos.any(axis=1) & neg.any(axis=1)
    anchors = np.flatnonzero(valid)
    if anchors.shape[0] == 0:
        return _empty_batch(u, "batch_hard_loss")
    dist = _pairwise(u, distance)
    hardest_pos = np.argmax(np.where(pos, dist, -np.inf), axis=1)[anchors]
    hardest_neg = np.argmin(np.where(neg, dist, np.inf), axis=1)[anchors]
    loss, slope, act = loss_terms(dist[anchors, hardest_pos], dist[anchors, hardest_neg], margin, soft)
    count = anchors.shape[0]
    weights = np.zeros((n, n))
    # Each anchor appears once, so its (anchor, p*) and (anchor, n*) cells are distinct.
    weights[anchors, hardest_pos] += slope / count
    weights[anchors, hardest_neg] -= slope / count
    grad = _grad_from_pair_weights(weights, u, norms, dist, distance)
    active = int(act.sum())
    loss_all = float(loss.sum() / count)
    return BatchLoss(loss=loss_all, grad=grad, triplets=int(count), active=active,
                     active_fraction=active / count, loss_all=loss_all,
                     loss_active=float(loss[act].sum() / active) if active else 0.0)
