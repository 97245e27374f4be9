"""Test-data helpers shared by the test files (not part of the package): one copy of each.

- :func:`four_squares` and :func:`lattice_table`: unit rows of integers / scale, whose products
  are exact in float32 and float64 alike (any summation order gives the same bits);
- :func:`clustered_rows`: seeded unit rows scattered around one random centre per identity;
- :func:`pair_scores`: every pair's float64 score with its genuine flag, the brute force of
  verification;
- :func:`distances` and :func:`regime_name`: the brute force of the regime boundaries;
- :func:`identity_clusters`: rows in blocks of one identity around its centre (sweeps);
- :func:`check_image`: a PNG file that holds a drawing (reports).
"""

import math

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


def pair_scores(x, labels):
    """(scores, genuine, i, j) of every pair i < j: float64 products of the rows as given."""
    s = x.astype(np.float64) @ x.astype(np.float64).T
    i, j = np.triu_indices(len(x), 1)
    return s[i, j], labels[i] == labels[j], i, j


def distances(rows, distance):
    """(distance matrix, cosine matrix) of float64 unit rows: squared ``2 - 2 cos`` or its root."""
    u = np.asarray(rows, dtype=np.float64)
    cos = u @ u.T
    sq = np.maximum(2.0 - 2.0 * cos, 0.0)
    return (sq if distance == "squared" else np.sqrt(sq)), cos


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
