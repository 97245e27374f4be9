"""Benchmark of ``tripletkit.mining.mine`` (issue: mining). Figures go to docs/benchmarks_mining.md.

Three parts, each path in its own subprocess so that its peak memory (``ru_maxrss``) is its own:

1. ``exact``: exact mining (semi-hard + hard, defaults otherwise) of a ROWS x DIM table with
   IDENTITIES identities, against a raw faiss flat self-search with k = 100 of the same table
   (``IndexFlatIP`` + ``search`` in query blocks, the fastest way to call it), alternated
   ``--repeat`` times in one run. Targets: time <= 1.5x the raw search; peak memory <= 2 x the
   embedding matrix + 1 GB.
2. ``approx``: the approximate runs of ``--approx`` (ivf with a given nprobe, hnsw with a given
   ef_search) against exact mining on an APPROX_ROWS table, in the same run; each approximate run is
   done once before and once after the exact one, and the speedup divides by their mean (the
   machine's load drifts during a long exact run). Recall is what the approximate run reports.
   Targets: >= 4x, recall >= 0.95.
3. ``scaling``: exact and approximate mining time for each size of ``--sizes``.

``--case first-epoch`` (off by default; it replaces the three parts) times exact mining of a poorly
separated table, the first epoch of ``tripletkit.head.fit_head``: the clustered features of
bench/bench_head.py (``_synthetic``) through a freshly initialised projection head (a random
projection to DIM, 25 rows per identity), mined with the defaults. The miner's dense path (chosen
automatically on such a table) runs against the search path it replaces (``mine(..., dense=False)``),
alternated ``--repeat`` times; the two outputs must be byte-identical (their SHA-256 is compared)::

    python bench/bench_mining.py --case first-epoch --rows 10000 --dim 16 --repeat 2

Peak memory is the kernel's high-water mark of the child, reset after the synthetic table is built
(``/proc/self/clear_refs``), so it covers the measured call with the table resident; the whole
process peak (data generation included) is kept in the JSON too.

The synthetic data are clustered like a training dump mid-training: identities are clusters,
and identities come in families of 5 whose centres are close, so hard and semi-hard negatives
exist (from sibling identities) but are a minority of all rows. Seeded; generated in float32
chunks so generation does not dominate the peak memory.

Example (about 30 minutes on 2 cores)::

    python bench/bench_mining.py --part all --json bench/results/mining.json
"""

from __future__ import annotations

import argparse
import hashlib
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
    from tripletkit.tables.embeddings import EmbeddingTable

    per = rows // identities
    rng = np.random.default_rng([seed, 0])
    families = rng.standard_normal((max(1, identities // _FAMILY), dim)).astype(np.float32)
    families /= np.linalg.norm(families, axis=1, keepdims=True)
    centres = (families[np.arange(identities) % families.shape[0]]
               + _FAMILY_SPREAD * rng.standard_normal((identities, dim)).astype(np.float32) / np.sqrt(dim))
    centres /= np.linalg.norm(centres, axis=1, keepdims=True)
    # rows in a shuffled order (identities are not contiguous in a real dump), generated in place
    labels = np.repeat(np.arange(identities, dtype=np.int64), per)
    labels = labels[np.random.default_rng([seed, 2]).permutation(labels.size)]
    n = labels.size
    X = np.empty((n, dim), dtype=np.float32)
    step = 65536
    for c, s in enumerate(range(0, n, step)):
        e = min(n, s + step)
        noise = np.random.default_rng([seed, 1, c]).standard_normal((e - s, dim), dtype=np.float32)
        X[s:e] = centres[labels[s:e]] + (_SPREAD / np.sqrt(dim)) * noise
    table = EmbeddingTable.from_arrays(np.arange(n, dtype=np.int64), labels, X)
    del X
    return table


def make_first_epoch_table(rows, identities, dim, seed=0):
    """The first epoch of ``fit_head`` on bench_head.py's synthetic features: a random projection."""
    from bench_head import _synthetic  # bench/ is the script's folder, so it is on sys.path

    from tripletkit.head import ProjectionHead
    from tripletkit.tables.embeddings import EmbeddingTable

    labels, F = _synthetic(rows, 128, identities, seed=seed)
    Z = ProjectionHead.initialise(F, dim=dim, seed=seed).transform(F)
    return EmbeddingTable.from_arrays(np.arange(labels.size, dtype=np.int64), labels, Z)


def _reset_peak():
    """Reset the kernel's peak-RSS mark of this process (Linux >= 4.0); False if unsupported."""
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
        return True
    except OSError:
        return False


def _hwm_mb():
    """Peak RSS since the last reset (VmHWM), in MB."""
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    return float("nan")


def _peak_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def child(args):
    """Run one measured path and print one JSON line."""
    if args.first_epoch:
        table = make_first_epoch_table(args.rows, args.identities, args.dim, args.seed)
    else:
        table = make_table(args.rows, args.identities, args.dim, args.seed)
    matrix_mb = table.embeddings.nbytes / 2 ** 20
    res = {"path": args.child, "rows": table.n, "dim": table.dim, "identities": table.n_identities,
           "matrix_mb": matrix_mb, "generation_peak_mb": _peak_mb()}
    # from here on the peak is that of the measured call (plus the resident table)
    res["peak_isolated"] = _reset_peak()
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

        # mine-search: the search path (top-k + widening) for every table
        dense = False if args.child == "mine-search" else None
        with tempfile.TemporaryDirectory(dir=args.tmp) as tmp:
            t0 = time.perf_counter()
            s = mine(table, os.path.join(tmp, "triplets.parquet"), index=args.index, quiet=True,
                     neighbours=args.k, exact_below=args.rows + 1, ivf_nprobe=args.ivf_nprobe,
                     hnsw_ef_search=args.hnsw_ef_search, dense=dense)
            res["seconds"] = time.perf_counter() - t0
            res["output_mb"] = os.path.getsize(os.path.join(tmp, "triplets.parquet")) / 2 ** 20
            with open(os.path.join(tmp, "triplets.parquet"), "rb") as f:
                res["sha256"] = hashlib.sha256(f.read()).hexdigest()
        res["summary"] = s.to_dict()
        res["details"] = s.details
    res["process_peak_mb"] = _peak_mb()
    res["peak_mb"] = _hwm_mb() if res["peak_isolated"] else res["process_peak_mb"]
    print(json.dumps(res))


def _spec(spec):
    """"exact", "ivf:NPROBE" or "hnsw:EF_SEARCH" -> (index, nprobe, ef_search)."""
    kind, _, knob = spec.partition(":")
    if kind == "ivf":
        return kind, int(knob or 32), 128
    if kind == "hnsw":
        return kind, 32, int(knob or 128)
    return "exact", 32, 128


def run(path, rows, identities, args, spec="exact"):
    index, nprobe, ef = _spec(spec)
    cmd = [sys.executable, os.path.abspath(__file__), "--child", path, "--rows", str(rows), "--identities",
           str(identities), "--dim", str(args.dim), "--k", str(args.k), "--index", index, "--seed", str(args.seed),
           "--block", str(args.block), "--tmp", args.tmp, "--ivf-nprobe", str(nprobe), "--hnsw-ef-search", str(ef)]
    if args.case == "first-epoch":
        cmd.append("--first-epoch")
    out = subprocess.run(cmd, check=True, capture_output=True, text=True)
    res = json.loads(out.stdout.strip().splitlines()[-1])
    res["spec"] = spec
    print(f"  {path:8s} {spec:8s} rows {rows:>7d}: {res['seconds']:8.1f} s, peak {res['peak_mb']:7.0f} MB"
          + (f", recall {res['summary']['recall']}" if path == "mine" else ""), flush=True)
    return res


def _cached(cache, path, rows, identities, args, spec):
    """Run a path once per (path, spec, rows, identities) and reuse its result."""
    key = (path, spec, rows, identities)
    if key not in cache:
        cache[key] = run(path, rows, identities, args, spec)
    return cache[key]


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
        "mine_process_peak_mb": max(r[1]["process_peak_mb"] for r in runs),
        "matrix_mb": last["matrix_mb"], "memory_target_mb": 2 * last["matrix_mb"] + 1024,
        "summary": last["summary"], "details": last["details"],
    }
    print(f"  ratio (best of each) {mined / base:.2f}x", flush=True)


def part_approx(args, results, cache):
    rows, ids = args.approx_rows, args.approx_rows // (args.rows // args.identities)
    print(f"[approx] {rows} x {args.dim}, {ids} identities, {args.approx} vs exact "
          "(each approximate run before and after the exact one)", flush=True)
    before = {spec: run("mine", rows, ids, args, spec) for spec in args.approx}
    ex = _cached(cache, "mine", rows, ids, args, "exact")
    after = {spec: run("mine", rows, ids, args, spec) for spec in args.approx}
    cache[("mine", args.approx[0], rows, ids)] = after[args.approx[0]]
    out = {"rows": rows, "identities": ids, "exact_seconds": ex["seconds"], "exact_peak_mb": ex["peak_mb"],
           "exact_summary": ex["summary"], "runs": []}
    for spec in args.approx:
        b, a = before[spec], after[spec]
        mean = (b["seconds"] + a["seconds"]) / 2
        out["runs"].append({"spec": spec, "seconds": [b["seconds"], a["seconds"]], "speedup": ex["seconds"] / mean,
                            "recall": a["summary"]["recall"], "peak_mb": max(a["peak_mb"], b["peak_mb"]),
                            "summary": a["summary"], "details": a["details"]})
        print(f"  {spec}: speedup {ex['seconds'] / mean:.1f}x (exact / mean of the two), "
              f"recall {a['summary']['recall']}", flush=True)
    results["approx"] = out


def part_scaling(args, results, cache):
    print(f"[scaling] sizes {args.sizes}", flush=True)
    per = args.rows // args.identities
    spec = args.approx[0]
    rows_out = []
    for rows in args.sizes:
        ex = _cached(cache, "mine", rows, rows // per, args, "exact")
        ap = _cached(cache, "mine", rows, rows // per, args, spec)
        rows_out.append({"rows": rows, "exact_seconds": ex["seconds"], "approx_seconds": ap["seconds"],
                         "recall": ap["summary"]["recall"], "exact_peak_mb": ex["peak_mb"],
                         "approx_peak_mb": ap["peak_mb"], "widened": ex["details"]["widened_queries"],
                         "triplets": ex["summary"]["triplets"]})
    results["scaling"] = {"approx": spec, "rows": rows_out}


def part_first_epoch(args, results):
    rows, ids = args.rows, args.identities
    print(f"[first-epoch] {rows} x {args.dim} (random projection of 128-d features), {ids} identities, "
          f"dense path vs search path, repeat {args.repeat}", flush=True)
    load = [os.getloadavg()[0]]
    runs = []
    for _ in range(args.repeat):
        runs.append((run("mine-search", rows, ids, args), run("mine", rows, ids, args)))
        load.append(os.getloadavg()[0])
    old = [r[0]["seconds"] for r in runs]
    new = [r[1]["seconds"] for r in runs]
    same = all(r[0]["sha256"] == r[1]["sha256"] for r in runs)
    d_old, d_new = runs[-1][0]["details"], runs[-1][1]["details"]
    results["first_epoch"] = {
        "rows": runs[-1][1]["rows"], "dim": runs[-1][1]["dim"], "identities": runs[-1][1]["identities"],
        "search_seconds": old, "dense_seconds": new, "ratio_best": min(old) / min(new),
        "ratio_per_repeat": [o / n for o, n in zip(old, new)], "identical_output": same,
        "search_peak_mb": max(r[0]["peak_mb"] for r in runs), "dense_peak_mb": max(r[1]["peak_mb"] for r in runs),
        "dense_share": d_new["dense_share"], "dense_rows": d_new["dense_rows"],
        "search_widened": d_old["widened_queries"], "triplets": runs[-1][1]["summary"]["triplets"],
        "load_average": load,
    }
    print(f"  search path / dense path (best of each) {min(old) / min(new):.1f}x; identical output: {same}",
          flush=True)


def markdown(results):
    """Markdown tables of a results JSON (what docs/benchmarks_mining.md shows)."""
    lines = []
    fe = results.get("first_epoch")
    if fe:
        lines += ["| run | search path (s) | dense path (s) | ratio |", "|---|---|---|---|"]
        for i, (o, n) in enumerate(zip(fe["search_seconds"], fe["dense_seconds"]), 1):
            lines.append(f"| {i} | {o:.1f} | {n:.1f} | {o / n:.1f}x |")
        lines.append(f"| best of each | {min(fe['search_seconds']):.1f} | {min(fe['dense_seconds']):.1f} | "
                     f"{fe['ratio_best']:.1f}x |")
        lines += ["", f"{fe['rows']} rows x {fe['dim']}, {fe['identities']} identities; sampled band share "
                  f"{fe['dense_share']:.3f}; search path widened {fe['search_widened']} queries; "
                  f"{fe['triplets']} triplets; identical output: {fe['identical_output']}; peak MB search "
                  f"{fe['search_peak_mb']:.0f}, dense {fe['dense_peak_mb']:.0f}; load average "
                  + ", ".join(f"{v:.1f}" for v in fe["load_average"]), ""]
    ex = results.get("exact")
    if ex:
        lines += ["| run | raw faiss flat k=100 (s) | exact mining (s) | ratio |", "|---|---|---|---|"]
        for i, (b, m) in enumerate(zip(ex["baseline_seconds"], ex["mine_seconds"]), 1):
            lines.append(f"| {i} | {b:.1f} | {m:.1f} | {m / b:.2f}x |")
        lines.append(f"| best of each | {min(ex['baseline_seconds']):.1f} | {min(ex['mine_seconds']):.1f} | "
                     f"{ex['ratio_best']:.2f}x |")
        lines += ["", f"peak RSS during the call: mining {ex['mine_peak_mb']:.0f} MB, raw search "
                  f"{ex['baseline_peak_mb']:.0f} MB; matrix {ex['matrix_mb']:.0f} MB, target 2 x matrix + 1 GB = "
                  f"{ex['memory_target_mb']:.0f} MB", ""]
    ap = results.get("approx")
    if ap:
        lines += [f"exact mining of {ap['rows']} rows: {ap['exact_seconds']:.1f} s, peak {ap['exact_peak_mb']:.0f} MB",
                  "", "| index | seconds (before, after exact) | speedup vs exact | recall | peak MB |",
                  "|---|---|---|---|---|"]
        for r in ap["runs"]:
            lines.append(f"| {r['spec']} | {r['seconds'][0]:.1f}, {r['seconds'][1]:.1f} | {r['speedup']:.1f}x | "
                         f"{r['recall']:.4f} | {r['peak_mb']:.0f} |")
        lines.append("")
    sc = results.get("scaling")
    if sc:
        lines += [f"| rows | exact (s) | {sc['approx']} (s) | recall | exact peak MB | widened anchors | triplets |",
                  "|---|---|---|---|---|---|---|"]
        for r in sc["rows"]:
            lines.append(f"| {r['rows']} | {r['exact_seconds']:.1f} | {r['approx_seconds']:.1f} | {r['recall']:.4f} | "
                         f"{r['exact_peak_mb']:.0f} | {r['widened']} | {r['triplets']} |")
    return "\n".join(lines)


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--part", choices=("exact", "approx", "scaling", "all"), default="all")
    p.add_argument("--case", choices=("mid-training", "first-epoch"), default="mid-training",
                   help="first-epoch: time the dense path against the search path on a poorly separated "
                        "table (replaces --part; --rows, --identities, --dim, --repeat apply)")
    p.add_argument("--rows", type=int, default=100_000)
    p.add_argument("--identities", type=int, default=None,
                   help="identities (default 2,000; with --case first-epoch, rows / 25)")
    p.add_argument("--dim", type=int, default=128)
    p.add_argument("--k", type=int, default=100, help="neighbours (miner) and k of the raw search")
    p.add_argument("--repeat", type=int, default=2, help="alternated baseline/mine runs of part 1")
    p.add_argument("--approx-rows", type=int, default=500_000)
    p.add_argument("--approx", type=lambda v: v.split(","), default=["ivf:32", "ivf:16", "hnsw:128"],
                   help="approximate runs of part 2, comma-separated: ivf:NPROBE or hnsw:EF_SEARCH "
                        "(the first one is also used in part 3)")
    p.add_argument("--sizes", type=lambda s: [int(v) for v in s.split(",")],
                   default=[25_000, 50_000, 100_000, 200_000, 500_000])
    p.add_argument("--ivf-nprobe", type=int, default=32, help=argparse.SUPPRESS)
    p.add_argument("--hnsw-ef-search", type=int, default=128, help=argparse.SUPPRESS)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--block", type=int, default=16384, help="query block of the raw search")
    p.add_argument("--json", help="write all results to this JSON file")
    p.add_argument("--tmp", default=tempfile.gettempdir(), help="folder for the mined outputs")
    p.add_argument("--markdown", metavar="JSON", help="print the tables of a results file and exit")
    p.add_argument("--child", choices=("baseline", "mine", "mine-search"), help=argparse.SUPPRESS)
    p.add_argument("--first-epoch", action="store_true", help=argparse.SUPPRESS)
    p.add_argument("--index", default="exact", help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.identities is None:
        args.identities = args.rows // 25 if args.case == "first-epoch" else 2_000
    if args.child:
        return child(args)
    if args.markdown:
        with open(args.markdown) as f:
            print(markdown(json.load(f)))
        return 0
    import faiss

    results = {"machine": {"cpus": os.cpu_count(), "faiss_threads": faiss.omp_get_max_threads(),
                           "faiss": faiss.__version__, "numpy": np.__version__},
               "args": {k: v for k, v in vars(args).items() if k not in ("child", "index", "first_epoch")},
               "started": time.strftime("%Y-%m-%d %H:%M")}
    cache = {}
    if args.case == "first-epoch":
        part_first_epoch(args, results)
    elif args.part in ("exact", "all"):
        part_exact(args, results)
    if args.case == "mid-training" and args.part in ("approx", "all"):
        part_approx(args, results, cache)
    if args.case == "mid-training" and args.part in ("scaling", "all"):
        part_scaling(args, results, cache)
    if args.json:
        os.makedirs(os.path.dirname(os.path.abspath(args.json)), exist_ok=True)
        with open(args.json, "w") as f:
            json.dump(results, f, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
