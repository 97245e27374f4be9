"""Retrieval metrics against outside references: scikit-learn's 1-NN on the digits, hand rankings."""

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.model_selection import LeaveOneOut, cross_val_score
from sklearn.neighbors import KNeighborsClassifier, NearestNeighbors

from tripletkit.metrics import retrieval_metrics


def test_recall_at_1_is_leave_one_out_1nn_accuracy_on_digits():
    # reference: scikit-learn's bundled digits (UCI optical recognition of handwritten digits),
    # classes as identities. NearestNeighbors.kneighbors() without X leaves each point out of
    # its own neighbours (documented), so the 1-NN prediction is a leave-one-out prediction;
    # the cosine metric matches our inner product of unit rows. The digits have no tie at rank 1.
    x, y = load_digits(return_X_y=True)
    nn = NearestNeighbors(n_neighbors=1, metric="cosine").fit(x)
    pred = y[nn.kneighbors(return_distance=False)[:, 0]]
    loo_accuracy = float(np.mean(pred == y))
    xn = (x / np.linalg.norm(x, axis=1, keepdims=True)).astype(np.float32)
    out = retrieval_metrics(xn, y, ks=(1,))
    assert out["recall_at_k"]["1"] == pytest.approx(loo_accuracy, abs=1e-12)
    assert out["queries"] == len(y)


def test_recall_at_1_equals_knn_classifier_leave_one_out_on_a_digits_sample():
    # reference: sklearn.neighbors.KNeighborsClassifier (1 neighbour, cosine) scored by
    # leave-one-out cross-validation (sklearn.model_selection.LeaveOneOut) on 300 digits
    # (a sample keeps the 300 refits quick); classes as identities
    x, y = load_digits(return_X_y=True)
    pick = np.random.default_rng(7).choice(len(y), 300, replace=False)
    x, y = x[pick], y[pick]
    clf = KNeighborsClassifier(n_neighbors=1, metric="cosine", algorithm="brute")
    loo = float(np.mean(cross_val_score(clf, x, y, cv=LeaveOneOut())))
    xn = (x / np.linalg.norm(x, axis=1, keepdims=True)).astype(np.float32)
    out = retrieval_metrics(xn, y, ks=(1,))
    assert out["skipped_queries"] == 0
    assert out["recall_at_k"]["1"] == pytest.approx(loo, abs=1e-12)


def test_map_at_r_and_r_precision_on_a_hand_computed_ranking():
    # Definitions of Musgrave, Belongie and Lim, "A Metric Learning Reality Check", ECCV 2020.
    # Unit vectors on a circle at these angles (degrees); identities A, B, C and a singleton D.
    angles = np.array([0, 10, 25, 45, 100, 130, 252, 256, 300])
    labels = np.array(["A", "B", "A", "B", "A", "B", "C", "C", "D"])
    rad = np.deg2rad(angles)
    x = np.stack([np.cos(rad), np.sin(rad)], axis=1).astype(np.float32)
    # Rankings by angular distance, worked out by hand (R = 2 for A and B, 1 for C):
    #   q0   A: B A B ...  R-prec 1/2, AP@R = (0 + 1/2)/2 = 1/4, hit in top 3
    #   q10  B: A A B ...  0, 0, hit in top 3
    #   q25  A: B B A ...  0, 0, hit in top 3
    #   q45  B: A B A ...  1/2, 1/4, hit in top 3
    #   q100 A: B B A ...  0, 0, hit in top 3
    #   q130 B: A B A ...  1/2, 1/4, hit in top 3
    #   q252 C: C ...      1, 1, hit at rank 1;   q256 C: the same;   q300 D: R = 0, skipped
    out = retrieval_metrics(x, labels, ks=(1, 3))
    assert out["queries"] == 8 and out["skipped_queries"] == 1
    assert out["r_precision"] == pytest.approx(3.5 / 8, abs=1e-12)
    assert out["map_at_r"] == pytest.approx(2.75 / 8, abs=1e-12)
    assert out["recall_at_k"] == {"1": pytest.approx(2 / 8), "3": pytest.approx(1.0)}
