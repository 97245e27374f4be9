"""Benchmark of tripletkit.engines.dask: one process against a 2-worker Dask LocalCluster.

Four parts, all on this machine (figures go to docs/benchmarks_distributed.md):

1. ``overhead``: cluster start-up, and the cost of one task: ``--tasks`` no-op tasks submitted at
   once (throughput) and one after another (round trip), from the client and from inside a task
   (as the drivers of ``mine``/``score`` submit theirs).
2. ``score``: ``tripletkit.evaluate.score`` of a ``--score-rows`` x ``--dim`` table written as a
   partitioned folder, in this process and on the cluster; the reports must be identical
   (asserted; timings and ``verification.passes`` aside).
3. ``mine``: ``tripletkit.mining.mine`` (exact, defaults) of a ``--mine-rows`` x ``--dim`` table,
   in this process and on the cluster; the triplet tables must be identical (asserted). The
   cluster run reports the CPU time of the shard search tasks and the brute-force pairs they
   covered (queries x gallery rows), i.e. the per-core search rate inside the pipeline, the
   driver's own CPU time (reading, planning, selection, writing) and how long it waited for
   searches. CPU seconds, unlike wall seconds, hardly move when other jobs share the machine.
4. ``demo``: part 3 on the demo training table (noisy embeddings: wide semi-hard bands, many
   candidates per anchor, so the driver's selection weighs more).
5. ``rate``: the raw per-core exact search rate of faiss (``IndexFlatIP``, top-100, one thread) at
   ``--dim``, in a subprocess with one BLAS/OpenMP thread.

The tables are the clustered synthetic data of bench/bench_mining.py (identities in families of
close centres). The machine's load average is printed before and after each part.

Run:  python bench/bench_distributed.py [--score-rows 20000] [--mine-rows 50000] [--dim 256]
Prints a JSON summary (``--json FILE`` also writes it).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_mining import make_table  # noqa: E402  (the same synthetic data as the mining benchmark)


def _load():
    return round(os.getloadavg()[0], 2)


def _noop(i):
    return i


def _inner(tasks):
    """From inside a task: submit ``tasks`` no-op tasks at once, then 50 one after another."""
    from distributed import worker_client

    with worker_client() as client:
        t0 = time.perf_counter()
        client.gather(client.map(_noop, range(tasks), pure=False))
        burst = time.perf_counter() - t0
        t0 = time.perf_counter()
        for i in range(50):
            client.submit(_noop, i, pure=False).result()
        trip = time.perf_counter() - t0
    return burst / tasks, trip / 50


def write_folder(table, folder, files=8):
    """The table as ``files`` Parquet files (the partitioned dataset the workers read)."""
    from tripletkit.tables.embeddings import to_arrow

    folder.mkdir(parents=True)
    arrow = to_arrow(table.ids, table.original_labels(), table.embeddings)
    edges = np.linspace(0, arrow.num_rows, files + 1).astype(int)
    for i, (a, b) in enumerate(zip(edges[:-1], edges[1:])):
        pq.write_table(arrow.slice(a, b - a), folder / f"part-{i:03d}.parquet", row_group_size=8192)
    return folder


def _comparable(report):
    out = json.loads(json.dumps(report))
    out.pop("seconds"), out.pop("stage_seconds")
    out["verification"].pop("passes", None)
    return out


def part_overhead(args, client, res):
    t0 = time.perf_counter()
    client.gather(client.map(_noop, range(args.tasks), pure=False))
    burst = (time.perf_counter() - t0) / args.tasks
    t0 = time.perf_counter()
    for i in range(100):
        client.submit(_noop, i, pure=False).result()
    trip = (time.perf_counter() - t0) / 100
    inner_burst, inner_trip = client.submit(_inner, args.tasks, pure=False).result()
    res["overhead"] = {"tasks": args.tasks, "client_burst_ms": 1e3 * burst, "client_round_trip_ms": 1e3 * trip,
                       "in_task_burst_ms": 1e3 * inner_burst, "in_task_round_trip_ms": 1e3 * inner_trip}


def part_score(args, compute, work, res):
    from tripletkit.config import EvaluationConfig
    from tripletkit.evaluate import score

    table = make_table(args.score_rows, args.score_rows // 50, args.dim, seed=1)
    folder = write_folder(table, work / "heldout")
    cfg = EvaluationConfig(plots=False)
    load0 = _load()
    t0 = time.perf_counter()
    one = score(folder, config=cfg, quiet=True)
    single = time.perf_counter() - t0
    t0 = time.perf_counter()
    many = score(folder, config=cfg, quiet=True, compute=compute)
    cluster = time.perf_counter() - t0
    identical = _comparable(one) == _comparable(many)
    assert identical, "cluster report differs from the single-process report"
    res["score"] = {"rows": table.n, "dim": table.dim, "identities": table.n_identities,
                    "pairs": table.n * (table.n - 1) // 2, "single_s": single, "cluster_s": cluster,
                    "single_stage_s": one["stage_seconds"], "cluster_stage_s": many["stage_seconds"],
                    "passes": [one["verification"]["passes"], many["verification"]["passes"]],
                    "identical": identical, "load": [load0, _load()]}


def part_mine(args, compute, work, res, demo=False):
    from tripletkit.mining import mine

    if demo:
        folder = Path(__file__).resolve().parents[1] / "demo_data" / "train_embeddings.parquet"
        from tripletkit.tables.embeddings import EmbeddingTable

        table, work, key = EmbeddingTable.read(folder), work / "demo", "demo"
        work.mkdir()
    else:
        table = make_table(args.mine_rows, args.mine_rows // 50, args.dim, seed=2)
        folder, key = write_folder(table, work / "train"), "mine"
    load0 = _load()
    t0, c0 = time.perf_counter(), time.process_time()
    one = mine(folder, work / "one.parquet", quiet=True)
    single, single_cpu = time.perf_counter() - t0, time.process_time() - c0
    t0 = time.perf_counter()
    many = mine(folder, work / "many.parquet", quiet=True, compute=compute)
    cluster = time.perf_counter() - t0
    parts = sorted((work / "many.parquet").glob("part-*.parquet"))
    identical = pa.concat_tables([pq.read_table(p) for p in parts]).equals(pq.read_table(work / "one.parquet"))
    assert identical, "cluster triplets differ from the single-process triplets"
    d = many.details
    res[key] = {"rows": table.n, "dim": table.dim, "identities": table.n_identities, "triplets": one.n_triplets,
                   "single_s": single, "single_cpu_s": single_cpu, "cluster_s": cluster, "shards": d["shards"],
                   "driver_s": d["driver_seconds"], "driver_cpu_s": d["driver_cpu_seconds"],
                   "search_tasks": d["search_tasks"], "search_cpu_s": d["search_cpu_seconds"],
                   "search_pairs": d["search_pairs"], "search_wait_s": d["search_wait_seconds"],
                   "pipeline_pairs_per_cpu_s": d["search_pairs"] / d["search_cpu_seconds"],
                   "identical": identical, "load": [load0, _load()]}


_RATE = r"""
import json, sys, time
import faiss, numpy as np
n, q, d = (int(v) for v in sys.argv[1:4])
rng = np.random.default_rng(0)
x = rng.standard_normal((n, d), dtype=np.float32); x /= np.linalg.norm(x, axis=1, keepdims=True)
index = faiss.IndexFlatIP(d); index.add(x)
index.search(x[:256], 100)
best = cpu = None
for _ in range(3):
    t0, c0 = time.perf_counter(), time.process_time(); index.search(x[:q], 100)
    s, c = time.perf_counter() - t0, time.process_time() - c0
    best = s if best is None else min(best, s)
    cpu = c if cpu is None else min(cpu, c)
print(json.dumps({"gallery": n, "queries": q, "dim": d, "seconds": best, "cpu_seconds": cpu,
                  "pairs_per_s": n * q / best, "pairs_per_cpu_s": n * q / cpu}))
"""


def part_rate(args, res):
    env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1")
    load0 = _load()
    out = subprocess.run([sys.executable, "-c", _RATE, str(args.rate_gallery), "4096", str(args.dim)],
                         capture_output=True, text=True, env=env, check=True)
    res["rate"] = json.loads(out.stdout) | {"load": [load0, _load()]}


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--score-rows", type=int, default=20000)
    p.add_argument("--mine-rows", type=int, default=50000)
    p.add_argument("--dim", type=int, default=256)
    p.add_argument("--workers", type=int, default=2)
    p.add_argument("--tasks", type=int, default=2000)
    p.add_argument("--rate-gallery", type=int, default=100000)
    p.add_argument("--parts", default="overhead,score,mine,demo,rate")
    p.add_argument("--workdir", default=None, help="scratch folder (default: a new temporary folder)")
    p.add_argument("--json", default=None)
    args = p.parse_args(argv)
    import distributed

    from tripletkit.config import ComputeConfig

    parts = args.parts.split(",")
    work = Path(tempfile.mkdtemp(prefix="bench-distributed-", dir=args.workdir))
    res = {"machine": {"cpus": os.cpu_count(), "platform": platform.platform(), "python": platform.python_version(),
                       "numpy": np.__version__, "dask": distributed.__version__}, "load_start": _load()}
    t0 = time.perf_counter()
    with distributed.LocalCluster(n_workers=args.workers, threads_per_worker=1, processes=True,
                                  dashboard_address=None, silence_logs=40) as lc, distributed.Client(lc) as client:
        res["cluster_start_s"] = time.perf_counter() - t0
        compute = ComputeConfig(scheduler=lc.scheduler_address, workers=args.workers)
        if "overhead" in parts:
            part_overhead(args, client, res)
        if "score" in parts:
            part_score(args, compute, work, res)
        if "mine" in parts:
            part_mine(args, compute, work, res)
        if "demo" in parts:
            part_mine(args, compute, work, res, demo=True)
    if "rate" in parts:
        part_rate(args, res)
    res["load_end"] = _load()
    text = json.dumps(res, indent=2, default=float)
    print(text)
    if args.json:
        Path(args.json).write_text(text + "\n")


if __name__ == "__main__":
    main()
