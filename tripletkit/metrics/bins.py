"""The score histogram of the all-pairs verification: bin keys of exact scores, counting, merging.

Rows are snapped to the exact-cosine grid (:mod:`tripletkit._exact`) and scaled by
:data:`EMBEDDING_SCALE`, so the product of two rows is :data:`SCORE_SCALE` times their exact
cosine, computed exactly by any float64 matrix product: every pass, block shape, thread and
process sees the same value. A scaled score falls in one of :data:`NBINS` bins of width
``2**-18`` in the cosine (about 3.8e-6); :func:`score_counts` rebuilds the
:class:`~tripletkit.metrics.rates.ScoreCounts` of every pair from the bin counts and the exact
values listed for the bins that matter.
"""

from __future__ import annotations

import faiss
import numpy as np

from .rates import ScoreCounts

__all__ = ["EMBEDDING_SCALE", "SCORE_SCALE", "NBINS", "NOT_A_PAIR", "keys_of", "bin_value", "add_histogram",
           "lowest_scaled_in", "score_counts"]

#: Rows are scaled by this after snapping, so that products are the exact cosine times SCORE_SCALE.
EMBEDDING_SCALE = 2.0**9
#: A scaled score is the cosine times this.
SCORE_SCALE = 2.0**18
# bin key = trunc(2**18 * s + _OFFSET), exact in float64: keys >= 1 for s >= -1.0039. 2**19 bins
# (4 MiB of int64 per histogram) count faster than 2**21 finer ones, and the exact values of the
# few bins that matter are listed anyway.
_OFFSET = float(2**18 + 2**10)
#: Bins of the histogram (bin 0 holds only the entries of a block that are not pairs).
NBINS = 2**19 + 2**11
#: The value given to entries of a block that are not pairs (j <= i): its key is 0, a bin never reported.
NOT_A_PAIR = -(2**18 + 2**10) + 0.5
# Scaled scores are multiples of this step (exact cosines are multiples of 2**-52).
_STEP = 2.0**-34


def keys_of(scaled, out=None):
    """Histogram bin of scaled scores: a non-decreasing function of the score (int32)."""
    if out is None:
        out = np.empty(scaled.shape, np.int32)
    np.add(scaled, _OFFSET, out=out, casting="unsafe")
    return out


def bin_value(key):
    """A score inside bin ``key`` (its middle), for bins whose scores are not listed exactly."""
    return (np.asarray(key, np.float64) + 0.5 - _OFFSET) / SCORE_SCALE


def add_histogram(keys, counts, scratch=None):
    """``counts += histogram of the int32 keys``; ``scratch`` (int32, NBINS) is left holding it.

    faiss.ivec_hist is a plain C counting loop (about twice as fast as np.bincount).
    """
    flat = keys.reshape(-1)
    if scratch is None:
        scratch = np.empty(NBINS, np.int32)
    outside = faiss.ivec_hist(flat.size, faiss.swig_ptr(flat), NBINS, faiss.swig_ptr(scratch))
    if outside:
        raise RuntimeError(f"{outside} scores fell outside the histogram; embeddings are not unit vectors")
    counts += scratch


def lowest_scaled_in(key):
    """Smallest scaled score (a multiple of ``2**-34``) whose key is >= ``key``.

    ``s + _OFFSET`` is exact below 2**19; above (cosines over 0.996) it rounds to a multiple of
    2**-33, which can lift a score one step below the edge into bin ``key``.
    """
    s = float(key) - _OFFSET
    while keys_of(np.array([s - _STEP]))[0] >= key:
        s -= _STEP
    return s


def _value_counts(values):
    """Distinct values ascending and how often each occurs."""
    values = np.sort(values)
    if values.size == 0:
        return values.astype(np.float64), np.empty(0, np.int64)
    starts = np.flatnonzero(np.r_[True, values[1:] != values[:-1]])
    return values[starts].astype(np.float64), np.diff(np.r_[starts, values.size]).astype(np.int64)


def _merge_sorted(first, second):
    """Positions of ``second``'s values when two ascending runs are merged (ties: ``second`` after)."""
    return np.searchsorted(first, second) + np.arange(second.size)


def _exact_counts(genuine, impostor):
    """Distinct exact values with their genuine and impostor counts.

    Each side is sorted apart (a plain sort, no argsort), then the genuine values are merged into
    the impostor ones.
    """
    gen_values, gen_counts = _value_counts(genuine)
    imp_values, imp_counts = _value_counts(impostor)
    at = np.searchsorted(imp_values, gen_values)
    shared = at < imp_values.size
    shared[shared] = imp_values[at[shared]] == gen_values[shared]
    new = ~shared
    pos = _merge_sorted(imp_values, gen_values[new])
    m = imp_values.size + pos.size
    from_imp = np.ones(m, bool)
    from_imp[pos] = False
    values = np.empty(m)
    values[pos] = gen_values[new]
    values[from_imp] = imp_values
    imp = np.zeros(m, np.int64)
    imp[from_imp] = imp_counts
    gen = np.zeros(m, np.int64)
    gen[pos] = gen_counts[new]
    gen[np.flatnonzero(from_imp)[at[shared]]] = gen_counts[shared]
    return values, gen, imp


def score_counts(genuine, genuine_keys, listed, listed_bins, gen_hist, imp_hist):
    """ScoreCounts with exact values wherever they are known and one tied entry per other bin.

    Parameters
    ----------
    genuine : ndarray of float64
        Every genuine score (exact cosines), with ``genuine_keys`` their bins.
    listed : ndarray of float64
        The exact impostor scores of the bins ``listed_bins`` (all of them).
    gen_hist, imp_hist : ndarray of int64, shape (NBINS,)
        Genuine and impostor pairs per bin.

    Bins are intervals of the score and a tied entry sits inside its bin (its middle), so ordering
    by value orders by bin too. The tied entries come sorted; only the exact values are sorted and
    then merged in.
    """
    exact_bin = np.zeros(NBINS, bool)
    exact_bin[listed_bins] = True
    exact_bin[imp_hist == 0] = True  # genuine-only bins: the genuine scores are all known
    nonempty = np.flatnonzero(gen_hist + imp_hist)
    tied = nonempty[~exact_bin[nonempty]]
    values, gen, imp = _exact_counts(genuine[exact_bin[genuine_keys]], listed)
    tied_values = bin_value(tied)
    # no exact value equals a tied one (their bins differ): merge the two sorted runs
    pos = _merge_sorted(tied_values, values)
    m = tied_values.size + values.size
    from_tied = np.ones(m, bool)
    from_tied[pos] = False
    merged = []
    for tied_part, exact_part, dtype in ((tied_values, values, np.float64), (gen_hist[tied], gen, np.int64),
                                         (imp_hist[tied], imp, np.int64)):
        out = np.empty(m, dtype)
        out[pos] = exact_part
        out[from_tied] = tied_part
        merged.append(out)
    return ScoreCounts(*merged)
