"""Atomic outputs: nothing half-written, no temporary left behind, no clobbering."""

import os
import threading

import pytest

from tripletkit import TripletkitError, _io
from tripletkit._io import atomic_path, atomic_paths


def test_file_is_renamed_into_place(tmp_path):
    with atomic_path(tmp_path / "a.txt") as tmp:
        tmp.write_text("done")
        assert not (tmp_path / "a.txt").exists()
    assert (tmp_path / "a.txt").read_text() == "done"
    assert os.listdir(tmp_path) == ["a.txt"]


@pytest.mark.parametrize("exc", [RuntimeError, KeyboardInterrupt, SystemExit])
def test_failure_leaves_nothing(tmp_path, exc):
    with pytest.raises(exc):
        with atomic_path(tmp_path / "out", directory=True) as tmp:
            (tmp / "part.json").write_text("{")
            raise exc()
    assert os.listdir(tmp_path) == []


def test_existing_output_needs_force(tmp_path):
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "old.txt").write_text("old")
    with pytest.raises(TripletkitError, match="already exists; pass force=True"):
        with atomic_path(tmp_path / "out", directory=True):
            pass
    with atomic_path(tmp_path / "out", directory=True, force=True) as tmp:
        (tmp / "new.txt").write_text("new")
    assert os.listdir(tmp_path / "out") == ["new.txt"]
    assert os.listdir(tmp_path) == ["out"]


def test_unwritable_folder(tmp_path):
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o500)
    try:
        if os.access(ro, os.W_OK):
            pytest.skip("running with permissions that ignore folder modes")
        with pytest.raises(TripletkitError, match="is not writable"):
            with atomic_path(ro / "x.txt"):
                pass
    finally:
        ro.chmod(0o700)


def test_outputs_get_ordinary_permissions(tmp_path):
    mask = os.umask(0o022)
    try:
        with atomic_path(tmp_path / "f.txt") as tmp:
            tmp.write_text("x")
        with atomic_path(tmp_path / "d", directory=True):
            pass
    finally:
        os.umask(mask)
    assert (tmp_path / "f.txt").stat().st_mode & 0o777 == 0o644
    assert (tmp_path / "d").stat().st_mode & 0o777 == 0o755


# ---------------------------------------------------------------------------------------------
# publishing never replaces an output that appeared meanwhile (another run with the same output)
# ---------------------------------------------------------------------------------------------
def _appear(path, kind):
    if kind == "file":
        path.write_text("the other run's output")
    else:
        path.mkdir()
        if kind == "folder":
            (path / "report.json").write_text("{}")


@pytest.mark.parametrize("directory", [False, True], ids=["file-output", "folder-output"])
@pytest.mark.parametrize("kind", ["file", "empty-folder", "folder"])
def test_output_that_appears_meanwhile_is_refused(tmp_path, directory, kind):
    target = tmp_path / "out"
    with pytest.raises(TripletkitError, match=r"^output '.*out' already exists: it appeared while this run was "
                                              r"writing \(another run with the same output\?\); nothing was "
                                              r"written, pass force=True"):
        with atomic_path(target, directory=directory) as tmp:
            (tmp / "mine.txt" if directory else tmp).write_text("ours")
            _appear(target, kind)  # after the start-of-run check, before publishing
    assert os.listdir(tmp_path) == ["out"]  # the other output, and no temporary left
    if kind == "file":
        assert target.read_text() == "the other run's output"
    else:
        assert sorted(os.listdir(target)) == ([] if kind == "empty-folder" else ["report.json"])


@pytest.mark.parametrize("directory", [False, True], ids=["file-output", "folder-output"])
def test_force_replaces_an_output_that_appeared_meanwhile(tmp_path, directory):
    target = tmp_path / "out"
    with atomic_path(target, directory=directory, force=True) as tmp:
        (tmp / "mine.txt" if directory else tmp).write_text("ours")
        _appear(target, "folder" if directory else "file")
    assert (target / "mine.txt" if directory else target).read_text() == "ours"
    assert os.listdir(tmp_path) == ["out"]


@pytest.mark.parametrize("publish", _io._NO_REPLACE, ids=lambda f: f.__name__)
@pytest.mark.parametrize("kind", ["file", "empty-folder", "folder"])
@pytest.mark.parametrize("directory", [False, True], ids=["file-output", "folder-output"])
def test_each_way_of_publishing_refuses_an_existing_target(tmp_path, publish, kind, directory):
    tmp = tmp_path / ".out.tmp-x"
    if directory:
        tmp.mkdir()
        (tmp / "mine.txt").write_text("ours")
    else:
        tmp.write_text("ours")
    # publishing onto a free name works (or the way is not available here)
    try:
        publish(tmp, tmp_path / "free")
    except _io._Unsupported:
        assert publish is not _io._publish_by_claim  # the portable fallback is always available
        return
    assert (tmp_path / "free" / "mine.txt" if directory else tmp_path / "free").read_text() == "ours"
    assert not tmp.exists()
    # and refuses a name that is taken, leaving both in place
    (tmp_path / "free").rename(tmp)
    target = tmp_path / "taken"
    _appear(target, kind)
    with pytest.raises(FileExistsError, match=r"File exists"):
        publish(tmp, target)
    assert tmp.exists()
    assert (target.read_text() == "the other run's output") if kind == "file" else target.is_dir()
    if kind == "empty-folder":
        assert os.listdir(target) == []


def test_two_runs_racing_for_one_output_one_wins(tmp_path):
    # Both runs pass the start-of-run check, write, then publish at the same moment.
    target = tmp_path / "out.txt"
    barrier = threading.Barrier(2, timeout=60)
    outcomes = {}

    def run(name):
        try:
            with atomic_path(target) as tmp:
                tmp.write_text(name)
                barrier.wait()
            outcomes[name] = "published"
        except TripletkitError as exc:
            outcomes[name] = str(exc)

    threads = [threading.Thread(target=run, args=(name,)) for name in ("a", "b")]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert sorted(outcomes) == ["a", "b"]
    winners = [name for name, outcome in outcomes.items() if outcome == "published"]
    assert len(winners) == 1, outcomes
    loser = ({"a", "b"} - set(winners)).pop()
    assert "appeared while this run was writing" in outcomes[loser]
    assert target.read_text() == winners[0]
    assert os.listdir(tmp_path) == ["out.txt"]


def test_outputs_published_together_are_withdrawn_together(tmp_path):
    first, second = tmp_path / "t.parquet", tmp_path / "t.duplicates.parquet"
    with pytest.raises(TripletkitError, match=r"'.*t\.duplicates\.parquet' already exists: it appeared"):
        with atomic_paths([first, second]) as (tmp_first, tmp_second):
            tmp_first.write_text("triplets")
            tmp_second.write_text("duplicates")
            second.write_text("the other run's duplicates")
    # the first output was published, then withdrawn: no triplets without their duplicate report
    assert os.listdir(tmp_path) == ["t.duplicates.parquet"]
    assert second.read_text() == "the other run's duplicates"
