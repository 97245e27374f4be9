"""Tests of tripletkit.metrics.health: brute-force twins, known geometries, the collapse rule."""

import numpy as np
import pytest

from tripletkit._errors import TripletkitError, TripletkitWarning
from tripletkit.metrics import health as H
from _support import clustered_rows, pair_scores


def test_mean_impostor_cosine_matches_every_pair(rng):
    # brute-force twin over every pair of the exact cosines (snapped rows; math.fsum, exactly
    # rounded, then one division), and within float32 noise of the plain float64 product
    import math

    from tripletkit._exact import snap

    x, labels = clustered_rows(rng, 300, 8, 30)
    exact, genuine, _, _ = pair_scores(snap(x), labels)
    brute = math.fsum(exact[~genuine].tolist()) / int((~genuine).sum())
    assert H.mean_impostor_cosine(x, labels) == pytest.approx(brute, abs=1e-15)
    assert H.mean_impostor_cosine(x, labels, block_rows=7) == H.mean_impostor_cosine(x, labels)
    plain, genuine, _, _ = pair_scores(x, labels)
    plain = plain[~genuine].mean()
    assert H.mean_impostor_cosine(x, labels) == pytest.approx(plain, abs=1e-7)


def test_effective_dimension_is_the_participation_ratio_of_the_eigenvalues(rng):
    x = rng.standard_normal((500, 6)) * np.array([3.0, 2.0, 1.0, 0.5, 0.2, 0.1])
    x = (x / np.linalg.norm(x, axis=1, keepdims=True)).astype(np.float32)
    # reference: numpy's eigvalsh of the covariance of the rows on the 2**-20 grid used by the
    # integer arithmetic (and of the raw rows, within that grid's rounding)
    grid = np.rint(x.astype(np.float64) * 2.0**20) / 2.0**20
    lam = np.linalg.eigvalsh(np.cov(grid, rowvar=False))
    brute = lam.sum() ** 2 / (lam**2).sum()
    assert H.effective_dimension(x) == pytest.approx(brute, rel=1e-10)
    assert H.effective_dimension(x, block_rows=33) == H.effective_dimension(x)
    lam = np.linalg.eigvalsh(np.cov(x.astype(np.float64), rowvar=False))
    assert H.effective_dimension(x) == pytest.approx(lam.sum() ** 2 / (lam**2).sum(), rel=1e-5)


def test_effective_dimension_of_known_shapes(rng):
    # spread evenly over d directions: close to d; all along one line (two antipodal points): 1
    iso = rng.standard_normal((20000, 8))
    iso = (iso / np.linalg.norm(iso, axis=1, keepdims=True)).astype(np.float32)
    assert H.effective_dimension(iso) == pytest.approx(8.0, rel=0.02)
    line = np.array([[1.0, 0.0], [-1.0, 0.0]] * 50, np.float32)
    assert H.effective_dimension(line) == pytest.approx(1.0)


def test_collapse_rule():
    assert H.collapsed(1.5, 0.1) is True
    assert H.collapsed(10.0, 0.95) is True
    assert H.collapsed(10.0, 0.1) is False
    assert H.collapsed(None, 0.1) is False
    assert H.collapsed(None, None) is None


def test_health_flags_a_collapsed_run(rng):
    x, labels = clustered_rows(rng, 200, 16, 20)
    out = H.health_metrics(x, labels)
    assert out["collapsed"] is False and "our rule of thumb" in out["rule"]
    # every row nearly the same direction: high impostor cosine, low dimension
    shrunk = np.ones((200, 16)) + 0.01 * rng.standard_normal((200, 16))
    shrunk = (shrunk / np.linalg.norm(shrunk, axis=1, keepdims=True)).astype(np.float32)
    out = H.health_metrics(shrunk, labels)
    assert out["mean_impostor_cosine"] > 0.99 and out["collapsed"] is True


def test_degenerate_and_bad_input(rng):
    x, _ = clustered_rows(rng, 10, 4, 1)
    with pytest.warns(TripletkitWarning, match="health: no impostor pairs"):
        assert H.mean_impostor_cosine(x, np.zeros(10, int)) is None
    with pytest.warns(TripletkitWarning, match="no variance"):
        assert H.effective_dimension(np.tile(x[:1], (5, 1))) is None
    with pytest.raises(TripletkitError, match="L2 norm is not 1"):
        H.mean_impostor_cosine(x * 3, np.arange(10))
    with pytest.raises(TripletkitError, match="at least 2 rows"):
        H.effective_dimension(x[:1])
