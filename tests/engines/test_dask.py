"""Tests of tripletkit.engines.dask and .dask_mining: mine and score on a 2-worker Dask LocalCluster.

Every test compares the cluster run with the single-process run of the same input (the twin):
the score report must be identical (timings and ``verification.passes`` aside) and the mined
triplets the same rows, on the demo tables and on seeded random tables written as partitioned
folders, also when the worker running the driver is killed during the run.
"""

import dataclasses
import functools
import json
import os
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

distributed = pytest.importorskip("distributed")

from tripletkit._errors import TripletkitError  # noqa: E402
from tripletkit.config import ComputeConfig, EvaluationConfig, MiningConfig  # noqa: E402
from tripletkit.engines.dask_mining import _ShardedIndex, mine_on_cluster  # noqa: E402
from tripletkit.evaluate import score  # noqa: E402
from tripletkit.mining import mine  # noqa: E402
from tripletkit.tables.embeddings import EmbeddingTable, to_arrow  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
TRAIN = ROOT / "demo_data" / "train_embeddings.parquet"
HELDOUT = ROOT / "demo_data" / "heldout_embeddings.parquet"
TIMING = ("seconds", "stage_seconds")


@pytest.fixture(scope="module")
def local():
    """One LocalCluster for the module: 2 worker processes, one thread each."""
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                                  silence_logs=40) as lc:
        yield lc


@pytest.fixture
def compute(local):
    return ComputeConfig(scheduler=local.scheduler_address)


def _comparable(report):
    out = json.loads(json.dumps(report))  # plain values, so that == compares every number
    for key in TIMING:
        out.pop(key)
    if out.get("verification"):
        # how the refined bins were listed (1 or 2 passes over the blocks), not a result
        out["verification"].pop("passes", None)
    return out


def _write_folder(path, ids, labels, emb, groups=None, files=3, row_group=70):
    """A table as a folder of ``files`` Parquet files of several row groups each."""
    path.mkdir()
    table = to_arrow(ids, labels, emb, groups)
    edges = np.linspace(0, table.num_rows, files + 1).astype(int)
    for i, (a, b) in enumerate(zip(edges[:-1], edges[1:])):
        pq.write_table(table.slice(a, b - a), path / f"part-{i}.parquet", row_group_size=row_group)
    return path


def _random_table(rng, n=600, k=40, d=16, noise=0.8):
    centres = rng.standard_normal((k, d))
    labels = rng.integers(0, k, size=n)
    x = centres[labels] + noise * rng.standard_normal((n, d))
    x[5] = x[4] + 1e-4 * rng.standard_normal(d)  # a suspect duplicate when labels differ
    labels[5] = (labels[4] + 1) % k
    ids = np.array([f"seal-{i:05d}" for i in range(n)], dtype=object)
    names = np.array([f"ind-{v:03d}" for v in labels], dtype=object)
    groups = np.array(["north", "south", "east"], dtype=object)[rng.integers(0, 3, size=n)]
    return ids, names, x.astype(np.float32), groups


def _read_folder(path):
    parts = sorted(Path(path).glob("part-*.parquet"))
    return pa.concat_tables([pq.read_table(p) for p in parts]), parts


# ----------------------------------------------------------------------------- scoring twins


def test_score_demo_is_identical(compute, tmp_path):
    one = score(HELDOUT, out=tmp_path / "one", quiet=True)
    many = score(HELDOUT, out=tmp_path / "many", quiet=True, compute=compute)
    assert _comparable(many) == _comparable(one)
    # the task groups keep their highest impostor scores, which reach the operating points' bins
    assert many["verification"]["passes"] == 1
    # the written reports agree too (report.json holds the same dict)
    a = _comparable(json.loads((tmp_path / "one" / "report.json").read_text()))
    b = _comparable(json.loads((tmp_path / "many" / "report.json").read_text()))
    assert a == b


@pytest.mark.parametrize("partitions", [1, 3])
def test_score_random_partitioned_table_is_identical(compute, tmp_path, rng, partitions):
    ids, labels, x, groups = _random_table(rng)
    folder = _write_folder(tmp_path / "heldout", ids, labels, x, groups)
    # small blocks so that there are many, in task groups of several blocks each
    cfg = EvaluationConfig(bootstrap=40, fmr=(0.001, 0.01, 0.1), block_rows=37, memory_mb=16)
    one = score(folder, config=cfg, quiet=True)
    many = score(folder, config=cfg, quiet=True, compute=dataclasses.replace(compute, partitions=partitions))
    assert one["verification"]["groups"]  # the group column is scored on both paths
    assert _comparable(many) == _comparable(one)
    # 16 MiB hold too few of the highest impostor scores: a second pass lists the bins
    assert many["verification"]["passes"] == 2


def test_score_pair_list_and_relative_paths(compute, tmp_path, rng, monkeypatch):
    ids, labels, x, _ = _random_table(rng, n=200)
    folder = _write_folder(tmp_path / "heldout", ids, labels, x)
    left, right = rng.integers(0, 100, size=300), rng.integers(100, 200, size=300)
    pq.write_table(pa.table({"left": ids[left].tolist(), "right": ids[right].tolist()}), tmp_path / "pairs.parquet")
    monkeypatch.chdir(tmp_path)
    cfg = EvaluationConfig(pairs="pairs.parquet", bootstrap=20, clustering=False)
    one = score("heldout", config=cfg, quiet=True)
    many = score("heldout", config=cfg, quiet=True, compute=compute)
    assert many["input"]["path"] == "heldout" and many["input"]["pair_list"] == "pairs.parquet"
    assert _comparable(many) == _comparable(one)


# ----------------------------------------------------------------------------- mining twins


def test_mine_demo_is_identical(compute, tmp_path):
    one = mine(TRAIN, tmp_path / "one.parquet", quiet=True)
    many = mine(TRAIN, tmp_path / "many.parquet", quiet=True, compute=compute)
    table, parts = _read_folder(tmp_path / "many.parquet")
    assert table.equals(pq.read_table(tmp_path / "one.parquet"))
    assert [p.name for p in parts] == ["part-00000.parquet"]
    # one part: the very bytes of the single file, metadata included
    assert parts[0].read_bytes() == (tmp_path / "one.parquet").read_bytes()
    assert (tmp_path / "many.duplicates.parquet").read_bytes() == (tmp_path / "one.duplicates.parquet").read_bytes()
    assert many.to_dict() | {"seconds": 0, "out": 0, "duplicates_out": 0} == \
        one.to_dict() | {"seconds": 0, "out": 0, "duplicates_out": 0}
    assert many.details["shards"] == 4
    # nothing but the output and its duplicates file is left in the folder
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "many.duplicates.parquet", "many.parquet", "one.duplicates.parquet", "one.parquet"]


@pytest.mark.parametrize("config", [
    MiningConfig(regimes=("easy", "semi-hard", "hard"), select="hardest", neighbours=8, seed=3),
    MiningConfig(regimes=("easy", "semi-hard"), select="random", positives_per_anchor=2, negatives_per_positive=3,
                 exclude_duplicates=True, block_rows=64, seed=5),
    MiningConfig(regimes=("hard", "easy"), select="distance-weighted", distance="euclidean", max_per_identity=4,
                 neighbours=20, seed=7),
])
def test_mine_random_partitioned_table_is_identical(compute, tmp_path, rng, config):
    ids, labels, x, groups = _random_table(rng)
    x[[17, 301]] = np.nan  # dropped on both paths: shard offsets must account for them
    folder = _write_folder(tmp_path / "train", ids, labels, x, groups)
    opts = {"drop_invalid": True}
    one = mine(folder, tmp_path / "one.parquet", config=config, quiet=True, table_options=opts,
               return_triplets=True)
    many = mine_on_cluster(folder, tmp_path / "many", config=config, compute=dataclasses.replace(compute, partitions=5),
                           quiet=True, table_options=opts, part_rows=700, return_triplets=True)
    table, parts = _read_folder(tmp_path / "many")
    single = pq.read_table(tmp_path / "one.parquet")
    assert single.num_rows > 700 and len(parts) == -(-single.num_rows // 700)
    assert table.equals(single)
    assert pq.read_table(tmp_path / "many.duplicates.parquet").equals(pq.read_table(tmp_path / "one.duplicates.parquet"))
    assert one.suspect_duplicates >= 1
    for key, value in one.triplets.items():
        assert np.array_equal(many.triplets[key], value), key


def test_cli_mine_and_score_with_scheduler(local, tmp_path):
    from tripletkit.cli import main

    addr = local.scheduler_address
    assert main(["mine", str(TRAIN), "--out", str(tmp_path / "t.parquet"), "--quiet", "--scheduler", addr,
                 "--partitions", "3"]) == 0
    assert main(["mine", str(TRAIN), "--out", str(tmp_path / "one.parquet"), "--quiet"]) == 0
    assert _read_folder(tmp_path / "t.parquet")[0].equals(pq.read_table(tmp_path / "one.parquet"))
    assert main(["score", str(HELDOUT), "--out", str(tmp_path / "rep"), "--quiet", "--scheduler", addr,
                 "--no-plots"]) == 0
    assert (tmp_path / "rep" / "report.json").is_file()


# ----------------------------------------------------------------------------- faults


def _kill_driver_worker(address, prefix, record):
    """Wait for the driver task to run, then end its worker process (the nanny starts a new one)."""
    with distributed.Client(address) as client:
        deadline = time.time() + 60
        while time.time() < deadline:
            for worker, keys in client.processing().items():
                if any(str(k).startswith(prefix) for k in keys):
                    time.sleep(0.8)  # let the driver get into the search
                    record["before"] = set(client.scheduler_info()["workers"])
                    record["at"] = time.time()
                    with pytest.raises(Exception):  # the worker dies before it can answer
                        client.run(functools.partial(os._exit, 1), workers=[worker])
                    record["worker"] = worker
                    return
            time.sleep(0.02)


def test_worker_lost_mid_run_gives_the_same_triplets(local, compute, tmp_path):
    one = mine(TRAIN, tmp_path / "one.parquet", quiet=True)
    record = {}
    killer = threading.Thread(target=_kill_driver_worker,
                              args=(local.scheduler_address, "tripletkit-mine-driver-", record))
    killer.start()
    many = mine(TRAIN, tmp_path / "many.parquet", quiet=True, compute=compute)
    end = time.time()
    killer.join()
    assert "worker" in record and record["at"] < end  # the driver's worker died during the run
    assert _read_folder(tmp_path / "many.parquet")[0].equals(pq.read_table(tmp_path / "one.parquet"))
    assert many.n_triplets == one.n_triplets
    # no attempt folder of the killed driver is left behind
    assert not [p for p in (tmp_path / "many.parquet").iterdir() if not p.name.startswith("part-")]
    with distributed.Client(local.scheduler_address) as client:
        client.wait_for_workers(2, timeout=60)
        assert record["worker"] not in client.scheduler_info()["workers"]


def test_driver_stops_when_its_client_dies(local, tmp_path):
    addr, out = local.scheduler_address, tmp_path / "t.parquet"
    code = ("from tripletkit.config import ComputeConfig\nfrom tripletkit.mining import mine\n"
            f"mine({str(TRAIN)!r}, {str(out)!r}, quiet=True, block_rows=100, compute=ComputeConfig(scheduler={addr!r}))\n")
    proc = subprocess.Popen([sys.executable, "-c", code])

    def drivers(client):
        return [k for keys in client.processing().values() for k in keys if str(k).startswith("tripletkit-mine-driver-")]

    with distributed.Client(addr) as client:
        deadline = time.time() + 60
        while not drivers(client) and time.time() < deadline:
            time.sleep(0.02)
        assert drivers(client), "the driver never started"
        time.sleep(0.5)
        proc.kill()  # the client dies without cleaning up
        proc.wait()

        def still_running():
            # the scheduler forgets the driver at once; its worker holds it (cancelled) until it returns
            found = client.run(lambda dask_worker: [str(k) for k in dask_worker.state.tasks
                                                    if str(k).startswith("tripletkit-mine-driver-")])
            return any(found.values())

        deadline = time.time() + 60
        while still_running() and time.time() < deadline:
            time.sleep(0.1)
        assert not still_running()
    # a hard kill leaves the dot-prefixed temporary folder, never the output
    assert not out.exists()
    (temp,) = tmp_path.glob(".t.parquet.tmp-*")
    (attempt,) = temp.glob(".attempt-*")
    # the driver saw that its client was gone and stopped before writing its last file
    assert not (attempt / "duplicates.parquet").exists()


def test_client_error_leaves_no_output(compute, tmp_path, monkeypatch):
    import tripletkit.engines.dask_mining as M

    def boom(*args):
        raise KeyboardInterrupt

    monkeypatch.setattr(M, "_settle", boom)
    with pytest.raises(KeyboardInterrupt):
        mine(TRAIN, tmp_path / "t.parquet", quiet=True, compute=compute)
    assert list(tmp_path.iterdir()) == []


def test_search_stops_when_the_output_folder_is_removed(tmp_path):
    index = _ShardedIndex(None, [], [], 10, 4, folder=str(tmp_path / "gone"))
    with pytest.raises(TripletkitError, match="was removed; the run was cancelled"):
        next(index.within_pieces(np.zeros((1, 4), np.float32), np.zeros(1), 2))


# ----------------------------------------------------------------------------- inputs and errors


def test_table_object_with_a_source_is_read_again_and_checked(compute, tmp_path):
    table = EmbeddingTable.read(HELDOUT)
    cfg = EvaluationConfig(bootstrap=0, clustering=False)
    assert _comparable(score(table, config=cfg, quiet=True, compute=compute)) == \
        _comparable(score(HELDOUT, config=cfg, quiet=True))
    other = EmbeddingTable.read(HELDOUT, group_column="season")  # other groups, same fingerprint
    with pytest.raises(TripletkitError, match="is not the EmbeddingTable given"):
        score(other, config=cfg, quiet=True, compute=compute)


def test_errors_name_the_problem(compute, tmp_path, rng):
    x = rng.standard_normal((20, 4))
    with pytest.raises(TripletkitError, match="must be a Parquet path"):
        mine((np.arange(20), np.repeat(np.arange(5), 4), x), quiet=True, compute=compute)
    with pytest.raises(TripletkitError, match="built in memory"):
        score(EmbeddingTable.from_arrays(np.arange(20), np.repeat(np.arange(5), 4), x), quiet=True, compute=compute)
    with pytest.raises(TripletkitError, match="does not exist"):
        score(tmp_path / "nothing.parquet", quiet=True, compute=compute)
    # index = auto on a table whose invalid rows are dropped: only the driver knows the rows it
    # resolves on, so the driver refuses (the options a client can check are refused before, below)
    with pytest.raises(TripletkitError, match="index = ivf is not available with a scheduler"):
        mine(TRAIN, quiet=True, compute=compute, exact_below=100, table_options={"drop_invalid": True})
    with pytest.raises(TripletkitError, match="cannot reach the Dask scheduler 'nowhere'"):
        score(HELDOUT, quiet=True, compute=ComputeConfig(scheduler="nowhere"))
    (tmp_path / "t.parquet").mkdir()
    with pytest.raises(TripletkitError, match="already exists"):
        mine(TRAIN, tmp_path / "t.parquet", quiet=True, compute=compute)
    # with --force, a folder output that holds the input would delete it
    (tmp_path / "data").mkdir()
    (tmp_path / "data" / "train.parquet").write_bytes(TRAIN.read_bytes())
    with pytest.raises(TripletkitError, match="contains the input .* would destroy the input"):
        mine(tmp_path / "data" / "train.parquet", tmp_path / "data", force=True, quiet=True, compute=compute)
    assert (tmp_path / "data" / "train.parquet").is_file()
    # a bad table fails on the cluster with the single-process message
    bad = to_arrow(np.arange(6), np.repeat([1, 2], 3), np.vstack([np.zeros((1, 3)), np.ones((5, 3))]))
    pq.write_table(bad, tmp_path / "bad.parquet")
    with pytest.raises(TripletkitError, match="1 zero-norm rows"):
        score(tmp_path / "bad.parquet", quiet=True, compute=compute)


def test_without_a_scheduler_dask_is_never_imported(tmp_path):
    code = (
        "import sys\n"
        "from tripletkit import evaluate, mining\n"
        "from tripletkit.config import ComputeConfig, EvaluationConfig\n"
        f"mining.mine({str(TRAIN)!r}, {str(tmp_path / 't.parquet')!r}, quiet=True, compute=ComputeConfig())\n"
        f"evaluate.score({str(HELDOUT)!r}, quiet=True, config=EvaluationConfig(bootstrap=0),"
        " compute=ComputeConfig())\n"
        "bad = sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')"
        " or m.startswith('tripletkit.engines.dask'))\n"
        "print('imported:', bad)\n"
    )
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip().endswith("imported: []")
    assert (tmp_path / "t.parquet").is_file()


# ----------------------------------------------------------------------------- refused before a cluster starts


def _no_cluster(*args, **kwargs):
    raise AssertionError("a cluster was started for a run that must be refused before")


REFUSED = [
    ("mine", {"index": "hnsw"},
     r"^index = hnsw is not available with a scheduler, only index = exact is; pass index='exact'"),
    ("mine", {"index": "ivf"}, r"^index = ivf is not available with a scheduler"),
    # the demo table has 3,918 rows: auto resolves to ivf at or above exact_below
    ("mine", {"exact_below": 3918}, r"^index = auto picks ivf for 3,918 rows \(exact_below = 3,918\), and only index = "
                                    r"exact runs with a scheduler; pass index='exact'"),
    ("mine", {"threads": 2}, r"^threads = 2 applies to a run in one process and is not used with a scheduler.*"
                             r"pass threads=0"),
    ("score", {"threads": 1}, r"^threads = 1 applies to a run in one process"),
]


@pytest.mark.parametrize("scheduler", ["local-cluster", "tcp://127.0.0.1:9"])
@pytest.mark.parametrize("verb, options, match", REFUSED, ids=[f"{v}-{'-'.join(o)}" for v, o, _ in REFUSED])
def test_unsupported_options_are_refused_before_a_cluster_starts(tmp_path, monkeypatch, scheduler, verb, options,
                                                                 match):
    import tripletkit.engines.dask as D

    # no cluster may be started or reached (tcp://127.0.0.1:9 is never a Dask scheduler)
    monkeypatch.setattr(D, "cluster", _no_cluster)
    compute = ComputeConfig(scheduler=scheduler)
    with pytest.raises(TripletkitError, match=match):
        if verb == "mine":
            mine(TRAIN, tmp_path / "t.parquet", quiet=True, compute=compute, **options)
        else:
            score(HELDOUT, tmp_path / "rep", quiet=True, compute=compute, config=EvaluationConfig(**options))
    assert list(tmp_path.iterdir()) == []


def test_auto_index_is_resolved_on_the_rows_of_a_table_object_and_of_a_folder(tmp_path, rng, monkeypatch):
    import tripletkit.engines.dask as D

    monkeypatch.setattr(D, "cluster", _no_cluster)
    compute = ComputeConfig(scheduler="local-cluster")
    ids, labels, x, groups = _random_table(rng, n=300)
    folder = _write_folder(tmp_path / "train", ids, labels, x, groups)
    for source in (folder, EmbeddingTable.read(folder)):
        with pytest.raises(TripletkitError, match=r"index = auto picks ivf for 300 rows \(exact_below = 300\)"):
            mine(source, quiet=True, compute=compute, exact_below=300)
    # one row fewer than exact_below: exact, so the run goes on to start its cluster
    with pytest.raises(AssertionError, match="a cluster was started"):
        mine(folder, quiet=True, compute=compute, exact_below=301)


def test_cli_refuses_an_approximate_index_in_one_line(tmp_path, monkeypatch, capsys):
    import tripletkit.engines.dask as D
    from tripletkit.cli import main

    monkeypatch.setattr(D, "cluster", _no_cluster)
    code = main(["mine", str(TRAIN), "--out", str(tmp_path / "t.parquet"), "--scheduler", "local-cluster",
                 "--index", "hnsw"])
    err = capsys.readouterr().err
    assert code == 2
    assert err.splitlines() == ["error: index = hnsw is not available with a scheduler, only index = exact is; "
                                "pass --index exact or run without --scheduler"]
    assert list(tmp_path.iterdir()) == []


def test_local_cluster_error_is_raised_without_the_workers_traceback(tmp_path, capfd):
    # the driver fails on its worker: the client raises the error, no worker logs a traceback
    bad = to_arrow(np.arange(6), np.repeat([1, 2], 3), np.vstack([np.zeros((1, 3)), np.ones((5, 3))]))
    pq.write_table(bad, tmp_path / "bad.parquet")
    with pytest.raises(TripletkitError, match="1 zero-norm rows"):
        score(tmp_path / "bad.parquet", quiet=True, compute=ComputeConfig(scheduler="local-cluster", workers=1))
    err = capfd.readouterr().err
    assert "Traceback" not in err and "Compute Failed" not in err, err


# ----------------------------------------------------------------------------- a cluster without workers


def _finishes(call, seconds=300):
    """``call()`` run in a thread, its exception raised here. A run that waits for ever fails the
    test after ``seconds`` instead of hanging (a bound on a hang, far above any run's time here)."""
    done = {}

    def target():
        try:
            call()
        except BaseException as exc:  # raised again in the test's thread
            done["error"] = exc
        else:
            done["error"] = None

    thread = threading.Thread(target=target, daemon=True)
    thread.start()
    thread.join(seconds)
    assert "error" in done, "the run was still waiting"
    if done["error"] is not None:
        raise done["error"]


def test_a_cluster_without_workers_stops_the_run(tmp_path):
    with distributed.LocalCluster(n_workers=0, processes=True, dashboard_address=None, silence_logs=50) as lc:
        compute = ComputeConfig(scheduler=lc.scheduler_address, no_workers_timeout=0.5)
        runs = {"mine": lambda: mine(TRAIN, tmp_path / "t.parquet", quiet=True, compute=compute),
                "score": lambda: score(HELDOUT, tmp_path / "rep", quiet=True, compute=compute)}
        for verb, run in runs.items():
            message = (r"^the Dask cluster at tcp://\S+ has had no worker for 0\.5 s, so the run was stopped and "
                       r"nothing was written; start workers")
            with pytest.raises(TripletkitError, match=message) as info:
                _finishes(run)
            assert "\n" not in str(info.value)
            assert list(tmp_path.iterdir()) == [], verb


def test_cli_run_whose_workers_all_died_stops_in_one_line(tmp_path):
    """The issue's case: ``mine --scheduler tcp://...`` whose only worker is killed (no nanny to
    start it again). The worker is kept busy until it dies, so the driver has surely not finished."""
    out = tmp_path / "work"
    out.mkdir()
    with distributed.LocalCluster(n_workers=0, processes=True, dashboard_address=None, silence_logs=50) as lc, \
            distributed.Client(lc.scheduler_address) as client:
        addr = lc.scheduler_address
        worker = subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_worker", addr, "--nthreads", "1",
                                   "--no-nanny", "--no-dashboard"],
                                  stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        run = None
        try:
            client.wait_for_workers(1, timeout=300)
            # the worker's one thread sleeps: the driver can be queued but never run
            busy = client.submit(time.sleep, 3600, pure=False)

            def executing():
                return sum(client.run(lambda dask_worker: sum(
                    ts.state == "executing" for ts in dask_worker.state.tasks.values())).values())

            deadline = time.monotonic() + 300  # bounds on a hang, not on speed
            while not executing() and time.monotonic() < deadline:
                time.sleep(0.05)
            assert executing() == 1
            run = subprocess.Popen([sys.executable, "-m", "tripletkit", "mine", str(TRAIN), "--out",
                                    str(out / "t.parquet"), "--quiet", "--scheduler", addr,
                                    "--no-workers-timeout", "1"],
                                   stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)

            def driver_submitted():
                return client.run_on_scheduler(lambda dask_scheduler: any(
                    str(k).startswith("tripletkit-mine-driver-") for k in dask_scheduler.tasks))

            deadline = time.monotonic() + 300  # bounds on a hang, not on speed
            while not driver_submitted() and run.poll() is None and time.monotonic() < deadline:
                time.sleep(0.05)
            assert driver_submitted(), run.communicate()
            worker.kill()  # every worker of the cluster is now dead
            worker.wait()
            del busy
            _, err = run.communicate(timeout=300)  # a bound on a hang, not on speed
        finally:
            for proc in (worker, run):
                if proc is not None and proc.poll() is None:
                    proc.kill()
                    proc.wait()
    assert run.returncode == 2, err
    assert err.splitlines() == [
        f"error: the Dask cluster at {addr} has had no worker for 1 s, so the run was stopped and nothing was "
        "written; start workers (or raise [compute] no_workers_timeout) and run it again"]
    assert list(out.iterdir()) == []
