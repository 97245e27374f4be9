"""Benchmark of all-pairs verification (tripletkit.metrics.verification.verify_all_pairs).

(a) 8,000 rows: our blocked path against materialising every pair and calling
    sklearn.metrics.roc_curve, side by side in one run; FNMR at each FMR target must be identical
    (asserted). The rows are integer vectors / 4096 with squared norm exactly 4096**2, so every
    float32 product is exact and both paths see the very same scores whatever the order of
    summation (with ordinary floats a blocked and a one-shot matrix product can differ in the
    last bit, and an operating point by a pair).
(b) 50,000 x 128 (1.25e9 pairs): peak memory, and the pair rate as a fraction of this machine's
    own float32 matrix-product rate, measured in the same run on the same block shapes.

Run:  python bench/bench_verification.py [--rows-a 8000] [--rows-b 50000] [--skip-b] [--repeats 3]
Prints a markdown snippet for docs/benchmarks.md.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import resource
import subprocess
import sys
import time
import tracemalloc

import numpy as np
from sklearn.metrics import roc_curve

from tripletkit.metrics.allpairs import Blocks, block_size, workers_for
from tripletkit.metrics.verification import verify_all_pairs

TARGETS = (1e-4, 1e-3, 1e-2)
DEFAULT = "defaults (200 bootstrap replicates, exact_auc='auto')"


def exact_rows(rng, n, d, identities, scale=4096):
    """Clustered unit rows of integers / scale with exactly unit norm (exact float32 products)."""
    main = d - 5
    centres = rng.normal(0, 250, size=(identities, main))
    labels = np.repeat(np.arange(identities), int(math.ceil(n / identities)))[:n]
    v = np.rint(centres[labels] + rng.normal(0, 220, size=(n, main))).astype(np.int64)
    sq = (v**2).sum(axis=1)
    too_big = sq > scale * scale - 1
    v[too_big] = (v[too_big] * 0.7).astype(np.int64)
    sq = (v**2).sum(axis=1)
    rows = np.zeros((n, d), np.int64)
    rows[:, :main] = v
    for r in range(n):
        rem = scale * scale - int(sq[r])
        a = math.isqrt(rem)
        rest = rem - a * a  # < 2a + 1: a sum of four small squares
        rows[r, main] = a
        rows[r, main + 1 :] = _four_squares(rest)
    assert np.all((rows**2).sum(axis=1) == scale * scale)
    return (rows / scale).astype(np.float32), labels


def _four_squares(rem):
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
    raise ValueError(rem)


def sklearn_fnmr(x, labels):
    """Materialise every pair, call roc_curve, read FNMR at each FMR target off its arrays."""
    s = x @ x.T
    i, j = np.triu_indices(len(x), 1)
    scores = s[i, j]
    del s
    y = labels[i] == labels[j]
    del i, j
    fpr, tpr, _ = roc_curve(y, scores, drop_intermediate=False)
    return {t: 1.0 - tpr[np.flatnonzero(fpr <= t)[-1]] for t in TARGETS}, scores.size


def _timed(fn):
    """Wall time of one call of ``fn`` and its result."""
    t0 = time.perf_counter()
    out = fn()
    return time.perf_counter() - t0, out


def part_a(rows, rng, repeats):
    x, labels = exact_rows(rng, rows, 128, rows // 10)
    verify_all_pairs(x, labels, fmr_targets=TARGETS, bootstrap=0)  # warm-up: imports, thread pools
    t_ours = t_one = t_full = t_ref = math.inf
    # interleaved, so that a change in the machine's load hits every path alike
    for _ in range(repeats):
        t, ours = _timed(lambda: verify_all_pairs(x, labels, fmr_targets=TARGETS, bootstrap=0))
        t_ours = min(t_ours, t)
        t, _ = _timed(lambda: verify_all_pairs(x, labels, fmr_targets=TARGETS, bootstrap=0, workers=1))
        t_one = min(t_one, t)
        t, full = _timed(lambda: verify_all_pairs(x, labels, fmr_targets=TARGETS, bootstrap=200))
        t_full = min(t_full, t)
        t, (ref, pairs) = _timed(lambda: sklearn_fnmr(x, labels))
        t_ref = min(t_ref, t)
    g = ours["genuine_pairs"]
    for t in TARGETS:
        got = ours["fnmr_at_fmr"][np.format_float_positional(t, trim="-")]["fnmr"]
        # identical false non-match counts (the rates differ only in how 1 - TPR rounds)
        assert round(got * g) == round(ref[t] * g) and abs(got - ref[t]) < 1e-12, (t, got, ref[t])
    return {"rows": rows, "pairs": pairs, "ours": t_ours, "ours_one": t_one, "ours_ci": t_full, "sklearn": t_ref,
            "fnmr": {t: ref[t] for t in TARGETS}, "auc_exact": full["auc_exact"], "repeats": repeats,
            "workers": _workers(x, labels)}


def _workers(x, labels):
    """Worker threads verify_all_pairs chooses for ``x`` with the default budget."""
    budget = 256 * 2**20
    return workers_for(len(x), block_size(len(x), None, budget), budget)


def clustered_rows(rng, n, d, identities):
    centres = rng.standard_normal((identities, d)).astype(np.float32)
    labels = np.repeat(np.arange(identities), int(math.ceil(n / identities)))[:n]
    x = centres[labels] + 1.2 * rng.standard_normal((n, d)).astype(np.float32)
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    return np.ascontiguousarray(x, dtype=np.float32), labels


def matmul_rate(x, labels, memory_budget):
    """Pairs per second of the bare float32 products of the same blocks (no counting)."""
    blocks = Blocks(x, labels, None, block_size(len(x), None, memory_budget))
    n, b = blocks.n, blocks.b
    buf = np.empty(b * n, np.float32)
    t0 = time.perf_counter()
    for r0 in range(0, n, b):
        r1 = min(n, r0 + b)
        s = buf[: (r1 - r0) * (n - r0)].reshape(r1 - r0, n - r0)
        np.matmul(blocks.xs[r0:r1], blocks.xs[r0:].T, out=s)
    seconds = time.perf_counter() - t0
    return n * (n - 1) / 2 / seconds, seconds, b


def part_b(rows, seed):
    x, labels = clustered_rows(np.random.default_rng(seed), rows, 128, rows // 10)
    pairs = rows * (rows - 1) // 2
    budget = 256 * 2**20
    rate, t_mm, block = matmul_rate(x, labels, budget)
    runs = {}
    for name, kw in [(DEFAULT, {}),
                     ("no bootstrap", {"bootstrap": 0}),
                     ("no bootstrap, no AUC refinement", {"bootstrap": 0, "exact_auc": False}),
                     ("200 bootstrap replicates, exact AUC", {"exact_auc": True})]:
        t0 = time.perf_counter()
        out = verify_all_pairs(x, labels, fmr_targets=TARGETS, memory_budget=budget, **kw)
        runs[name] = (time.perf_counter() - t0, out)
    mem = json.loads(subprocess.run([sys.executable, __file__, "--memory-child", str(rows), str(seed)],
                                    check=True, capture_output=True, text=True).stdout)
    return {"rows": rows, "pairs": pairs, "matmul_rate": rate, "matmul_seconds": t_mm, "block": block,
            "runs": runs, "input": x.nbytes, **mem}


def _peak_rss():
    """Peak resident set size of this process in bytes (Linux VmHWM; ru_maxrss elsewhere).

    ru_maxrss survives fork and exec on Linux, so in a child it would report the parent's peak.
    """
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def memory_child(rows, seed):
    """In a fresh process: peak memory of one default run (traced allocations and process RSS)."""
    x, labels = clustered_rows(np.random.default_rng(seed), rows, 128, rows // 10)
    before = _peak_rss()
    tracemalloc.start()
    verify_all_pairs(x, labels, fmr_targets=TARGETS, memory_budget=256 * 2**20)
    _, traced = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    print(json.dumps({"traced_peak": traced, "rss_before": before, "maxrss": _peak_rss()}))


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows-a", type=int, default=8000)
    ap.add_argument("--rows-b", type=int, default=50000)
    ap.add_argument("--skip-b", action="store_true")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--repeats", type=int, default=3, help="runs of each path in (a); the best is shown")
    ap.add_argument("--memory-child", nargs=2, type=int, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.memory_child:
        memory_child(*args.memory_child)
        return
    rng = np.random.default_rng(args.seed)
    load0 = os.getloadavg()[0]
    a = part_a(args.rows_a, rng, args.repeats)
    lines = [
        "## Verification over all pairs",
        "",
        f"Machine: {platform.machine()}, {os.cpu_count()} CPUs, numpy {np.__version__}; "
        "`python bench/bench_verification.py`. LOAD_LINE",
        "",
        f"### (a) {a['rows']:,} rows x 128 ({a['pairs']:,} pairs), identical FNMR at FMR (asserted)",
        "",
        f"Best of {a['repeats']} interleaved runs of each path; `verify_all_pairs` ran {a['workers']} worker "
        "threads unless shown otherwise.",
        "",
        "| path | seconds | ratio |",
        "|---|---:|---:|",
        f"| materialise every pair + `sklearn.metrics.roc_curve` | {a['sklearn']:.2f} | 1.0 |",
        f"| `verify_all_pairs`, no bootstrap | {a['ours']:.3f} | {a['sklearn'] / a['ours']:.1f}x faster |",
        f"| `verify_all_pairs`, no bootstrap, 1 worker | {a['ours_one']:.3f} | "
        f"{a['sklearn'] / a['ours_one']:.1f}x faster |",
        f"| `verify_all_pairs`, 200 bootstrap replicates | {a['ours_ci']:.3f} | "
        f"{a['sklearn'] / a['ours_ci']:.1f}x faster |",
        "",
        "FNMR at FMR " + ", ".join(f"{t:g}: {v:.6f}" for t, v in a["fnmr"].items()) + ".",
        "",
    ]
    if not args.skip_b:
        b = part_b(args.rows_b, args.seed + 1)
        lines += [
            f"### (b) {b['rows']:,} rows x 128 ({b['pairs']:.3g} pairs)",
            "",
            f"Bare float32 products of the same {b['block']}-row blocks: {b['matmul_seconds']:.2f} s, "
            f"{b['matmul_rate']:.3g} pairs/s.",
            "",
            "| run | passes | seconds | pairs/s | share of matmul rate |",
            "|---|---:|---:|---:|---:|",
        ]
        for name, (sec, res) in b["runs"].items():
            rate = b["pairs"] / sec
            lines.append(f"| {name} | {res['passes']} | {sec:.2f} | {rate:.3g} | {rate / b['matmul_rate']:.0%} |")
        out = b["runs"][DEFAULT][1]
        lines += [
            "",
            f"Peak memory of one default run in a fresh process: {b['traced_peak'] / 2**20:.0f} MiB of "
            f"traced allocations (input {b['input'] / 2**20:.0f} MiB); process peak RSS "
            f"{b['maxrss'] / 2**20:.0f} MiB, of which {b['rss_before'] / 2**20:.0f} MiB was reached before the call "
            "(interpreter, numpy/faiss/scikit-learn, the data).",
            "",
            f"Result: AUC {out['auc']:.6f} (exact: {out['auc_exact']}), EER {out['eer']:.5f}, FNMR at FMR "
            + ", ".join(f"{k}: {v['fnmr']:.5f} [{v['ci'][0]:.5f}, {v['ci'][1]:.5f}]"
                        for k, v in out["fnmr_at_fmr"].items()) + ".",
        ]
    load = f"Load average (1 min) {load0:.1f} at the start, {os.getloadavg()[0]:.1f} at the end."
    print("\n".join(lines).replace("LOAD_LINE", load))


if __name__ == "__main__":
    main()
