"""tripletkit: mine triplets, score checkpoints and choose the margin of identity-embedding models.

The public verbs are the commands of the ``tripletkit`` CLI, one function each: :func:`check`,
:func:`loss`, :func:`mine`, :func:`score`, :func:`sweep` and :func:`demo`. They and the other
public names are imported lazily, on first use: ``import tripletkit`` loads no numpy, pyarrow or
faiss, so the command starts (and can be interrupted) quickly. No submodule shares a verb's name,
so importing a submodule never hides a verb.
"""

import importlib

from ._blas import hint_before_faiss

hint_before_faiss()  # faiss's OpenBLAS gets kernels this CPU supports (see tripletkit/_blas.py)

from ._errors import TripletkitError, TripletkitWarning  # noqa: E402

__version__ = "0.1.0"

#: The module of each lazily imported public name.
_LAZY = {
    "check": "tables.check", "EmbeddingTable": "tables.embeddings", "read_table": "tables.embeddings",
    "write_table": "tables.embeddings", "loss": "triplet_scores", "triplet_loss": "losses", "triplet_loss_grad": "losses",
    "batch_all_loss": "batch_losses", "batch_hard_loss": "batch_losses", "mine": "mining", "REGIMES": "mining",
    "score": "evaluate", "sweep": "sweeps", "demo": "scenario", "fit_head": "head", "ProjectionHead": "head",
    "load_config": "config", "iter_triplet_batches": "tables.triplets",
}

__all__ = ["TripletkitError", "TripletkitWarning", "__version__", *_LAZY]


def __getattr__(name):
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(__all__))
