"""Metrics of an embedding checkpoint on held-out identities: pure functions on numpy arrays.

Verification (:mod:`.verification`: ROC, DET, EER, FNMR at FMR with identity-level intervals, AUC;
built on the counting core of :mod:`.rates`, the all-pairs plan of :mod:`.allpairs` and the
bootstrap of :mod:`.bootstrap`), retrieval (Recall@K, R-precision, MAP@R), clustering (purity, NMI,
ARI of spherical k-means) and health (mean impostor cosine, effective dimension, collapse flag).
No function here reads or writes a file; the all-pairs verification runs its plan with the engine it
is given (threads of this process by default).
"""

from .clustering import ari, clustering_metrics, contingency, nmi, purity, rand_index, spherical_kmeans
from .health import collapsed, effective_dimension, health_metrics, mean_impostor_cosine
from .retrieval import retrieval_metrics
from .rates import ScoreCounts, auc, count_scores, det_points, equal_error_rate, error_rates, fnmr_at_fmr, roc_points
from .verification import DEFAULT_FMR_TARGETS, verify_all_pairs, verify_pairs, verify_scores

__all__ = [
    "DEFAULT_FMR_TARGETS",
    "ScoreCounts",
    "ari",
    "auc",
    "clustering_metrics",
    "collapsed",
    "contingency",
    "count_scores",
    "det_points",
    "effective_dimension",
    "equal_error_rate",
    "error_rates",
    "fnmr_at_fmr",
    "health_metrics",
    "mean_impostor_cosine",
    "nmi",
    "purity",
    "rand_index",
    "retrieval_metrics",
    "roc_points",
    "spherical_kmeans",
    "verify_all_pairs",
    "verify_pairs",
    "verify_scores",
]
