"""Fixtures of the report tests: the reports of a small seeded table and of a degenerate one (test data only)."""

import numpy as np
import pytest

from tripletkit.config import EvaluationConfig
from tripletkit.evaluate import score


@pytest.fixture(scope="module")
def report():
    """The report of a small seeded table with two subgroups (test data only)."""
    rng = np.random.default_rng(20261201)
    labels = np.repeat(np.arange(10), 6)
    emb = (rng.normal(size=(10, 8))[labels] + 0.7 * rng.normal(size=(60, 8))).astype(np.float32)
    groups = np.where(labels < 5, "east", "west").astype(object)
    return score((np.arange(60), labels, emb, groups), config=EvaluationConfig(bootstrap=20, fmr=(0.001, 0.01, 0.05)),
                 quiet=True)


@pytest.fixture(scope="module")
def degenerate_report():
    """The report of a table with a single identity: no impostor pairs, no curves."""
    with pytest.warns(Warning):
        return score((np.arange(4), np.zeros(4, np.int64), np.eye(4, dtype=np.float32)), quiet=True,
                     config=EvaluationConfig(bootstrap=0))
