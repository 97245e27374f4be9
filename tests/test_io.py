"""Atomic outputs: nothing half-written, no temporary left behind, no clobbering."""

import os

import pytest

from tripletkit import TripletkitError
from tripletkit._io import atomic_path


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
    with pytest.raises(TripletkitError, match="already exists; pass --force"):
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
