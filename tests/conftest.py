import numpy as np
import pytest


@pytest.fixture
def seed():
    """The one seed that test data is drawn from."""
    return 20261201


@pytest.fixture
def rng(seed):
    return np.random.default_rng(seed)
