"""Benchmark of ``tripletkit.mining.mine`` (issue: mining). Figures go to docs/benchmarks_mining.md.

Three parts, each path in its own subprocess so that its peak memory (``ru_maxrss``) is its own:

1. ``exact``: exact mining (semi-hard + hard, defaults otherwise) of a ROWS x DIM table with
   IDENTITIES identities, against a raw faiss flat self-search with k = 100 of the same table
   (``IndexFlatIP`` + ``search`` in query blocks, the fastest way to call it), alternated
   ``--repeat`` times in one run. Targets: time <= 1.5x the raw search; peak memory <= 2 x the
   embedding matrix + 1 GB.
2. ``approx``: ``--approx-index`` (ivf or hnsw) against exact mining on an APPROX_ROWS table, in
   the same run: speedup and the recall the approximate run reports. Targets: >= 4x, recall >= 0.95.
3. ``scaling``: exact and approximate mining time for each size of ``--sizes``.

The synthetic data are clustered like a training dump mid-training: identities are clusters,
and identities come in families of 5 whose centres are close, so hard and semi-hard negatives
exist (from sibling identities) but are a minority of all rows. Seeded; generated in float32
chunks so generation does not dominate the peak memory.

Example (about 30 minutes on 2 cores)::

    python bench/bench_mining.py --part all --json bench/results/mining.json
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time

import numpy as np

_FAMILY = 5
_SPREAD = 0.8
_FAMILY_SPREAD = 0.9


def make_table(rows, identities, dim, seed=0):
    """Clustered synthetic embeddings: ``identities`` clusters of ``rows // identities`` rows."""
    from tripletkit.table import EmbeddingTable

    per = rows // identities
    rng = np.random.default_rng([seed, 0])
    families = rng.standard_normal((max(1, identities // _FAMILY), dim)).astype(np.float32)
    families /= np.linalg.norm(families, axis=1, keepdims=True)
    centres = (families[np.arange(identities) % families.shape[0]]
               + _FAMILY_SPREAD * rng.standard_normal((identities, dim)).astype(np.float32) / np.sqrt(dim))
    centres /= np.linalg.norm(centres, axis=1, keepdims=True)
    labels = np.repeat(np.arange(identities, dtype=np.int64), per)
    n = labels.size
    X = np.empty((n, dim), dtype=np.float32)
    step = 65536
    for c, s in enumerate(range(0, n, step)):
        e = min(n, s + step)
        noise = np.random.default_rng([seed, 1, c]).standard_normal((e - s, dim), dtype=np.float32)
        X[s:e] = centres[labels[s:e]] + (_SPREAD / np.sqrt(dim)) * noise
    # shuffle rows so identities are not contiguous (as in a real dump)
    perm = np.random.default_rng([seed, 2]).permutation(n)
    table = EmbeddingTable.from_arrays(np.arange(n, dtype=np.int64), labels[perm], X[perm])
    del X
    return table


def _peak_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def child(args):
    """Run one measured path and print one JSON line."""
    table = make_table(args.rows, args.identities, args.dim, args.seed)
    matrix_mb = table.embeddings.nbytes / 2 ** 20
    res = {"path": args.child, "rows": table.n, "dim": table.dim, "identities": table.n_identities,
           "matrix_mb": matrix_mb}
    if args.child == "baseline":
        import faiss

        t0 = time.perf_counter()
        index = faiss.IndexFlatIP(table.dim)
        index.add(table.embeddings)
        D = np.empty((table.n, args.k), dtype=np.float32)
        I = np.empty((table.n, args.k), dtype=np.int64)
        for s in range(0, table.n, args.block):
            D[s:s + args.block], I[s:s + args.block] = index.search(table.embeddings[s:s + args.block], args.k)
        res["seconds"] = time.perf_counter() - t0
    else:
        from tripletkit.mining import mine

        with tempfile.TemporaryDirectory(dir=args.tmp) as tmp:
            t0 = time.perf_counter()
            s = mine(table, os.path.join(tmp, "triplets.parquet"), index=args.index, quiet=True,
                     neighbours=args.k, exact_below=args.rows + 1, ivf_nprobe=args.ivf_nprobe,
                     hnsw_ef_search=args.hnsw_ef_search)
            res["seconds"] = time.perf_counter() - t0
            res["output_mb"] = os.path.getsize(os.path.join(tmp, "triplets.parquet")) / 2 ** 20
        res["summary"] = s.to_dict()
        res["details"] = s.details
    res["peak_mb"] = _peak_mb()
    print(json.dumps(res))


def run(path, rows, identities, args, index="exact"):
    cmd = [sys.executable, os.path.abspath(__file__), "--child", path, "--rows", str(rows), "--identities",
           str(identities), "--dim", str(args.dim), "--k", str(args.k), "--index", index, "--seed", str(args.seed),
           "--block", str(args.block), "--tmp", args.tmp, "--ivf-nprobe", str(args.ivf_nprobe),
           "--hnsw-ef-search", str(args.hnsw_ef_search)]
    out = subprocess.run(cmd, check=True, capture_output=True, text=True)
    res = json.loads(out.stdout.strip().splitlines()[-1])
    print(f"  {path:8s} {index:5s} rows {rows:>7d}: {res['seconds']:8.1f} s, peak {res['peak_mb']:7.0f} MB"
          + (f", recall {res['summary']['recall']}" if path == "mine" else ""), flush=True)
    return res


def part_exact(args, results):
    print(f"[exact] {args.rows} x {args.dim}, {args.identities} identities, repeat {args.repeat}", flush=True)
    runs = []
    for _ in range(args.repeat):
        runs.append((run("baseline", args.rows, args.identities, args), run("mine", args.rows, args.identities, args)))
    base = min(r[0]["seconds"] for r in runs)
    mined = min(r[1]["seconds"] for r in runs)
    last = runs[-1][1]
    results["exact"] = {
        "baseline_seconds": [r[0]["seconds"] for r in runs], "mine_seconds": [r[1]["seconds"] for r in runs],
        "ratio_best": mined / base,
        "ratio_per_repeat": [r[1]["seconds"] / r[0]["seconds"] for r in runs],
        "baseline_peak_mb": max(r[0]["peak_mb"] for r in runs), "mine_peak_mb": max(r[1]["peak_mb"] for r in runs),
        "matrix_mb": last["matrix_mb"], "memory_target_mb": 2 * last["matrix_mb"] + 1024,
        "summary": last["summary"], "details": last["details"],
    }
    print(f"  ratio (best of each) {mined / base:.2f}x", flush=True)


def part_approx(args, results, cache):
    rows, ids = args.approx_rows, args.approx_rows // (args.rows // args.identities)
    print(f"[approx] {rows} x {args.dim}, {ids} identities, {args.approx_index} vs exact", flush=True)
    ex = cache.setdefault(("exact", rows), run("mine", rows, ids, args, "exact"))
    ap = cache.setdefault((args.approx_index, rows), run("mine", rows, ids, args, args.approx_index))
    results["approx"] = {
        "rows": rows, "identities": ids, "index": args.approx_index, "ivf_nprobe": args.ivf_nprobe,
        "hnsw_ef_search": args.hnsw_ef_search,
        "exact_seconds": ex["seconds"], "approx_seconds": ap["seconds"], "speedup": ex["seconds"] / ap["seconds"],
        "recall": ap["summary"]["recall"], "exact_peak_mb": ex["peak_mb"], "approx_peak_mb": ap["peak_mb"],
        "exact_summary": ex["summary"], "approx_summary": ap["summary"], "approx_details": ap["details"],
    }
    print(f"  speedup {ex['seconds'] / ap['seconds']:.1f}x, recall {ap['summary']['recall']}", flush=True)


def part_scaling(args, results, cache):
    print(f"[scaling] sizes {args.sizes}", flush=True)
    per = args.rows // args.identities
    rows_out = []
    for rows in args.sizes:
        ex = cache.setdefault(("exact", rows), run("mine", rows, rows // per, args, "exact"))
        ap = cache.setdefault((args.approx_index, rows), run("mine", rows, rows // per, args, args.approx_index))
        rows_out.append({"rows": rows, "exact_seconds": ex["seconds"], "approx_seconds": ap["seconds"],
                         "recall": ap["summary"]["recall"], "exact_peak_mb": ex["peak_mb"],
                         "approx_peak_mb": ap["peak_mb"], "widened": ex["details"]["widened_queries"],
                         "triplets": ex["summary"]["triplets"]})
    results["scaling"] = {"index": args.approx_index, "rows": rows_out}


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--part", choices=("exact", "approx", "scaling", "all"), default="all")
    p.add_argument("--rows", type=int, default=100_000)
    p.add_argument("--identities", type=int, default=2_000)
    p.add_argument("--dim", type=int, default=128)
    p.add_argument("--k", type=int, default=100, help="neighbours (miner) and k of the raw search")
    p.add_argument("--repeat", type=int, default=2, help="alternated baseline/mine runs of part 1")
    p.add_argument("--approx-rows", type=int, default=500_000)
    p.add_argument("--approx-index", choices=("ivf", "hnsw"), default="ivf")
    p.add_argument("--sizes", type=lambda s: [int(v) for v in s.split(",")],
                   default=[25_000, 50_000, 100_000, 200_000, 500_000])
    p.add_argument("--ivf-nprobe", type=int, default=32, help="ivf_nprobe of the approximate runs")
    p.add_argument("--hnsw-ef-search", type=int, default=128, help="hnsw_ef_search of the approximate runs")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--block", type=int, default=16384, help="query block of the raw search")
    p.add_argument("--json", help="write all results to this JSON file")
    p.add_argument("--tmp", default=tempfile.gettempdir(), help="folder for the mined outputs")
    p.add_argument("--child", choices=("baseline", "mine"), help=argparse.SUPPRESS)
    p.add_argument("--index", default="exact", help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.child:
        return child(args)
    import faiss

    results = {"machine": {"cpus": os.cpu_count(), "faiss_threads": faiss.omp_get_max_threads(),
                           "faiss": faiss.__version__, "numpy": np.__version__},
               "args": {k: v for k, v in vars(args).items() if k not in ("child", "index")},
               "started": time.strftime("%Y-%m-%d %H:%M")}
    cache = {}
    if args.part in ("exact", "all"):
        part_exact(args, results)
    if args.part in ("approx", "all"):
        part_approx(args, results, cache)
    if args.part in ("scaling", "all"):
        part_scaling(args, results, cache)
    if args.json:
        os.makedirs(os.path.dirname(os.path.abspath(args.json)), exist_ok=True)
        with open(args.json, "w") as f:
            json.dump(results, f, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
