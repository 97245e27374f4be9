"""Clustering scores against outside references: a textbook worked example and scikit-learn."""

import numpy as np
import pytest
from sklearn.metrics import adjusted_rand_score, normalized_mutual_info_score, rand_score
from sklearn.metrics.cluster import contingency_matrix

from tripletkit.metrics import ari, nmi, purity, rand_index


def test_manning_raghavan_schuetze_worked_example():
    # Manning, Raghavan and Schuetze, "Introduction to Information Retrieval" (2008), section
    # 16.3, the 17-point example (recalled from memory): cluster 1 = 5 x, 1 o; cluster 2 = 1 x,
    # 4 o, 1 diamond; cluster 3 = 2 x, 3 diamond. Published: purity about 0.71, NMI about 0.36,
    # RI about 0.68 (TP = 20, FP = 20, FN = 24, TN = 72, so RI = 92/136).
    clusters = [1] * 6 + [2] * 6 + [3] * 5
    classes = ["x"] * 5 + ["o"] + ["x"] + ["o"] * 4 + ["d"] + ["x"] * 2 + ["d"] * 3
    assert round(purity(classes, clusters), 2) == 0.71
    assert purity(classes, clusters) == 12 / 17
    assert round(nmi(classes, clusters), 2) == 0.36
    assert round(rand_index(classes, clusters), 2) == 0.68
    assert rand_index(classes, clusters) == 92 / 136


@pytest.mark.parametrize("n,k_true,k_pred", [(50, 3, 4), (400, 20, 20), (1000, 2, 50), (30, 30, 1)])
def test_against_sklearn_on_random_assignments(n, k_true, k_pred, rng):
    # reference: sklearn.metrics.normalized_mutual_info_score (arithmetic mean, its default),
    # adjusted_rand_score, rand_score; purity from sklearn.metrics.cluster.contingency_matrix
    for _ in range(5):
        t = rng.integers(0, k_true, n)
        p = rng.integers(0, k_pred, n)
        assert nmi(t, p) == pytest.approx(normalized_mutual_info_score(t, p), abs=1e-12)
        assert ari(t, p) == pytest.approx(adjusted_rand_score(t, p), abs=1e-12)
        assert rand_index(t, p) == pytest.approx(rand_score(t, p), abs=1e-12)
        cm = contingency_matrix(t, p)
        assert purity(t, p) == pytest.approx(cm.max(axis=0).sum() / n, abs=1e-15)


def test_against_sklearn_on_edge_partitions():
    # reference: scikit-learn's conventions for single-block and all-singleton partitions
    one, alone, two = [0] * 6, list(range(6)), [0, 0, 0, 1, 1, 1]
    for t, p in [(one, one), (one, alone), (alone, alone), (two, one), (alone, two)]:
        assert nmi(t, p) == pytest.approx(normalized_mutual_info_score(t, p), abs=1e-12)
        assert ari(t, p) == pytest.approx(adjusted_rand_score(t, p), abs=1e-12)
