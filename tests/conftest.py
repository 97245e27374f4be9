import sys
from pathlib import Path

import numpy as np
import pytest

# Shared helpers import as ``from _support import ...`` from every folder of tests/.
sys.path.insert(0, str(Path(__file__).resolve().parent))


@pytest.fixture
def seed():
    """The one seed that test data is drawn from."""
    return 20261201


@pytest.fixture
def rng(seed):
    return np.random.default_rng(seed)
