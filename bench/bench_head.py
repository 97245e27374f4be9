"""Benchmark: seconds per epoch of the projection head, split into mining, gradient and update.

Usage: python bench/bench_head.py [--epochs 4] [--rows 50000] [--dim 128] [--identities 2000]
                                  [--skip-synthetic] [--markdown]

Two inputs: the demo training features (3,918 x 64, the table the demo sweep fits on) and
synthetic clustered features (identities as clusters under a shared nuisance subspace, like the
demo scenario; invented data). For each epoch of :func:`tripletkit.head.fit_head` it prints the
seconds spent mining (embedding the training rows with the current head and running the miner),
computing gradients (forward pass, loss gradient, back-propagation) and updating (Adam), so the
cost of re-mining every epoch is visible. Absolute seconds depend on the machine and its load.
"""

from __future__ import annotations

import argparse
import platform
import sys
import time

import numpy as np


def _synthetic(rows, dim, identities, seed=0):
    rng = np.random.default_rng(seed)
    per = rows // identities
    labels = np.repeat(np.arange(identities), per)
    ident_dim, nuisance_dim = min(32, dim // 2), min(16, dim // 4)
    mix_i = rng.normal(size=(ident_dim, dim)) / np.sqrt(ident_dim)
    mix_n = rng.normal(size=(nuisance_dim, dim)) / np.sqrt(nuisance_dim)
    centres = rng.normal(size=(identities, ident_dim))
    X = centres[labels] @ mix_i + 1.5 * rng.normal(size=(labels.size, nuisance_dim)) @ mix_n
    X += 0.3 * rng.normal(size=X.shape)
    return labels, X.astype(np.float32)


def _run(name, table, head_cfg, mining_cfg, margin):
    from tripletkit.head import fit_head

    t0 = time.perf_counter()
    _, history = fit_head(table, margin, head_cfg, mining_cfg, quiet=True)
    total = time.perf_counter() - t0
    lines = [f"### {name}: {table.n:,} rows x {table.dim}, {table.n_identities:,} identities; head dim "
             f"{head_cfg.dim}, {'linear' if head_cfg.hidden == 0 else f'{head_cfg.hidden} hidden units'}, "
             f"margin {margin:g}, regimes {' + '.join(mining_cfg.regimes)}, batch {head_cfg.batch_triplets}",
             "",
             "| epoch | triplets | steps | mining s | gradient s | update s | epoch s | mining share |",
             "|---:|---:|---:|---:|---:|---:|---:|---:|"]
    for h in history:
        s = h["seconds"]
        ep = s["mining"] + s["gradient"] + s["update"]
        lines.append(f"| {h['epoch']} | {h['triplets']:,} | {h['steps']} | {s['mining']:.2f} | {s['gradient']:.2f} | "
                     f"{s['update']:.3f} | {ep:.2f} | {s['mining'] / ep:.0%} |")
    rest = history[1:] or history
    mean = {k: float(np.mean([h["seconds"][k] for h in rest])) for k in ("mining", "gradient", "update")}
    lines += ["", f"fit_head total {total:.1f} s; mean of epochs {rest[0]['epoch']}-{rest[-1]['epoch']}: mining "
              f"{mean['mining']:.2f} s, gradient {mean['gradient']:.2f} s, update {mean['update']:.3f} s", ""]
    return "\n".join(lines)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--epochs", type=int, default=4)
    ap.add_argument("--rows", type=int, default=50_000)
    ap.add_argument("--dim", type=int, default=128)
    ap.add_argument("--identities", type=int, default=2_000)
    ap.add_argument("--head-dim", type=int, default=16)
    ap.add_argument("--skip-synthetic", action="store_true")
    args = ap.parse_args()

    from tripletkit.config import HeadConfig, MiningConfig
    from tripletkit.scenario import demo_paths
    from tripletkit.tables.embeddings import EmbeddingTable

    head_cfg = HeadConfig(dim=args.head_dim, epochs=args.epochs, seed=0)
    mining_cfg = MiningConfig(regimes=("semi-hard", "hard"), seed=0)
    print(f"python {platform.python_version()}, numpy {np.__version__}, {platform.machine()}, "
          f"{__import__('os').cpu_count()} cpus\n", file=sys.stderr)
    demo = EmbeddingTable.read(demo_paths()["train_features"])
    print(_run("demo training features", demo, head_cfg, mining_cfg, 0.2))
    if not args.skip_synthetic:
        labels, X = _synthetic(args.rows, args.dim, args.identities)
        table = EmbeddingTable.from_arrays(np.arange(labels.size), labels, X)
        print(_run("synthetic clustered features", table, head_cfg, mining_cfg, 0.2))


if __name__ == "__main__":
    main()
