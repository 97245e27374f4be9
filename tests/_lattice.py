"""Test-data helpers shared by several test files (not part of the package)."""

import math


def four_squares(rem):
    """Four non-negative integers whose squares sum to ``rem`` (Lagrange: they always exist).

    Used to build unit rows of integers / scale whose float32 dot products are exact.
    """
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
