"""tripletkit: mine triplets, score checkpoints and choose the margin of identity-embedding models.

The public verbs are the commands of the ``tripletkit`` CLI: :func:`check`, :func:`mine`,
:func:`score`, :func:`sweep`, :func:`run_demo`, and :func:`triplet_loss_report` (``tripletkit loss``).
Heavy modules are imported when a verb is first used, so ``import tripletkit`` stays light.
"""

from ._errors import TripletkitError, TripletkitWarning
from .config import load_config
from .table import EmbeddingTable, check, read_table, write_table

__version__ = "0.1.0"

__all__ = [
    "TripletkitError", "TripletkitWarning", "EmbeddingTable", "check", "read_table", "write_table",
    "load_config", "mine", "score", "sweep", "run_demo", "triplet_loss_report", "fit_head",
    "ProjectionHead", "triplet_loss", "triplet_loss_grad", "batch_all_loss", "batch_hard_loss",
    "REGIMES", "__version__",
]

_LAZY = {
    "mine": "mining", "score": "evaluate", "sweep": "sweep", "run_demo": "demo",
    "triplet_loss_report": "triplets", "fit_head": "head", "ProjectionHead": "head",
    "triplet_loss": "loss", "triplet_loss_grad": "loss", "batch_all_loss": "loss",
    "batch_hard_loss": "loss", "REGIMES": "loss",
}


def __getattr__(name):
    if name in _LAZY:
        import importlib

        value = getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'tripletkit' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(__all__))
