"""The memory guard is consulted by mine() and score() before the work starts."""

import numpy as np
import pytest

from tripletkit import TripletkitError
from tripletkit.evaluate import score
from tripletkit.mining import mine


@pytest.fixture
def arrays(rng):
    labels = np.repeat(np.arange(20), 5)
    return np.arange(100), labels, rng.normal(size=(100, 16))


def test_mine_refuses_when_memory_is_short(monkeypatch, tmp_path, arrays):
    monkeypatch.setenv("TRIPLETKIT_MEMORY_LIMIT_MB", "1")
    with pytest.raises(TripletkitError, match=r"mining 100 x 16 rows needs about .* use index='ivf'"):
        mine(arrays, out=tmp_path / "t.parquet", quiet=True)
    assert list(tmp_path.iterdir()) == []
    monkeypatch.setenv("TRIPLETKIT_MEMORY_LIMIT_MB", "100000")
    assert mine(arrays, quiet=True).to_dict()["triplets"] > 0


def test_score_refuses_when_memory_is_short(monkeypatch, tmp_path, arrays):
    monkeypatch.setenv("TRIPLETKIT_MEMORY_LIMIT_MB", "1")
    with pytest.raises(TripletkitError, match=r"scoring 100 x 16 rows needs about .*block_rows=\.\.\."):
        score(arrays, out=tmp_path / "r", quiet=True)
    assert list(tmp_path.iterdir()) == []
