"""tripletkit: mine triplets, score checkpoints and choose the margin of identity-embedding models.

The public verbs are the commands of the ``tripletkit`` CLI: :func:`check`, :func:`mine`,
:func:`score`, :func:`sweep`, :func:`run_demo`, and :func:`triplet_loss_report` (``tripletkit loss``).
"""

from ._blas import hint_openblas_coretype

hint_openblas_coretype()  # before anything imports faiss (see tripletkit/_blas.py)

from ._errors import TripletkitError, TripletkitWarning  # noqa: E402
from .config import load_config  # noqa: E402
from .table import EmbeddingTable, check, read_table, write_table  # noqa: E402

__version__ = "0.1.0"

__all__ = [
    "TripletkitError", "TripletkitWarning", "EmbeddingTable", "check", "read_table", "write_table",
    "load_config", "mine", "score", "sweep", "run_demo", "triplet_loss_report", "fit_head",
    "ProjectionHead", "triplet_loss", "triplet_loss_grad", "batch_all_loss", "batch_hard_loss",
    "REGIMES", "__version__",
]

# Imported eagerly: a lazy ``sweep`` would be replaced by the submodule of the same name as
# soon as anything imported ``tripletkit.sweep``.
from .demo import run_demo  # noqa: E402
from .evaluate import score  # noqa: E402
from .head import ProjectionHead, fit_head  # noqa: E402
from .loss import REGIMES, batch_all_loss, batch_hard_loss, triplet_loss, triplet_loss_grad  # noqa: E402
from .mining import mine  # noqa: E402
from .sweep import sweep  # noqa: E402
from .triplets import triplet_loss_report  # noqa: E402
