"""tripletkit.mining.dense: the dense path writes the bytes the search path writes (overlapping
identities, exact ties that only the row order breaks, suspect duplicates kept or excluded)."""

import numpy as np
import pytest
from _support import clustered_table

from tripletkit.mining import mine
from tripletkit.tables.embeddings import EmbeddingTable
from tripletkit.tables.triplets import duplicates_path

ALL = ("easy", "semi-hard", "hard")


def _exact_ties(seed):
    """30 rows repeated exactly under another label: distances 0 and other exact ties that only
    the row order breaks, plus suspect duplicates."""
    base = clustered_table(seed + 20, identities=15, per=6, spread=1.5)
    rng = np.random.default_rng(seed)
    src = rng.choice(base.n, 30, replace=False)
    labels = np.concatenate([base.labels, (base.labels[src] + rng.integers(1, 15, 30)) % 15])
    X = base.embeddings.astype(np.float64)
    return EmbeddingTable.from_arrays(np.arange(labels.size), labels, np.vstack([X, X[src]]))


@pytest.mark.parametrize("distance", ["squared", "euclidean"])
@pytest.mark.parametrize("select", ["hardest", "random", "distance-weighted"])
@pytest.mark.parametrize("data", ["overlapping", "ties", "ties-excluded"])
def test_dense_path_writes_the_same_bytes(seed, tmp_path, select, distance, data):
    table = clustered_table(seed + 21, identities=20, per=8, spread=1.5) if data == "overlapping" else _exact_ties(seed)
    opts = dict(regimes=ALL, select=select, distance=distance, margin=0.3 if distance == "squared" else 0.15,
                negatives_per_positive=3, seed=7, exclude_duplicates=data == "ties-excluded")
    outs = {}
    for which in ("search", "dense"):
        out = tmp_path / f"{which}.parquet"
        s = mine(table, out, quiet=True, dense=which == "dense", **opts)
        assert s.details["dense_rows"] == (table.n if which == "dense" else 0)
        outs[which] = (out.read_bytes(), duplicates_path(out).read_bytes(), s.to_dict()["regimes"],
                       s.pairs_without_negative, s.suspect_duplicates)
    assert all(v > 0 for v in outs["search"][2].values())
    if data != "overlapping":
        assert outs["search"][4] >= 30
    assert outs["dense"] == outs["search"]
