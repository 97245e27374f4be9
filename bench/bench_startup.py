"""Benchmark: start-up of the command line against importing numpy and pyarrow.parquet.

Usage: python bench/bench_startup.py [--repeat 15]

Times whole processes, interleaved (baseline, ``tripletkit --help``, ``tripletkit check`` on a
small table, then again), and prints each command's median wall time and its ratio to the
baseline ``python -c "import numpy, pyarrow.parquet"`` measured in the same run: the ratio is
what to read, absolute times depend on the machine and its load. Run it in the environment the
package is installed in (the console script ``tripletkit`` next to this Python).
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def _small_table(path):
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    rows = np.random.default_rng(0).standard_normal((200, 16)).astype(np.float32)
    pq.write_table(pa.table({"id": np.arange(200), "label": np.arange(200) % 20,
                             "embedding": pa.FixedSizeListArray.from_arrays(pa.array(rows.ravel()), 16)}), path)


def _wall(cmd):
    t0 = time.perf_counter()
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - t0


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=15, help="interleaved rounds (default: 15)")
    args = parser.parse_args(argv)
    script = Path(sys.executable).with_name("tripletkit")
    with tempfile.TemporaryDirectory() as tmp:
        table = os.path.join(tmp, "small.parquet")
        _small_table(table)
        commands = {
            "import numpy, pyarrow.parquet": [sys.executable, "-c", "import numpy, pyarrow.parquet"],
            "tripletkit --help": [str(script), "--help"],
            "tripletkit check (200 x 16)": [str(script), "check", table],
        }
        for cmd in commands.values():  # warm the file cache once
            _wall(cmd)
        times = {name: [] for name in commands}
        for _ in range(args.repeat):
            for name, cmd in commands.items():
                times[name].append(_wall(cmd))
    base = statistics.median(times["import numpy, pyarrow.parquet"])
    load = os.getloadavg()[0]
    print(f"{args.repeat} interleaved rounds; load average {load:.2f}\n")
    print("| command | median wall (s) | ratio to the baseline |")
    print("|---|---:|---:|")
    for name, values in times.items():
        med = statistics.median(values)
        print(f"| {name} | {med:.3f} | {med / base:.2f}x |")


if __name__ == "__main__":
    main()
