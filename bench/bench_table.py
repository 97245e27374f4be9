"""Benchmark: loading an embedding table vs a raw pyarrow read with a zero-copy numpy view.

Usage: python bench/bench_table.py [--rows 1000000] [--dim 128] [--repeat 3]

Each measurement runs in its own subprocess so that peak memory (ru_maxrss) is its own. Both
paths run in the same invocation, one after the other, so the ratio is what to read; absolute
times depend on the machine and its load.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

CHILD = r"""
import json, resource, sys, time
import numpy as np
path, mode = sys.argv[1], sys.argv[2]
base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
t0 = time.perf_counter()
if mode == "tripletkit":
    from tripletkit.tables.embeddings import EmbeddingTable
    t = EmbeddingTable.read(path)
    x = t.embeddings
else:
    import pyarrow.parquet as pq
    tab = pq.read_table(path)
    col = tab.column("embedding").combine_chunks()
    x = col.flatten().to_numpy(zero_copy_only=True).reshape(len(col), -1)
    ids = tab.column("id").to_numpy()
    labels = tab.column("label").to_numpy()
seconds = time.perf_counter() - t0
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps({"seconds": seconds, "peak_mb": peak / 1024, "base_mb": base / 1024, "shape": list(x.shape)}))
"""


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--dim", type=int, default=128)
    ap.add_argument("--identities", type=int, default=20_000)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()

    import numpy as np

    from tripletkit.tables.embeddings import write_table

    rng = np.random.default_rng(0)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "dump.parquet"
        emb = rng.standard_normal((args.rows, args.dim), dtype=np.float32)
        write_table(path, np.arange(args.rows), rng.integers(0, args.identities, args.rows), emb)
        del emb
        size_mb = path.stat().st_size / 2**20
        results = {"tripletkit": [], "pyarrow zero-copy": []}
        for _ in range(args.repeat):
            for mode in results:
                out = subprocess.run([sys.executable, "-c", CHILD, str(path), mode.split()[0]],
                                     check=True, capture_output=True, text=True)
                results[mode].append(json.loads(out.stdout))
    matrix_mb = args.rows * args.dim * 4 / 2**20
    print(f"table: {args.rows} x {args.dim} float32 ({matrix_mb:.0f} MB matrix, {size_mb:.0f} MB Parquet)\n")
    print("| path | load s (best of %d) | peak RSS MB (max) |" % args.repeat)
    print("|---|---|---|")
    best = {}
    for mode, runs in results.items():
        best[mode] = min(r["seconds"] for r in runs)
        print(f"| {mode} | {best[mode]:.2f} | {max(r['peak_mb'] for r in runs):.0f} |")
    print(f"\nratio tripletkit / baseline: {best['tripletkit'] / best['pyarrow zero-copy']:.2f}x time")


if __name__ == "__main__":
    main()
