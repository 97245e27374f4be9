"""Batch reductions of the triplet loss: every valid triplet of a labelled batch, or the hardest.

The distances, the hinge and soft margin and the gradients through the normalisation are those of
:mod:`tripletkit.losses`; here they are taken over all (anchor, positive, negative) triplets that a
batch of labelled rows holds, as a training step on a batch of identities does.

References
----------
.. [1] A. Hermans, L. Beyer, B. Leibe, "In Defense of the Triplet Loss for Person
   Re-Identification", arXiv:1703.07737, 2017 (batch-hard and batch-all reductions, the average
   over non-zero terms, the soft margin log(1 + exp(x))).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

from ._errors import TripletkitError
from ._validate import as_codes, check_choice, check_distance, check_flag, margin_number, raw_unit_rows
from .losses import loss_terms

__all__ = ["BatchLoss", "batch_all_loss", "batch_hard_loss"]

_AVERAGES = ("all", "active")

# Transient memory allowed for one block of a blocked computation.
_BLOCK_BYTES = 32 * 2**20


def _check_block(block_size, name="block_size"):
    if block_size is None:
        return None
    if isinstance(block_size, (bool, np.bool_)) or not isinstance(block_size, (int, np.integer)) or block_size < 1:
        raise TripletkitError(f"{name} must be a positive integer or None, got {block_size!r}")
    return int(block_size)



def _back_through_normalise(g_u, u, norms):
    # d(x/||x||)/dx = (I - u u^T)/||x||: drop the radial part of the gradient, rescale by 1/||x||.
    radial = np.einsum("ij,ij->i", g_u, u)
    return (g_u - u * radial[:, None]) / norms[:, None]



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
    u, norms = raw_unit_rows(X, "X")
    codes, _ = as_codes(labels, n=u.shape[0], name="labels")
    same = codes[:, None] == codes[None, :]
    pos = same.copy()
    np.fill_diagonal(pos, False)
    return u, norms, pos, ~same


def _empty_batch(u, what):
    warnings.warn(f"{what}: the batch has no valid triplet (it needs an identity with two rows and a second "
          "identity); the loss is undefined (NaN)", RuntimeWarning, stacklevel=3)
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
