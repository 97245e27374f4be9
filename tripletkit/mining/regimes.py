"""The regimes of a triplet and the distances they are measured in: the boundaries, stated once.

A triplet (anchor a, positive p of a's identity, negative n of another identity) with margin
alpha >= 0 is ``hard`` when d_an < d_ap, ``semi-hard`` when d_ap <= d_an < d_ap + alpha and
``easy`` when d_an >= d_ap + alpha. Distances are those of unit vectors: ``"squared"``
||a - b||^2 = 2 - 2 cos(a, b), in [0, 4], or ``"euclidean"`` ||a - b||, in [0, 2]. The miner and
the losses (:mod:`tripletkit.losses`) classify through :func:`classify`, whose comparison with
``d_ap + alpha`` is the hinge's own, so a triplet is easy exactly when its hinge loss is 0.
"""

from __future__ import annotations

import numpy as np

from .._errors import TripletkitError
from .._validate import margin_number

__all__ = ["REGIMES", "EASY", "SEMI_HARD", "HARD", "regime_codes", "regime_of", "classify",
           "distance_from_cosine", "cosine_at", "euclidean"]

#: Regime names, in code order: :func:`regime_codes` returns int8 indices into this tuple.
REGIMES = ("easy", "semi-hard", "hard")
#: The int8 code of each regime.
EASY, SEMI_HARD, HARD = REGIMES.index("easy"), REGIMES.index("semi-hard"), REGIMES.index("hard")


def classify(d_ap, d_an, margin):
    """Regime codes of trusted distances (float64 arrays or scalars, broadcastable; margin a float).

    The rule of :func:`regime_codes` without its checks, for callers whose distances come from
    unit vectors already.
    """
    codes = np.zeros(np.broadcast_shapes(np.shape(d_ap), np.shape(d_an)), dtype=np.int8)
    codes[d_an < d_ap + margin] = SEMI_HARD
    codes[d_an < d_ap] = HARD
    return codes


def regime_codes(d_ap, d_an, margin=0.2):
    """Regime of each triplet as int8 codes into :data:`REGIMES` (0 easy, 1 semi-hard, 2 hard).

    Parameters
    ----------
    d_ap, d_an : array-like of non-negative floats, broadcastable to one shape
        Anchor-positive and anchor-negative distances (any one distance convention).
    margin : float, default 0.2

    Returns
    -------
    ndarray of int8 with the broadcast shape

    Notes
    -----
    hard: d_an < d_ap; semi-hard: d_ap <= d_an < d_ap + margin [1]_; easy: d_an >= d_ap + margin.
    The comparison is made in float64 with ``d_ap + margin`` computed once, the same expression
    the hinge uses, so "easy" is exactly "hinge loss 0". With margin 0 no triplet is semi-hard.

    References
    ----------
    .. [1] F. Schroff, D. Kalenichenko, J. Philbin, "FaceNet: A Unified Embedding for Face
       Recognition and Clustering", CVPR 2015, Sec. 3.2 (semi-hard negatives).
    """
    margin = margin_number(margin)
    d_ap = _as_distances(d_ap, "d_ap")
    d_an = _as_distances(d_an, "d_an")
    try:
        np.broadcast_shapes(d_ap.shape, d_an.shape)
    except ValueError:
        raise TripletkitError(
            f"d_ap has shape {d_ap.shape} and d_an has shape {d_an.shape}; give one distance pair per triplet"
        ) from None
    return classify(d_ap, d_an, margin)


def regime_of(d_ap, d_an, margin=0.2):
    """Regime name of each triplet ("easy", "semi-hard" or "hard"); see :func:`regime_codes`.

    Examples
    --------
    >>> regime_of([0.5, 0.5, 0.5], [0.25, 0.5, 0.75], margin=0.25).tolist()
    ['hard', 'semi-hard', 'easy']
    """
    return np.asarray(REGIMES)[regime_codes(d_ap, d_an, margin)]


def _as_distances(d, name):
    arr = np.asarray(d)
    real = np.issubdtype(arr.dtype, np.number) and not np.issubdtype(arr.dtype, np.complexfloating)
    if not real:
        raise TripletkitError(f"{name} must hold real numbers, got dtype {arr.dtype}")
    arr = arr.astype(np.float64)
    bad = ~np.isfinite(arr)
    if bad.any():
        raise TripletkitError(f"{name} has {int(bad.sum())} NaN or Inf values; distances must be finite")
    if (arr < 0).any():
        raise TripletkitError(f"{name} has {int((arr < 0).sum())} negative values; distances are >= 0")
    return arr


def distance_from_cosine(cos, distance, *, overwrite=False):
    """Distance of unit vectors from their float64 cosines: ``max(0, 2 - 2 cos)`` or its square root.

    Parameters
    ----------
    cos : ndarray of float64
    distance : {"squared", "euclidean"}
    overwrite : bool, default False
        Compute in place, in ``cos`` (the same values bit for bit: -2 cos is exact).

    Returns
    -------
    ndarray of float64
    """
    if overwrite:
        cos *= -2.0
        cos += 2.0
        np.maximum(cos, 0.0, out=cos)
        if distance != "squared":
            np.sqrt(cos, out=cos)
        return cos
    sq = np.maximum(2.0 - 2.0 * cos, 0.0)
    return sq if distance == "squared" else np.sqrt(sq)


def cosine_at(dist, distance):
    """The cosine at which the distance equals ``dist`` (the inverse of :func:`distance_from_cosine`)."""
    sq = dist if distance == "squared" else dist * dist
    return 1.0 - sq / 2.0


def euclidean(dist, distance):
    """The Euclidean distance ||a - b|| of a distance ``dist`` given in the ``distance`` convention."""
    return np.sqrt(dist) if distance == "squared" else dist
