"""Interrupting a run (SIGINT or SIGTERM during mining, scoring or a sweep) leaves no output and no
temporary file behind, and the command exits with 130 (SIGINT) or 143 (SIGTERM).

Each test runs the command line in a child process (``tripletkit.cli.main``, as ``python -m
tripletkit`` does) that holds at a definite point inside the work (after a row group of the
triplet file was written, when a worker thread of the all-pairs pass starts, after a figure of a
report was saved): it prints ``[hold] ...`` on stderr and waits there until a signal arrives. The
test waits for that line, checks that the run is where it should be (its temporary output
exists), sends the signal and checks the output folder afterwards: it must be empty. The inputs
live in another folder, which must be unchanged. Holding makes the outcome independent of the
machine's speed and load: the run cannot finish before the signal, and the signal cannot come
before the run is inside its work.
"""

import os
import re
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from tripletkit.scenario import demo_paths
from tripletkit.tables.embeddings import write_table

# A bound on a hang (a child that never reaches its hold or never exits), not on speed: far above
# what any of these runs takes on a loaded 2-core machine.
_HANG_SECONDS = 600

# Run by the child: install one hold, then run the command line. signal.set_wakeup_fd makes every
# signal that arrives write a byte to a pipe, which releases a hold in any thread; a hold in the
# main thread is interrupted by the signal's handler (KeyboardInterrupt or the SIGTERM exit) itself.
_CHILD = r"""
import os, signal, sys, threading

hold_at, argv = sys.argv[1], sys.argv[2:]
wake_read, wake_write = os.pipe()
os.set_blocking(wake_write, False)
signal.set_wakeup_fd(wake_write, warn_on_full_buffer=False)
lock, held = threading.Lock(), []


def hold(where):
    with lock:
        if held:
            return  # only the first call holds; other threads go on
        held.append(where)
    print(f"[hold] {where} ({threading.current_thread().name})", file=sys.stderr, flush=True)
    os.read(wake_read, 1)


def hold_after(cls, name, where):
    original = getattr(cls, name)

    def wrapper(*args, **kwargs):
        result = original(*args, **kwargs)
        hold(where)
        return result

    setattr(cls, name, wrapper)


if hold_at == "row-group":
    import pyarrow.parquet as pq

    hold_after(pq.ParquetWriter, "write_table", "a row group was written")
elif hold_at == "worker-thread":
    from concurrent.futures import ThreadPoolExecutor

    submit = ThreadPoolExecutor.submit

    def submit_held(self, fn, *args, **kwargs):
        def task(*a, **k):
            hold("a worker thread starts")
            return fn(*a, **k)

        return submit(self, task, *args, **kwargs)

    ThreadPoolExecutor.submit = submit_held
elif hold_at == "figure":
    from matplotlib.figure import Figure

    hold_after(Figure, "savefig", "a figure was saved")
else:
    raise SystemExit(f"unknown hold {hold_at!r}")

if argv[0] == "--python":
    # a Python caller: the verb is called as a function, and the caller catches the interrupt
    import json

    import tripletkit

    verb, args, kwargs = json.loads(argv[1])
    try:
        getattr(tripletkit, verb)(*args, **kwargs)
    except KeyboardInterrupt:
        print("[caught] KeyboardInterrupt", file=sys.stderr, flush=True)
        sys.exit(0)
    sys.exit(3)  # the interrupt never arrived

from tripletkit.cli import main

sys.exit(main(argv))
"""


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    """Seeded clustered tables (mining 3,000 x 32, scoring 3,000 x 32) and a short sweep config."""
    folder = tmp_path_factory.mktemp("inputs")
    rng = np.random.default_rng(20261201)
    for name, n, k in (("mine.parquet", 3000, 150), ("score.parquet", 3000, 150)):
        labels = np.repeat(np.arange(k), n // k)
        X = rng.normal(size=(k, 32))[labels] + rng.normal(size=(n, 32))
        write_table(folder / name, np.arange(n), labels, X)
    demo = demo_paths(cache_dir=folder / "demo")
    (folder / "sweep.toml").write_text(
        "[sweep]\nmargins = [0.05, 0.2, 0.4]\nprimary = \"eer\"\nbootstrap = 20\n"
        f"[data]\ntrain = \"{Path(demo['train_features']).resolve()}\"\n"
        f"heldout = \"{Path(demo['heldout_features']).resolve()}\"\n"
        "[head]\ndim = 16\nepochs = 2\n[evaluation]\nbootstrap = 20\n"
    )
    return folder


def _listing(folder):
    return sorted(str(p.relative_to(folder)) for p in Path(folder).rglob("*"))


class _Watcher:
    """Collects a process's stderr lines in a thread; ``wait_for`` blocks until one matches."""

    def __init__(self, proc):
        self.lines, self.proc = [], proc
        self._new = threading.Condition()
        self._thread = threading.Thread(target=self._read, daemon=True)
        self._thread.start()

    def _read(self):
        for line in self.proc.stderr:
            with self._new:
                self.lines.append(line.rstrip("\n"))
                self._new.notify_all()
        with self._new:
            self._new.notify_all()

    def wait_for(self, pattern, timeout=_HANG_SECONDS):
        """Whether a line matching ``pattern`` arrived (False: the process ended without it)."""
        deadline = time.monotonic() + timeout
        with self._new:
            while not any(re.search(pattern, line) for line in self.lines):
                left = deadline - time.monotonic()
                # the reader thread has seen the end of stderr: no line can come any more
                if left <= 0 or not self._thread.is_alive():
                    return False
                self._new.wait(min(left, 0.2))
        return True

    def finish(self, timeout=_HANG_SECONDS):
        self.proc.wait(timeout=timeout)
        self._thread.join(timeout=10)
        return self.lines


def _start_held(hold_at, argv, cwd):
    """Start the command line ``argv`` in a child that holds at ``hold_at``; wait until it holds."""
    proc = subprocess.Popen([sys.executable, "-c", _CHILD, hold_at, *argv], cwd=cwd, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    watcher = _Watcher(proc)
    if not watcher.wait_for(r"^\[hold\] "):
        proc.kill()
        pytest.fail(f"the run never reached its hold ({hold_at}):\n" + "\n".join(watcher.finish()[-20:]))
    # it waits in the hold until the signal: it cannot have finished
    assert proc.poll() is None
    return proc, watcher


def _check_after(proc, watcher, sig, work, inputs, before):
    lines = watcher.finish()
    expected = {signal.SIGINT: 130, signal.SIGTERM: 143}[sig]
    assert proc.returncode == expected, (proc.returncode, lines[-5:])
    assert lines[-1] == ("interrupted" if sig == signal.SIGINT else "terminated") + ": no output was written"
    assert not any("Traceback" in line for line in lines), lines
    assert _listing(work) == []  # no output, no temporary dot-file, no old copy moved aside
    assert _listing(inputs) == before


SIGNALS = [signal.SIGINT, signal.SIGTERM]


@pytest.mark.parametrize("sig", SIGNALS, ids=["SIGINT", "SIGTERM"])
def test_interrupted_mining_leaves_nothing(inputs, tmp_path, sig):
    before = _listing(inputs)
    proc, watcher = _start_held("row-group", ["mine", str(inputs / "mine.parquet"), "--out",
                                              str(tmp_path / "triplets.parquet")], tmp_path)
    # mid-output: the temporary triplet file holds a row group
    assert list(tmp_path.glob(".triplets.parquet.tmp-*")), _listing(tmp_path)
    assert not (tmp_path / "triplets.parquet").exists()
    proc.send_signal(sig)
    _check_after(proc, watcher, sig, tmp_path, inputs, before)


@pytest.mark.parametrize("sig", SIGNALS, ids=["SIGINT", "SIGTERM"])
def test_interrupted_scoring_leaves_nothing(inputs, tmp_path, sig):
    before = _listing(inputs)
    # two threads and six blocks, so that the all-pairs pass runs in worker threads on any machine
    proc, watcher = _start_held("worker-thread", ["score", str(inputs / "score.parquet"), "--out",
                                                  str(tmp_path / "report"), "--bootstrap", "20", "--threads", "2",
                                                  "--block-rows", "500"], tmp_path)
    # held in a worker thread of the all-pairs pass; the main thread waits for the workers
    stage = [i for i, line in enumerate(watcher.lines) if re.search(r"^\[score\] verification over all", line)]
    hold = [i for i, line in enumerate(watcher.lines) if line.startswith("[hold] ")]
    assert stage and stage[0] < hold[0], watcher.lines
    assert "MainThread" not in watcher.lines[hold[0]]
    proc.send_signal(sig)
    _check_after(proc, watcher, sig, tmp_path, inputs, before)


def test_scoring_interrupted_while_writing_leaves_nothing(inputs, tmp_path):
    before = _listing(inputs)
    proc, watcher = _start_held("figure", ["score", str(inputs / "mine.parquet"), "--out", str(tmp_path / "report"),
                                           "--bootstrap", "20"], tmp_path)
    # the temporary report folder holds the first plot; the report is not written yet
    (temp,) = tmp_path.glob(".report.tmp-*")
    assert [p.name for p in temp.glob("*.png")] and not (temp / "report.json").exists()
    proc.send_signal(signal.SIGINT)
    _check_after(proc, watcher, signal.SIGINT, tmp_path, inputs, before)


@pytest.mark.parametrize("sig", SIGNALS, ids=["SIGINT", "SIGTERM"])
def test_interrupted_sweep_leaves_nothing(inputs, tmp_path, sig):
    before = _listing(inputs)
    proc, watcher = _start_held("figure", ["sweep", str(inputs / "sweep.toml"), "--out", str(tmp_path / "sweep")],
                                tmp_path)
    # held while the first run's report is written, inside the temporary sweep folder
    assert any(re.search(r"^\[sweep\] run 1/3 .*epoch", line) for line in watcher.lines), watcher.lines
    (temp,) = tmp_path.glob(".sweep.tmp-*")
    assert list(temp.rglob("*.png"))
    proc.send_signal(sig)
    _check_after(proc, watcher, sig, tmp_path, inputs, before)


def test_sigterm_handler_is_restored_after_main(tmp_path):
    # in-process: main installs its SIGTERM handler for the run only
    from tripletkit.cli import main

    previous = signal.getsignal(signal.SIGTERM)
    write_table(tmp_path / "t.parquet", np.arange(6), np.repeat(np.arange(3), 2),
                np.random.default_rng(20261201).normal(size=(6, 3)))
    assert main(["check", str(tmp_path / "t.parquet")]) == 0
    assert signal.getsignal(signal.SIGTERM) is previous


def test_sigterm_inside_main_becomes_exit_143(tmp_path, monkeypatch, capsys):
    # the handler itself: a SIGTERM delivered mid-run unwinds through atomic_path (removing its
    # temporary folder) and main returns 143
    import tripletkit.evaluate as evaluate_module
    from tripletkit.cli import main

    write_table(tmp_path / "t.parquet", np.arange(12), np.repeat(np.arange(4), 3),
                np.random.default_rng(20261201).normal(size=(12, 3)))
    real = evaluate_module.score

    def score_then_signal(*args, **kwargs):
        from tripletkit import report as report_module

        original = report_module.write_report

        def write_and_die(report, folder, **kw):
            original(report, folder, **kw)
            os.kill(os.getpid(), signal.SIGTERM)  # arrives while the temporary folder is full
            time.sleep(5)
            raise AssertionError("SIGTERM was not delivered")

        monkeypatch.setattr(report_module, "write_report", write_and_die)
        return real(*args, **kwargs)

    monkeypatch.setattr(evaluate_module, "score", score_then_signal)
    out = tmp_path / "work"
    out.mkdir()
    assert main(["score", str(tmp_path / "t.parquet"), "--out", str(out / "r"), "--quiet", "--bootstrap", "0"]) == 143
    assert capsys.readouterr().err.splitlines()[-1] == "terminated: no output was written"
    assert list(out.iterdir()) == []


def _entry(kind):
    if kind == "python -m":
        return ["-m", "tripletkit"]
    script = Path(sys.executable).with_name("tripletkit")  # the console script of this environment
    if not script.is_file():
        pytest.skip("the tripletkit console script is not installed next to this Python")
    return [str(script)]


@pytest.mark.parametrize("entry", ["python -m", "console script"])
@pytest.mark.parametrize("after", ["tripletkit.cli", "numpy", "pyarrow", "faiss"])
def test_ctrl_c_while_the_command_starts_is_one_line(inputs, tmp_path, entry, after):
    # -X importtime prints a line as each import completes: the interrupt is sent once the given
    # module has loaded, so it lands in the imports that follow or in the run itself; wherever it
    # lands, the answer is the same one line and exit code 130 (not a KeyboardInterrupt traceback)
    before = _listing(inputs)
    proc = subprocess.Popen([sys.executable, "-X", "importtime", *_entry(entry), "mine", str(inputs / "mine.parquet"),
                             "--out", str(tmp_path / "triplets.parquet")], cwd=tmp_path, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    watcher = _Watcher(proc)
    assert watcher.wait_for(rf"^import time:.*\| +{re.escape(after)}$", _HANG_SECONDS), watcher.finish()[-5:]
    proc.send_signal(signal.SIGINT)
    lines = watcher.finish()
    own = [line for line in lines if not line.startswith("import time:")]
    assert proc.returncode == 130, (proc.returncode, own[-5:])
    assert own == ["interrupted: no output was written"], own
    assert _listing(tmp_path) == [] and _listing(inputs) == before


@pytest.mark.parametrize("verb, hold_at", [("mine", "row-group"), ("score", "figure"), ("sweep", "figure")])
def test_a_python_caller_interrupted_mid_run_is_left_no_temporary_file(inputs, tmp_path, verb, hold_at):
    # Ctrl-C in a Python session (a KeyboardInterrupt the caller catches): the verbs' outputs are
    # published atomically, so nothing is left behind, as with the command line
    import json

    before = _listing(inputs)
    call = {
        "mine": ["mine", [str(inputs / "mine.parquet"), str(tmp_path / "triplets.parquet")], {"quiet": True}],
        "score": ["score", [str(inputs / "score.parquet"), str(tmp_path / "report")], {"quiet": True}],
        "sweep": ["sweep", [str(inputs / "sweep.toml"), str(tmp_path / "sweep")], {"quiet": True}],
    }[verb]
    proc, watcher = _start_held(hold_at, ["--python", json.dumps(call)], tmp_path)
    assert [p for p in tmp_path.iterdir() if p.name.startswith(".")], _listing(tmp_path)  # mid-output
    proc.send_signal(signal.SIGINT)
    lines = watcher.finish()
    assert proc.returncode == 0 and lines[-1] == "[caught] KeyboardInterrupt", lines[-5:]
    assert _listing(tmp_path) == []
    assert _listing(inputs) == before
