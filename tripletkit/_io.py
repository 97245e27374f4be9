"""Atomic output: write to a temporary sibling, then rename into place.

An interrupted run leaves no half-written output and no temporary file; an existing output is
never replaced unless ``force`` is set. Used by every writer in the package.
"""

from __future__ import annotations

import contextlib
import math
import os
import shutil
import tempfile
from pathlib import Path

from ._errors import TripletkitError

__all__ = ["atomic_path", "check_output", "check_not_input", "jsonable"]


def _inside(inner, outer):
    """Whether resolved path ``inner`` is ``outer`` or lies below it."""
    return inner == outer or outer in inner.parents


def check_output(path, force=False, directory=None):
    """Check that ``path`` can be written: parent folder exists and is writable, no clobbering.

    Parameters
    ----------
    path : str or Path
    force : bool, default False
        Allow replacing an existing output of the same kind.
    directory : bool or None, default None
        True when the output is a folder, False when it is a file; an existing output of the
        other kind is refused even with ``force`` (replacing a folder by a file would delete a
        whole folder that was probably not ours). None skips this check.
    """
    path = Path(path)
    parent = path.parent if str(path.parent) else Path(".")
    if not parent.exists():
        raise TripletkitError(f"output folder {str(parent)!r} does not exist; create it first")
    if not parent.is_dir():
        raise TripletkitError(f"output parent {str(parent)!r} is not a folder; choose an output inside a folder")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise TripletkitError(f"output folder {str(parent)!r} is not writable")
    if path.exists() or path.is_symlink():
        if directory is True and not path.is_dir():
            raise TripletkitError(f"output {str(path)!r} is an existing file but a folder is written here; "
                                  "choose another --out")
        if directory is False and path.is_dir():
            raise TripletkitError(f"output {str(path)!r} is an existing folder but a file is written here; "
                                  "give a file path (e.g. {}/out.parquet)".format(str(path)))
        if path.is_dir() and _inside(Path.cwd().resolve(), path.resolve()):
            # Replacing it would delete the folder we are working in (``--out .`` with --force).
            raise TripletkitError(f"output folder {str(path)!r} contains the current folder; refusing to replace "
                                  "it, choose a new folder for --out")
        if not force:
            raise TripletkitError(f"output {str(path)!r} already exists; pass --force (force=True) to replace it")
    return path


def check_not_input(out, inputs, option="--out"):
    """Refuse an output that is one of ``inputs`` or a folder holding one of them.

    Replacing such an output (with ``force``) would destroy the input it is computed from, and
    inputs are never modified.

    Parameters
    ----------
    out : str or Path
        The output path.
    inputs : iterable of str or Path or None
        Input files or folders (None entries are ignored).
    option : str
        Name of the output option, for the message.
    """
    target = Path(out).resolve()
    for item in inputs:
        if item is None:
            continue
        src = Path(item).resolve()
        if _inside(src, target):
            what = "is" if src == target else "contains"
            raise TripletkitError(f"{option} {str(out)!r} {what} the input {str(item)!r}; writing there would "
                                  f"destroy the input, choose another {option}")


def _umask():
    mask = os.umask(0)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def atomic_path(path, force=False, directory=False):
    """Yield a temporary path beside ``path``; on success rename it to ``path``.

    Parameters
    ----------
    path : str or Path
        Final output location (a file, or a folder when ``directory`` is true).
    force : bool, default False
        Replace an existing output.
    directory : bool, default False
        Yield a fresh empty temporary folder instead of a file name.

    On any exception (including KeyboardInterrupt) the temporary output is removed and the
    previous output, if any, is left untouched.
    """
    path = check_output(path, force=force, directory=bool(directory))
    parent = path.parent if str(path.parent) else Path(".")
    prefix = f".{path.name}.tmp-"
    if directory:
        tmp = Path(tempfile.mkdtemp(prefix=prefix, dir=parent))
        tmp.chmod(0o777 & ~_umask())
    else:
        fd, name = tempfile.mkstemp(prefix=prefix, dir=parent)
        os.close(fd)
        tmp = Path(name)
        # mkstemp creates 0600; give the output the permissions an ordinary open() would.
        tmp.chmod(0o666 & ~_umask())
    try:
        yield tmp
        if path.exists():
            if path.is_dir() and not path.is_symlink():
                # Move the old folder aside first so the swap is as short as possible.
                old = Path(tempfile.mkdtemp(prefix=f".{path.name}.old-", dir=parent))
                old.rmdir()
                path.rename(old)
                os.replace(tmp, path)
                shutil.rmtree(old, ignore_errors=True)
            else:
                os.replace(tmp, path)
        else:
            os.replace(tmp, path)
    except BaseException:
        if tmp.is_dir():
            shutil.rmtree(tmp, ignore_errors=True)
        else:
            with contextlib.suppress(FileNotFoundError):
                tmp.unlink()
        raise


def jsonable(obj):
    """Convert summaries (``to_dict()``), numpy scalars and non-finite floats to JSON-ready values."""
    if hasattr(obj, "to_dict"):
        obj = obj.to_dict()
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, Path):
        return str(obj)
    if hasattr(obj, "item") and getattr(obj, "ndim", 1) == 0:
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj
