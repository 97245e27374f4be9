"""tripletkit: mine triplets, score checkpoints and choose the margin of identity-embedding models."""

from ._errors import TripletkitError
from .table import EmbeddingTable, check, read_table, write_table
from .config import load_config

__version__ = "0.1.0"

__all__ = ["TripletkitError", "EmbeddingTable", "check", "read_table", "write_table", "load_config",
           "__version__"]
