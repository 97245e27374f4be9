"""tripletkit.head against outside references on a dataset bundled with scikit-learn.

Data: scikit-learn's ``load_digits`` (the test half of the UCI "Optical Recognition of Handwritten
Digits" data set, Alpaydin and Kaynak, 1998): 1797 images of 8 x 8 pixels, ten classes, used here
as ten identities. Ten classes are too few to split by identity, so the split is a stratified
60/40 split of the samples (``sklearn.model_selection.train_test_split``); "held-out" means
samples never trained on.

References compared with:
- the raw L2-normalised pixels;
- ``sklearn.decomposition.PCA`` with 16 components, fitted on the same training samples;
- ``sklearn.neighbors.NeighborhoodComponentsAnalysis`` with 16 components (Goldberger, Roweis,
  Hinton, Salakhutdinov, "Neighbourhood Components Analysis", NIPS 2004), a reference metric
  learner, fitted on the same training samples.

EER comes from ``sklearn.metrics.roc_curve`` on the materialised pairs (every pair of distinct
held-out samples, cosine similarity as the score); Recall@1 from a leave-one-out nearest
neighbour computed with ``sklearn.metrics.pairwise``. Each test names its source in a comment.
"""

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.decomposition import PCA
from sklearn.metrics import roc_curve
from sklearn.metrics.pairwise import cosine_similarity, euclidean_distances
from sklearn.model_selection import train_test_split
from sklearn.neighbors import NeighborhoodComponentsAnalysis

from tripletkit.config import HeadConfig, MiningConfig
from tripletkit.head import fit_head
from tripletkit.metrics.verification import verify_all_pairs
from tripletkit.tables.embeddings import EmbeddingTable

SPLIT_SEED = 0  # fixed random_state of the stratified split
MINING = MiningConfig(regimes=("semi-hard", "hard"), seed=0)
# The margin of FaceNet (Schroff, Kalenichenko, Philbin, CVPR 2015: "alpha is set to 0.2").
MARGIN = 0.2


@pytest.fixture(scope="module")
def digits():
    X, y = load_digits(return_X_y=True)
    X_tr, X_te, y_tr, y_te = train_test_split(X, y, test_size=0.4, stratify=y, random_state=SPLIT_SEED)
    return X_tr, X_te, y_tr, y_te


@pytest.fixture(scope="module")
def heads(digits):
    X_tr, _, y_tr, _ = digits
    train = EmbeddingTable.from_arrays(np.arange(y_tr.size), y_tr, X_tr)
    linear, _ = fit_head(train, MARGIN, HeadConfig(dim=16, hidden=0, epochs=6, seed=0), MINING, quiet=True)
    hidden, _ = fit_head(train, MARGIN, HeadConfig(dim=16, hidden=128, epochs=6, seed=0), MINING, quiet=True)
    return {"linear": linear, "hidden": hidden}


def _sklearn_eer(E, y):
    """EER from sklearn.metrics.roc_curve on every pair of distinct rows (cosine scores).

    The EER is read where FPR (= FMR) and FNR = 1 - TPR (= FNMR) cross, interpolated linearly
    between the two ROC points on either side (the convention of tripletkit's verification module).
    """
    S = cosine_similarity(E)
    iu = np.triu_indices(y.size, 1)
    same = (y[:, None] == y[None, :])[iu]
    fpr, tpr, _ = roc_curve(same, S[iu])
    fnr = 1.0 - tpr
    d = fpr - fnr  # rises from -1 to 1 as the threshold falls
    j = int(np.argmax(d >= 0))
    if d[j] == 0:
        return float(fpr[j])
    lam = -d[j - 1] / (d[j] - d[j - 1])
    return float(fpr[j - 1] + lam * (fpr[j] - fpr[j - 1]))


def _recall_at_1(E, y, metric):
    """Leave-one-out 1-NN: share of rows whose nearest other row has the same label."""
    D = -cosine_similarity(E) if metric == "cosine" else euclidean_distances(E)
    np.fill_diagonal(D, np.inf)
    return float(np.mean(y[np.argmin(D, axis=1)] == y))


def test_sklearn_eer_helper_agrees_with_package(digits):
    # The reference EER above (sklearn.metrics.roc_curve) and the package's verification module
    # measure the same thing on the raw pixels: agreement to 1e-4 (the tolerance of issue 4).
    _, X_te, _, y_te = digits
    E = X_te / np.linalg.norm(X_te, axis=1, keepdims=True)
    ours = verify_all_pairs(E.astype(np.float32), y_te, bootstrap=0)["eer"]
    assert ours == pytest.approx(_sklearn_eer(E, y_te), abs=1e-4)


@pytest.mark.parametrize("kind", ["linear", "hidden"])
def test_head_eer_clearly_below_raw_pixels_and_pca(digits, heads, kind):
    # References: raw L2-normalised pixels, and sklearn.decomposition.PCA(16) fitted on the same
    # training samples; EERs from sklearn.metrics.roc_curve on the materialised held-out pairs.
    X_tr, X_te, y_tr, y_te = digits
    raw = _sklearn_eer(X_te, y_te)
    pca = PCA(n_components=16, random_state=0).fit(X_tr)
    pca_eer = _sklearn_eer(pca.transform(X_te), y_te)
    head_eer = _sklearn_eer(heads[kind].transform(X_te).astype(np.float64), y_te)
    # "Clearly lower": at most 60 % of either reference (common practice, no source; measured
    # values are about 0.08 (linear) and 0.04 (hidden) against 0.19 (PCA) and 0.22 (raw)).
    assert head_eer < 0.6 * pca_eer and head_eer < 0.6 * raw


def test_head_recall_at_1_within_two_points_of_nca(digits, heads):
    # Reference metric learner: sklearn.neighbors.NeighborhoodComponentsAnalysis(n_components=16)
    # (Goldberger et al., NIPS 2004) fitted on the same training samples. NCA is scored with its
    # own metric (Euclidean distance in the projected space) and with cosine; the head must be
    # within 2 points of the better of the two, or above it. The hidden-layer head (one ReLU
    # layer of 128 units, output dimension 16) is the one held to this (measured 0.972 against
    # NCA's 0.975); the linear head is about 2 points below NCA on this split (0.953; measured,
    # not asserted).
    X_tr, X_te, y_tr, y_te = digits
    nca = NeighborhoodComponentsAnalysis(n_components=16, random_state=0).fit(X_tr, y_tr)
    Z = nca.transform(X_te)
    nca_r1 = max(_recall_at_1(Z, y_te, "euclidean"), _recall_at_1(Z, y_te, "cosine"))
    head_r1 = _recall_at_1(heads["hidden"].transform(X_te).astype(np.float64), y_te, "cosine")
    assert head_r1 >= nca_r1 - 0.02
    assert nca_r1 > 0.9  # the reference itself works (about 0.97 on this split)
