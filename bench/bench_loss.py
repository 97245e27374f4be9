"""Benchmark: the triplet loss against the plain numpy line on unit rows.

Usage: python bench/bench_loss.py [--rows 1000000] [--dim 128] [--repeats 3]

On unit float32 rows A, P, N the plain line is
``np.maximum(2 * (einsum(A, N) - einsum(A, P)) + margin, 0)`` (row-wise einsum). Each figure is
the best of interleaved repeats, and its ratio to the plain line measured in the same run:
triplet_loss, triplet_loss_grad, and score_triplets (ids looked up in a table) against a numpy
gather of the rows followed by the same line. Memory: the peak of the numpy allocations of one
call (tracemalloc), as a share of the three inputs' bytes.
"""

from __future__ import annotations

import argparse
import os
import time
import tracemalloc

import numpy as np


def _unit(rng, n, d):
    x = rng.standard_normal((n, d), dtype=np.float32)
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    return x


def _best(fn, repeats):
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def _peak(fn):
    tracemalloc.start()
    try:
        fn()
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--dim", type=int, default=128)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args(argv)
    from tripletkit import EmbeddingTable, triplet_loss, triplet_loss_grad
    from tripletkit.triplet_scores import score_triplets

    rng = np.random.default_rng(0)
    n, d = args.rows, args.dim
    A, P, N = (_unit(rng, n, d) for _ in range(3))
    inputs = 3 * A.nbytes
    margin = 0.2

    def plain():
        return np.maximum(2 * (np.einsum("ij,ij->i", A, N) - np.einsum("ij,ij->i", A, P)) + margin, 0)

    # score_triplets: a table of the rows and triplets given by ids
    table = EmbeddingTable.from_arrays(np.arange(n), np.arange(n) // 4, A)
    E = table.embeddings
    ia, ip, ineg = (rng.integers(0, n, n) for _ in range(3))
    ip = np.where(ia // 4 == ip // 4, ip, (ia // 4) * 4 + (ia + 1) % 4)  # a positive: same identity
    ip = np.where(ip == ia, (ia // 4) * 4 + (ia + 1) % 4, ip)
    ineg = np.where(ineg // 4 == ia // 4, (ineg + 4) % n, ineg)  # a negative: another identity

    def gathered():
        a, p, q = E[ia], E[ip], E[ineg]
        return np.maximum(2 * (np.einsum("ij,ij->i", a, q) - np.einsum("ij,ij->i", a, p)) + margin, 0)

    runs = {
        "plain numpy line": plain,
        "triplet_loss": lambda: triplet_loss(A, P, N, margin=margin),
        "triplet_loss_grad": lambda: triplet_loss_grad(A, P, N, margin=margin),
        "gather + numpy line": gathered,
        "score_triplets (ids)": lambda: score_triplets(table, ia, ip, ineg, margin=margin),
    }
    best = {name: float("inf") for name in runs}
    for _ in range(args.repeats):  # interleaved: each repeat runs every path once
        for name, fn in runs.items():
            best[name] = min(best[name], _best(fn, 1))
    peaks = {name: _peak(runs[name]) for name in ("plain numpy line", "triplet_loss", "triplet_loss_grad")}
    print(f"{n:,} x {d} unit float32 rows, best of {args.repeats} interleaved runs; load average "
          f"{os.getloadavg()[0]:.2f}\n")
    print("| path | seconds | ratio | peak numpy allocations / inputs |")
    print("|---|---:|---:|---:|")
    for name in runs:
        ref = best["gather + numpy line"] if name.startswith(("gather", "score")) else best["plain numpy line"]
        peak = f"{peaks[name] / inputs:.2f}" if name in peaks else ""
        print(f"| {name} | {best[name]:.3f} | {best[name] / ref:.2f}x | {peak} |")


if __name__ == "__main__":
    main()
