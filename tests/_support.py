"""Test-data helpers shared by the test files (not part of the package): one copy of each.

- :func:`four_squares` and :func:`lattice_table`: unit rows of integers / scale, whose products
  are exact in float32 and float64 alike (any summation order gives the same bits);
- :func:`clustered_rows`: seeded unit rows scattered around one random centre per identity;
- :func:`grouped_rows` and :func:`traced_peak`: a table of equal-sized identities, and the peak of
  the numpy allocations of a call (what the memory estimates are checked against);
- :func:`pair_scores`: every pair's float64 score with its genuine flag, the brute force of
  verification;
- :func:`distances`, :func:`distance_of_cosine` and :func:`regime_name`: the brute force of the
  regime boundaries;
- :func:`clustered_table`: identities as clusters whose families overlap (every regime occurs);
- :func:`regime_candidates`, :func:`all_pairs`, :func:`chosen_negatives` and
  :func:`check_every_triplet`: the brute force of mining, sharing nothing with the miner;
- :func:`identity_clusters`: rows in blocks of one identity around its centre (sweeps);
- :func:`check_image`: a PNG file that holds a drawing (reports);
- :func:`unit64`, :func:`unit_distance`, :func:`triplet_term` and :func:`central_difference`: the
  slow, obvious twins of the losses (one triplet at a time, finite differences).
"""

import math
import tracemalloc
import warnings

import numpy as np


def four_squares(rem):
    """Four non-negative integers whose squares sum to ``rem`` (Lagrange: they always exist)."""
    for a in range(math.isqrt(rem) + 1):
        for b in range(a + 1):
            r2 = rem - a * a - b * b
            if r2 < 0:
                break
            for c in range(b + 1):
                r3 = r2 - c * c
                if r3 < 0:
                    break
                e = math.isqrt(r3)
                if e * e == r3 and e <= c:
                    return a, b, c, e
    raise AssertionError(rem)


def lattice_table(rng, n, k, d=12, centre=20, spread=12, scale=64):
    """Unit rows of integers / ``scale`` (a power of two), completed to norm 1 by four squares.

    Identities have integer centres in [-centre, centre]; rows scatter by up to ``spread``.
    Every product is a multiple of ``scale**-2``: scale=64 gives scores on a grid of 2**-12
    (few ties), scale=4 a grid of 1/16 (many ties). Returns (float32 rows (n, d + 4), labels).
    """
    centres = rng.integers(-centre, centre + 1, size=(k, d))
    labels = rng.integers(0, k, size=n)
    rows = np.zeros((n, d + 4))
    for r in range(n):
        while True:
            v = centres[labels[r]] + rng.integers(-spread, spread + 1, size=d)
            if 0 < (v**2).sum() <= scale * scale:
                break
        rows[r, :d] = v
        rows[r, d:] = four_squares(int(scale * scale - (v**2).sum()))
    return (rows / scale).astype(np.float32), labels


def clustered_rows(rng, n, d, k, noise=1.0, labels=None):
    """(float32 unit rows (n, d), labels): a standard normal centre per identity plus noise.

    The identities are drawn at random unless ``labels`` (n,) gives them.
    """
    centres = rng.standard_normal((k, d))
    if labels is None:
        labels = rng.integers(0, k, n)
    x = centres[labels] + noise * rng.standard_normal((n, d))
    return (x / np.linalg.norm(x, axis=1, keepdims=True)).astype(np.float32), labels


def grouped_rows(rng, n, d, per=20, noise=0.3):
    """(ids, labels, raw rows (n, d)): ``n // per`` identities of ``per`` rows around normal centres."""
    k = n // per
    labels = np.repeat(np.arange(k), per)
    X = rng.normal(size=(k, d))[labels] + noise * rng.normal(size=(n, d))
    return np.arange(n), labels, X


def traced_peak(fn):
    """Peak bytes that ``tracemalloc`` traces while ``fn()`` runs (warnings silenced)."""
    tracemalloc.start()
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fn()
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def pair_scores(x, labels):
    """(scores, genuine, i, j) of every pair i < j: float64 products of the rows as given."""
    s = x.astype(np.float64) @ x.astype(np.float64).T
    i, j = np.triu_indices(len(x), 1)
    return s[i, j], labels[i] == labels[j], i, j


def distance_of_cosine(cos, distance):
    """Distances of unit vectors from their cosines: squared ``2 - 2 cos`` (clipped at 0) or its root."""
    sq = np.maximum(2.0 - 2.0 * np.asarray(cos, dtype=np.float64), 0.0)
    return sq if distance == "squared" else np.sqrt(sq)


def distances(rows, distance):
    """(distance matrix, cosine matrix) of unit rows, from one float64 Gram matrix."""
    u = np.asarray(rows, dtype=np.float64)
    cos = u @ u.T
    return distance_of_cosine(cos, distance), cos


def regime_name(d_ap, d_an, margin):
    """The regime of one triplet by the definitions (DESIGN.md), written out."""
    if d_an < d_ap:
        return "hard"
    if d_an < d_ap + margin:
        return "semi-hard"
    return "easy"


# ---------------------------------------------------------------------------------------------
# sweeps and their paired comparison
# ---------------------------------------------------------------------------------------------
def identity_clusters(rng, identities, per, d, noise, first_label=0, centres=None):
    """(labels, rows, centres): ``per`` rows around a standard normal centre per identity (not normalised).

    Labels run ``first_label, first_label + 1, ...`` in blocks of ``per``; pass ``centres`` to draw
    another model's rows of the same identities.
    """
    centres = rng.normal(size=(identities, d)) if centres is None else centres
    labels = np.repeat(np.arange(identities), per)
    rows = centres[labels] + noise * rng.normal(size=(labels.size, d))
    return labels + first_label, rows, centres


# ---------------------------------------------------------------------------------------------
# reports
# ---------------------------------------------------------------------------------------------
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def check_image(path, min_width=700, min_height=300):
    """Assert that ``path`` is a PNG of at least the given size holding a drawing (not a blank canvas)."""
    import struct
    from pathlib import Path

    import matplotlib.image

    data = Path(path).read_bytes()
    assert data[:8] == PNG_SIGNATURE, f"{path} is not a PNG"
    assert data[12:16] == b"IHDR"
    width, height = struct.unpack(">II", data[16:24])  # from the IHDR chunk
    assert width >= min_width and height >= min_height
    pixels = matplotlib.image.imread(str(path))
    assert pixels.shape[:2] == (height, width)
    # something was drawn: many distinct colours, not a blank canvas
    flat = (pixels[..., :3] * 255).astype(np.uint8).reshape(-1, 3)
    assert len(np.unique(flat, axis=0)) > 20


# mining: a table with every regime, and the brute force every mined triplet is checked against
# ---------------------------------------------------------------------------------------------
def clustered_table(seed, identities=30, per=10, dim=16, spread=0.9, family=3, family_spread=1.0, singletons=0):
    """An EmbeddingTable of identities as clusters; identities of one family share a nearby
    centre (so they overlap), and ``singletons`` rows of their own identity come last."""
    from tripletkit.tables.embeddings import EmbeddingTable

    rng = np.random.default_rng(seed)
    fam = rng.standard_normal((max(1, identities // family), dim))
    fam /= np.linalg.norm(fam, axis=1, keepdims=True)
    centres = fam[np.arange(identities) % fam.shape[0]] + family_spread * rng.standard_normal((identities, dim)) / np.sqrt(dim)
    sizes = np.full(identities, per)
    labels = np.repeat(np.arange(identities), sizes)
    X = centres[labels] + spread * rng.standard_normal((labels.size, dim)) / np.sqrt(dim)
    if singletons:
        labels = np.concatenate([labels, identities + np.arange(singletons)])
        X = np.vstack([X, rng.standard_normal((singletons, dim))])
    return EmbeddingTable.from_arrays(np.arange(labels.size) * 3 + 7, labels, X)


def regime_candidates(labels, D, a, p, regime, margin, C=None, exclude_above=None):
    """Rows of another identity in ``regime`` for the pair (a, p), sorted by (distance, row).

    ``D`` and ``C`` are the distance and cosine matrices of :func:`distances`; with
    ``exclude_above``, rows whose cosine with ``a`` exceeds it (suspect duplicates) are left out.
    """
    other = np.flatnonzero(labels != labels[a])
    d = D[a, other]
    if regime == "hard":
        ok = d < D[a, p]
    elif regime == "semi-hard":
        ok = (d >= D[a, p]) & (d < D[a, p] + margin)
    else:
        ok = d >= D[a, p] + margin
    if exclude_above is not None:
        ok &= ~(C[a, other] > exclude_above)
    rows = other[ok]
    return rows[np.lexsort((rows, D[a, rows]))]


def all_pairs(labels):
    """Every ordered same-label pair of rows (what the miner draws when positives_per_anchor is large)."""
    out = []
    for lab in np.unique(labels):
        rows = np.flatnonzero(labels == lab)
        for a in rows:
            for p in rows:
                if a != p:
                    out.append((a, p))
    return out


def chosen_negatives(summary):
    """{(anchor row, positive row, regime name): [negative rows in output order]} of a mining summary."""
    from tripletkit.mining.regimes import REGIMES

    tr = summary.triplets
    res = {}
    for a, p, n, r in zip(tr["anchor"], tr["positive"], tr["negative"], tr["regime"]):
        res.setdefault((int(a), int(p), REGIMES[r]), []).append(int(n))
    return res


def check_every_triplet(table, summary, margin, distance):
    """Labels, stored distances, violation and regime of every triplet of a mining summary, by
    brute force; returns the distance matrix."""
    from tripletkit.mining.regimes import REGIMES

    D, _ = distances(table.embeddings, distance)
    tr = summary.triplets
    a, p, n = tr["anchor"], tr["positive"], tr["negative"]
    assert np.array_equal(table.ids[a], tr["anchor_id"])
    assert np.all(table.labels[a] == table.labels[p])
    assert np.all(table.labels[a] != table.labels[n])
    assert np.all(a != p)
    np.testing.assert_allclose(tr["d_ap"], D[a, p], rtol=0, atol=2e-6)
    np.testing.assert_allclose(tr["d_an"], D[a, n], rtol=0, atol=2e-6)
    np.testing.assert_allclose(tr["violation"], D[a, p] - D[a, n] + margin, rtol=0, atol=4e-6)
    want = [regime_name(x, y, margin) for x, y in zip(D[a, p], D[a, n])]
    assert [REGIMES[c] for c in tr["regime"]] == want
    # no negative twice for one (pair, regime)
    key = np.stack([a, p, n, tr["regime"]], axis=1)
    assert np.unique(key, axis=0).shape[0] == key.shape[0]
    return D


def unit64(x):
    x = np.asarray(x, dtype=np.float64)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def unit_distance(u, v, distance):
    sq = float(np.sum((u - v) ** 2))
    return sq if distance == "squared" else math.sqrt(sq)


def triplet_term(d_ap, d_an, margin, soft):
    if soft:
        return math.log1p(math.exp(d_ap - d_an))
    return max(0.0, d_ap - d_an + margin)


def central_difference(f, X, eps=1e-6):
    g = np.zeros_like(X)
    for idx in np.ndindex(X.shape):
        up, down = X.copy(), X.copy()
        up[idx] += eps
        down[idx] -= eps
        g[idx] = (f(up) - f(down)) / (2 * eps)
    return g
