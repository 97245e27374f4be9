"""Clustering quality: spherical k-means with k = number of identities, scored by purity, NMI, ARI.

The embeddings are clustered with spherical k-means (Lloyd's iterations on the unit sphere:
points go to the centroid of highest cosine, centroids are the re-normalised means of their
points; Dhillon and Modha 2001), seeded, with k equal to the number of identities. Cosines are
the exact ones of :mod:`tripletkit._exact` (faiss only pre-selects the nearest centroids), so
the clusters are the same whatever the BLAS or thread count. The clusters are
compared with the identities through their contingency table, computed here with numpy (a
sparse table: only the non-empty cells are stored, so many identities cost O(n) memory).

* purity: each cluster counts its most common identity, ``(1/n) * sum_k max_j n_kj``
  (Manning, Raghavan and Schuetze 2008, section 16.3);
* NMI: mutual information over the arithmetic mean of the two entropies,
  ``I(U; V) / ((H(U) + H(V)) / 2)`` (natural logs cancel), 1.0 when both partitions have a
  single block (the convention of ``sklearn.metrics.normalized_mutual_info_score``);
* ARI: the Rand index corrected for chance (Hubert and Arabie 1985), 1.0 when the
  denominator vanishes (identical trivial partitions), as scikit-learn does;
* Rand index: share of pairs of points on which the two partitions agree.

References
----------
.. [1] C. D. Manning, P. Raghavan and H. Schuetze, "Introduction to Information Retrieval",
   Cambridge University Press, 2008, section 16.3.
.. [2] A. Strehl and J. Ghosh, "Cluster ensembles -- a knowledge reuse framework for combining
   multiple partitions", JMLR 3, 2002 (NMI).
.. [3] L. Hubert and P. Arabie, "Comparing partitions", Journal of Classification 2, 1985 (ARI).
.. [4] I. S. Dhillon and D. S. Modha, "Concept decompositions for large sparse text data using
   clustering", Machine Learning 42, 2001 (spherical k-means).
"""

from __future__ import annotations

import math
import warnings

import faiss
import numpy as np

from .._errors import TripletkitError, TripletkitWarning
from .._exact import slack, snap
from .._validate import as_codes, as_embeddings, check_same_length

__all__ = ["clustering_metrics", "spherical_kmeans", "contingency", "purity", "nmi", "ari", "rand_index"]


def contingency(labels_true, labels_pred):
    """Sparse contingency table of two partitions of the same points.

    Parameters
    ----------
    labels_true, labels_pred : array-like of shape (n,)

    Returns
    -------
    rows : ndarray of int64, shape (c,)
        Class code of each non-empty cell.
    cols : ndarray of int64, shape (c,)
        Cluster code of each non-empty cell.
    counts : ndarray of int64, shape (c,)
        Points in each non-empty cell.
    class_sizes, cluster_sizes : ndarray of int64
        Row and column sums.
    """
    a, _ = as_codes(labels_true, name="labels_true")
    b, _ = as_codes(labels_pred, name="labels_pred")
    check_same_length(labels_true=a, labels_pred=b)
    return _contingency(a, b)


def _contingency(a, b):
    kb = int(b.max()) + 1 if b.size else 1
    cells, counts = np.unique(a * kb + b, return_counts=True)
    return (cells // kb, cells % kb, counts.astype(np.int64),
            np.bincount(a).astype(np.int64), np.bincount(b).astype(np.int64))


def _codes_pair(labels_true, labels_pred):
    a, _ = as_codes(labels_true, name="labels_true")
    b, _ = as_codes(labels_pred, name="labels_pred")
    check_same_length(labels_true=a, labels_pred=b)
    if a.size == 0:
        raise TripletkitError("labels_true and labels_pred are empty; give at least one point")
    return a, b


def purity(labels_true, labels_pred):
    """Purity of clusters ``labels_pred`` against classes ``labels_true``.

    References
    ----------
    .. [1] Manning, Raghavan and Schuetze, "Introduction to Information Retrieval", 2008, 16.3.
    """
    a, b = _codes_pair(labels_true, labels_pred)
    return _purity(*_contingency(a, b), a.size)


def _purity(rows, cols, counts, _ca, cb, n):
    best = np.zeros(cb.size, np.int64)
    np.maximum.at(best, cols, counts)
    return float(best.sum() / n)


def _entropy(sizes, n):
    p = sizes[sizes > 0] / n
    return float(-(p * np.log(p)).sum())


def nmi(labels_true, labels_pred):
    """Normalised mutual information with arithmetic-mean normalisation.

    References
    ----------
    .. [1] Strehl and Ghosh, JMLR 3, 2002; normalisation as ``average_method="arithmetic"`` of
       scikit-learn.
    """
    a, b = _codes_pair(labels_true, labels_pred)
    return _nmi(*_contingency(a, b), a.size)


def _nmi(rows, cols, counts, ca, cb, n):
    if ca.size == cb.size == 1:
        return 1.0  # both partitions are one block: perfect agreement by convention
    pij = counts / n
    mi = float(np.sum(pij * (np.log(counts) + np.log(n) - np.log(ca[rows]) - np.log(cb[cols]))))
    mi = max(mi, 0.0)  # rounding can leave a tiny negative value for independent partitions
    denom = (_entropy(ca, n) + _entropy(cb, n)) / 2.0
    return float(mi / max(denom, np.finfo(np.float64).eps))


def _pairs(x):
    x = x.astype(np.int64)
    return int(np.sum(x * (x - 1) // 2))


def ari(labels_true, labels_pred):
    """Adjusted Rand index.

    References
    ----------
    .. [1] L. Hubert and P. Arabie, "Comparing partitions", Journal of Classification 2, 1985.
    """
    a, b = _codes_pair(labels_true, labels_pred)
    return _ari(*_contingency(a, b), a.size)


def _ari(rows, cols, counts, ca, cb, n):
    same_both = _pairs(counts)
    same_a, same_b = _pairs(ca), _pairs(cb)
    total = n * (n - 1) // 2
    if total == 0:
        return 1.0
    expected = same_a * same_b / total
    top = (same_a + same_b) / 2.0
    if top == expected:
        return 1.0  # both partitions trivial and equal: scikit-learn's convention
    return float((same_both - expected) / (top - expected))


def rand_index(labels_true, labels_pred):
    """Rand index: share of point pairs on which the two partitions agree.

    References
    ----------
    .. [1] W. M. Rand, "Objective criteria for the evaluation of clustering methods", JASA 66,
       1971; Manning, Raghavan and Schuetze 2008, section 16.3.
    """
    a, b = _codes_pair(labels_true, labels_pred)
    rows, cols, counts, ca, cb = _contingency(a, b)
    n = a.size
    total = n * (n - 1) // 2
    if total == 0:
        return 1.0
    tp = _pairs(counts)
    fp = _pairs(cb) - tp  # same cluster, different class
    fn = _pairs(ca) - tp  # same class, different cluster
    return float((total - fp - fn) / total)


def spherical_kmeans(embeddings, k, *, seed=0, niter=25, nredo=1):
    """Assign each unit vector to one of ``k`` spherical k-means clusters.

    Parameters
    ----------
    embeddings : array-like of shape (n, d)
        Unit-normalised embeddings.
    k : int
        Number of clusters, 1 <= k <= n.
    seed : int, default 0
        Seed of the initialisation (k distinct rows drawn at random).
    niter : int, default 25
        Most Lloyd iterations (fewer when the assignment stops changing).
    nredo : int, default 1
        Restarts (seeds ``[seed, r]``); the run with the highest sum of cosines is kept.

    Returns
    -------
    ndarray of int64, shape (n,)
        Cluster of each row: the centroid of highest exact cosine (ties: the lower cluster).

    Notes
    -----
    An empty cluster takes the row farthest from its own centroid (lowest cosine, ties: lower
    row) among clusters of two rows or more, so every cluster keeps at least one row.
    """
    x = as_embeddings(embeddings)
    n, d = x.shape
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or not (1 <= k <= n):
        raise TripletkitError(f"k must be a whole number between 1 and the {n} rows, got {k!r}")
    snapped = snap(x)
    best, best_objective = None, -np.inf
    for restart in range(int(nredo)):
        rng = np.random.default_rng([int(seed), restart])
        assign, score = _lloyd(x, snapped, int(k), rng, int(niter))
        objective = math.fsum(score.tolist())
        if objective > best_objective:
            best, best_objective = assign, objective
    return best


def _lloyd(x, snapped, k, rng, niter):
    """One seeded run: (assignment, exact cosine of each row to its centroid)."""
    centroids = x[np.sort(rng.choice(x.shape[0], k, replace=False))]
    assign, score = _nearest(x, snapped, centroids)
    for _ in range(niter):
        centroids = _centroids(x, assign, score, centroids)
        new, score = _nearest(x, snapped, centroids)
        if np.array_equal(new, assign):
            break
        assign = new
    return assign, score


def _nearest(x, snapped, centroids, chunk=4096):
    """Centroid of highest exact cosine for every row (ties: lower centroid), and that cosine.

    faiss pre-selects the ``m`` best centroids by float32 score; a row's choice is final when its
    best exact cosine is above the ``m``-th float32 score plus the slack (no other centroid can
    reach it), else the row is searched again with more centroids.
    """
    n, d = x.shape
    k = centroids.shape[0]
    index = faiss.IndexFlatIP(d)
    index.add(np.ascontiguousarray(centroids, dtype=np.float32))
    cs = snap(centroids)
    eps = slack(d)
    assign = np.empty(n, np.int64)
    score = np.empty(n, np.float64)
    for s in range(0, n, chunk):
        todo = np.arange(s, min(n, s + chunk))
        m = min(k, 4)
        while todo.size:
            top, ids = index.search(x[todo], m)
            exact = np.einsum("ij,ikj->ik", snapped[todo], cs[ids])
            order = np.lexsort((ids, -exact), axis=1)[:, 0]
            pick = np.arange(todo.size)
            done = np.ones(todo.size, bool) if m == k else exact[pick, order] > top[:, -1] + eps
            assign[todo[done]] = ids[pick, order][done]
            score[todo[done]] = exact[pick, order][done]
            todo = todo[~done]
            m = min(k, 4 * m)
    return assign, score


def _centroids(x, assign, score, previous):
    """Re-normalised means of the clusters; empty clusters are first given a far row."""
    k = previous.shape[0]
    assign, score = assign.copy(), score.copy()
    sizes = np.bincount(assign, minlength=k)
    for empty in np.flatnonzero(sizes == 0):
        movable = np.flatnonzero(sizes[assign] >= 2)
        row = movable[np.lexsort((movable, score[movable]))[0]]
        sizes[assign[row]] -= 1
        assign[row] = empty
        sizes[empty] = 1
        score[row] = 1.0  # it is its cluster's centroid now
    order = np.argsort(assign, kind="stable")
    starts = np.flatnonzero(np.r_[True, assign[order][1:] != assign[order][:-1]])
    sums = np.add.reduceat(x[order].astype(np.float64), starts, axis=0)
    norms = np.sqrt(np.einsum("ij,ij->i", sums, sums))
    out = previous.astype(np.float32, copy=True)
    ok = norms > 0  # a cluster whose rows cancel keeps its centroid
    out[ok] = (sums[ok] / norms[ok, None]).astype(np.float32)
    return out


def clustering_metrics(embeddings, labels, *, seed=0, niter=25, nredo=1):
    """Cluster with spherical k-means (k = identities) and compare the clusters with the identities.

    Parameters
    ----------
    embeddings : array-like of shape (n, d)
        Unit-normalised embeddings.
    labels : array-like of shape (n,)
        Identity of each row.
    seed, niter, nredo
        As in :func:`spherical_kmeans`.

    Returns
    -------
    dict
        ``clusters`` (k), ``purity``, ``nmi``, ``ari`` (floats), ``seed``; with one identity,
        ``None`` values, a ``reason`` and a warning (one cluster says nothing).
    """
    x = as_embeddings(embeddings)
    codes, values = as_codes(labels, n=x.shape[0])
    k = values.size
    if k < 2:
        reason = "fewer than 2 identities; clustering agreement is not informative"
        warnings.warn(f"clustering: {reason}", TripletkitWarning, stacklevel=2)
        return {"clusters": int(k), "purity": None, "nmi": None, "ari": None, "seed": int(seed), "reason": reason}
    assign = spherical_kmeans(x, k, seed=seed, niter=niter, nredo=nredo)
    table = _contingency(codes, assign)
    n = codes.size
    return {
        "clusters": int(k),
        "purity": _purity(*table, n),
        "nmi": _nmi(*table, n),
        "ari": _ari(*table, n),
        "seed": int(seed),
    }
