"""tripletkit: mine triplets, score checkpoints and choose the margin of identity-embedding models.

The public verbs are the commands of the ``tripletkit`` CLI: :func:`check`, :func:`mine`,
:func:`score`, :func:`sweep`, :func:`run_demo`, and :func:`triplet_loss_report` (``tripletkit loss``).

They are imported lazily, on first use: ``import tripletkit`` loads no numpy, pyarrow or faiss,
so the command starts (and can be interrupted) quickly.
"""

import importlib
import sys
import types

from ._blas import hint_before_faiss

hint_before_faiss()  # faiss's OpenBLAS gets kernels this CPU supports (see tripletkit/_blas.py)

from ._errors import TripletkitError, TripletkitWarning  # noqa: E402

__version__ = "0.1.0"

__all__ = [
    "TripletkitError", "TripletkitWarning", "EmbeddingTable", "check", "read_table", "write_table",
    "load_config", "mine", "score", "sweep", "run_demo", "triplet_loss_report", "fit_head",
    "ProjectionHead", "triplet_loss", "triplet_loss_grad", "batch_all_loss", "batch_hard_loss",
    "REGIMES", "__version__",
]

#: The module of each lazily imported public name.
_LAZY = {
    "EmbeddingTable": "table", "check": "table", "read_table": "table", "write_table": "table",
    "load_config": "config", "mine": "mining", "score": "evaluate", "sweep": "sweep", "run_demo": "demo",
    "triplet_loss_report": "triplets", "fit_head": "head", "ProjectionHead": "head", "triplet_loss": "loss",
    "triplet_loss_grad": "loss", "batch_all_loss": "loss", "batch_hard_loss": "loss", "REGIMES": "loss",
}


def __getattr__(name):
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(__all__))


class _Package(types.ModuleType):
    """The package module: a public verb keeps its name when the submodule of the same name loads.

    Importing ``tripletkit.sweep`` (the module) binds it to the package attribute ``sweep``; the
    public function :func:`sweep` keeps that name instead (``importlib.import_module`` still
    returns the module).
    """

    def __setattr__(self, name, value):
        if name in _LAZY and isinstance(value, types.ModuleType):
            return
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Package
