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

import numpy as np

from ._errors import TripletkitError
from ._threads import run_in_threads
from ._validate import (as_embeddings, check_choice, check_distance, check_flag, check_same_length, margin_number,
                        raw_unit_rows, row_norms)
from ._validate import DISTANCES as _DISTANCES
from .mining.regimes import distance_from_cosine

__all__ = [
    "DISTANCES",
    "rowwise_distance",
    "loss_terms",
    "unit_triplet_terms",
    "pair_distance",
    "triplet_loss",
    "triplet_loss_grad",
]

#: Accepted values of every ``distance`` argument (tripletkit._validate.DISTANCES).
DISTANCES = _DISTANCES
_REDUCTIONS = ("mean", "sum", "none")



# -- validation of scalar options (array inputs go through _validate) -------------------------
def _check_same_dim(**arrays):
    dims = {k: np.shape(v)[1] for k, v in arrays.items()}
    if len(set(dims.values())) > 1:
        desc = ", ".join(f"{k}={v}" for k, v in dims.items())
        raise TripletkitError(f"inputs must have the same dimension, got {desc}; embed them with one model")


def _warn(message):
    warnings.warn(message, RuntimeWarning, stacklevel=3)


# -- the shared arithmetic (inputs trusted) ---------------------------------------------------
def rowwise_distance(ua, ub, distance):
    """Row-wise distances and the difference vectors ``ua - ub`` (kept for the gradient)."""
    diff = ua - ub
    # The difference form is accurate for nearby points, where 2 - 2 cos would cancel.
    sq = np.einsum("ij,ij->i", diff, diff)
    return (sq if distance == "squared" else np.sqrt(sq)), diff


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
    ua, _ = raw_unit_rows(a, "a")
    ub, _ = raw_unit_rows(b, "b")
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
