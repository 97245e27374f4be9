"""Interrupting a run (SIGINT or SIGTERM during mining, scoring or a sweep) leaves no output and no
temporary file behind, and the command exits with 130 (SIGINT) or 143 (SIGTERM).

Each test starts ``python -m tripletkit ...`` on an input big enough to take several seconds,
waits until the run is demonstrably in the middle of its work (a progress line on stderr, or
the temporary output file of :func:`tripletkit._io.atomic_path` in the output folder), sends the
signal and checks the output folder afterwards: it must be empty. The inputs live in another
folder, which must be unchanged.
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

from tripletkit.demo import demo_paths
from tripletkit.table import write_table

# How long a run may take to reach the point where the signal is sent (a loaded CI machine).
_REACH_SECONDS = 120


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    """Seeded clustered tables: mining 8,000 x 32 and scoring 12,000 x 32 take several seconds."""
    folder = tmp_path_factory.mktemp("inputs")
    rng = np.random.default_rng(20261201)
    for name, n, k in (("mine.parquet", 8000, 400), ("score.parquet", 12000, 600)):
        labels = np.repeat(np.arange(k), n // k)
        X = rng.normal(size=(k, 32))[labels] + rng.normal(size=(n, 32))
        write_table(folder / name, np.arange(n), labels, X)
    demo = demo_paths(cache_dir=folder / "demo")
    (folder / "sweep.toml").write_text(
        "[sweep]\nmargins = [0.05, 0.2, 0.4]\nprimary = \"eer\"\nbootstrap = 20\n"
        f"[data]\ntrain = \"{Path(demo['train_features']).resolve()}\"\n"
        f"heldout = \"{Path(demo['heldout_features']).resolve()}\"\n"
        "[head]\ndim = 16\nepochs = 40\n[evaluation]\nbootstrap = 20\n"
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

    def wait_for(self, pattern, timeout):
        deadline = time.monotonic() + timeout
        with self._new:
            while not any(re.search(pattern, line) for line in self.lines):
                left = deadline - time.monotonic()
                if left <= 0 or self.proc.poll() is not None:
                    return False
                self._new.wait(min(left, 0.2))
        return True

    def finish(self, timeout=120):
        self.proc.wait(timeout=timeout)
        self._thread.join(timeout=10)
        return self.lines


def _wait_for_file(folder, glob, proc, timeout):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and proc.poll() is None:
        if list(Path(folder).glob(glob)):
            return True
        time.sleep(0.02)
    return False


def _start(argv, cwd):
    return subprocess.Popen([sys.executable, "-m", "tripletkit", *argv], cwd=cwd, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)


def _check_after(proc, watcher, sig, work, inputs, before):
    lines = watcher.finish()
    expected = {signal.SIGINT: 130, signal.SIGTERM: 143}[sig]
    assert proc.returncode == expected, (proc.returncode, lines[-5:])
    assert lines[-1] == ("interrupted" if sig == signal.SIGINT else "terminated") + ": no output was written"
    assert not any("Traceback" in line for line in lines)
    assert _listing(work) == []  # no output, no temporary dot-file, no old copy moved aside
    assert _listing(inputs) == before


SIGNALS = [signal.SIGINT, signal.SIGTERM]


@pytest.mark.parametrize("sig", SIGNALS, ids=["SIGINT", "SIGTERM"])
def test_interrupted_mining_leaves_nothing(inputs, tmp_path, sig):
    before = _listing(inputs)
    proc = _start(["mine", str(inputs / "mine.parquet"), "--out", str(tmp_path / "triplets.parquet")], tmp_path)
    watcher = _Watcher(proc)
    # the temporary triplet file exists for the whole run: the signal lands mid-output
    assert _wait_for_file(tmp_path, ".triplets.parquet.tmp-*", proc, _REACH_SECONDS), watcher.finish()
    time.sleep(0.3)
    assert proc.poll() is None, "mining finished before the signal; use a bigger input"
    proc.send_signal(sig)
    _check_after(proc, watcher, sig, tmp_path, inputs, before)


@pytest.mark.parametrize("sig", SIGNALS, ids=["SIGINT", "SIGTERM"])
def test_interrupted_scoring_leaves_nothing(inputs, tmp_path, sig):
    before = _listing(inputs)
    proc = _start(["score", str(inputs / "score.parquet"), "--out", str(tmp_path / "report"), "--bootstrap", "20"],
                  tmp_path)
    watcher = _Watcher(proc)
    # during the all-pairs pass
    assert watcher.wait_for(r"^\[score\] verification over all", _REACH_SECONDS), watcher.finish()
    time.sleep(0.3)
    assert proc.poll() is None, "scoring finished before the signal; use a bigger input"
    proc.send_signal(sig)
    _check_after(proc, watcher, sig, tmp_path, inputs, before)


def test_scoring_interrupted_while_writing_leaves_nothing(inputs, tmp_path):
    before = _listing(inputs)
    proc = _start(["score", str(inputs / "mine.parquet"), "--out", str(tmp_path / "report"), "--bootstrap", "20"],
                  tmp_path)
    watcher = _Watcher(proc)
    # the temporary report folder appears only when the report is being written (plots, JSON)
    assert _wait_for_file(tmp_path, ".report.tmp-*", proc, _REACH_SECONDS), watcher.finish()
    if proc.poll() is not None:
        pytest.fail("the report was written before the signal could be sent")
    proc.send_signal(signal.SIGINT)
    lines = watcher.finish()
    if proc.returncode == 0:
        # the writing took less than the time to send a signal: the output must then be whole
        assert (tmp_path / "report" / "report.json").is_file() and _listing(tmp_path)[0] == "report"
        assert not [p for p in _listing(tmp_path) if p.startswith(".")]
        return
    assert proc.returncode == 130 and lines[-1] == "interrupted: no output was written"
    assert _listing(tmp_path) == [] and _listing(inputs) == before


@pytest.mark.parametrize("sig", SIGNALS, ids=["SIGINT", "SIGTERM"])
def test_interrupted_sweep_leaves_nothing(inputs, tmp_path, sig):
    before = _listing(inputs)
    proc = _start(["sweep", str(inputs / "sweep.toml"), "--out", str(tmp_path / "sweep")], tmp_path)
    watcher = _Watcher(proc)
    # the sweep folder is a temporary folder from the first run on: wait for an epoch line
    assert watcher.wait_for(r"^\[sweep\] run 1/3 .*epoch", _REACH_SECONDS), watcher.finish()
    assert list(tmp_path.glob(".sweep.tmp-*")), "the temporary sweep folder should exist mid-run"
    time.sleep(0.3)
    assert proc.poll() is None, "the sweep finished before the signal; use more epochs"
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
    assert watcher.wait_for(rf"^import time:.*\| +{re.escape(after)}$", _REACH_SECONDS), watcher.finish()[-5:]
    proc.send_signal(signal.SIGINT)
    lines = watcher.finish()
    own = [line for line in lines if not line.startswith("import time:")]
    assert proc.returncode == 130, (proc.returncode, own[-5:])
    assert own == ["interrupted: no output was written"], own
    assert _listing(tmp_path) == [] and _listing(inputs) == before
