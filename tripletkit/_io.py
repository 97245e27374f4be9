"""Atomic, no-replace output, and the Parquet options and read errors shared by every reader and writer.

An interrupted run leaves no half-written output and no temporary file; an existing output is
never replaced unless ``force`` is set, including one that appears while the run is writing
(another run with the same output): publishing itself refuses to replace. Every Parquet file the
package writes carries page checksums (:data:`PARQUET_WRITE`) and every read verifies them
(:data:`PARQUET_READ`); a failed read becomes one line naming the file (and, for a damaged page,
the row group).
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import math
import os
import shutil
import sys
import tempfile
from pathlib import Path

from ._errors import TripletkitError

__all__ = ["atomic_path", "atomic_paths", "check_output", "check_not_input", "jsonable", "PARQUET_WRITE",
           "PARQUET_READ", "parquet_files", "read_parquet", "read_parquet_schema", "read_parquet_files",
           "parquet_error", "say"]


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
                                  "choose another out=...")
        if directory is False and path.is_dir():
            raise TripletkitError(f"output {str(path)!r} is an existing folder but a file is written here; "
                                  "give a file path (e.g. {}/out.parquet)".format(str(path)))
        if path.is_dir() and _inside(Path.cwd().resolve(), path.resolve()):
            # Replacing it would delete the folder we are working in (``--out .`` with --force).
            raise TripletkitError(f"output folder {str(path)!r} contains the current folder; refusing to replace "
                                  "it, choose a new folder for out=...")
        if not force:
            raise TripletkitError(f"output {str(path)!r} already exists; pass force=True to replace it")
    return path


def check_not_input(out, inputs, option="out"):
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
            raise TripletkitError(f"{option}={str(out)!r} {what} the input {str(item)!r}; writing there would "
                                  f"destroy the input, choose another {option}=...")


def _umask():
    mask = os.umask(0)
    os.umask(mask)
    return mask


# ---------------------------------------------------------------------------------------------
# no-replace publishing
# ---------------------------------------------------------------------------------------------
class _Unsupported(Exception):
    """This way of publishing is not available here (filesystem or platform); try the next."""


_AT_FDCWD = -100
_RENAME_NOREPLACE = 1


def _renameat2():
    """libc's ``renameat2`` (Linux, glibc >= 2.28), or None."""
    try:
        fn = ctypes.CDLL(None, use_errno=True).renameat2
    except (AttributeError, OSError):
        return None
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    fn.restype = ctypes.c_int
    return fn


def _publish_by_link(tmp, path):
    """Hard-link ``tmp`` as ``path`` (fails with EEXIST if ``path`` exists), then drop ``tmp``.

    Files only: a folder cannot be hard-linked.
    """
    if tmp.is_dir():
        raise _Unsupported
    try:
        os.link(tmp, path)
    except FileExistsError:
        raise
    except OSError as exc:
        if exc.errno in (errno.EPERM, errno.EOPNOTSUPP, errno.ENOTSUP, errno.EXDEV, errno.EMLINK, errno.ENOSYS):
            raise _Unsupported from None  # a filesystem without hard links (FAT, some network mounts)
        raise
    tmp.unlink()


def _publish_by_rename_noreplace(tmp, path):
    """``renameat2(..., RENAME_NOREPLACE)``: one atomic rename that fails with EEXIST if ``path`` exists."""
    fn = _renameat2()
    if fn is None:
        raise _Unsupported
    if fn(_AT_FDCWD, os.fsencode(tmp), _AT_FDCWD, os.fsencode(path), _RENAME_NOREPLACE) == 0:
        return
    err = ctypes.get_errno()
    if err in (errno.EINVAL, errno.ENOSYS, errno.EOPNOTSUPP, errno.ENOTSUP):
        raise _Unsupported  # an old kernel, or a filesystem without the flag
    raise OSError(err, os.strerror(err), str(path))


def _publish_by_claim(tmp, path):
    """Claim the name with an exclusive create (``O_EXCL`` or ``mkdir``), then rename onto the claim.

    The portable fallback: the claim fails if ``path`` exists, and the rename replaces only our own
    empty claim (a folder that is no longer empty makes it fail). Readers may briefly see an empty
    file or folder at ``path``.
    """
    if tmp.is_dir():
        os.mkdir(path)
    else:
        os.close(os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o600))
    try:
        os.replace(tmp, path)
    except OSError as exc:
        with contextlib.suppress(OSError):
            (os.rmdir if tmp.is_dir() else os.unlink)(path)
        if exc.errno in (errno.ENOTEMPTY, errno.EEXIST):
            raise FileExistsError(errno.EEXIST, os.strerror(errno.EEXIST), str(path)) from None
        raise


#: Ways to publish without replacing, tried in order until one is available.
_NO_REPLACE = (_publish_by_link, _publish_by_rename_noreplace, _publish_by_claim)


def _publish_no_replace(tmp, path):
    for publish in _NO_REPLACE:
        try:
            return publish(tmp, path)
        except _Unsupported:
            continue
    raise AssertionError("_publish_by_claim is always available")


def _publish_replacing(tmp, path, parent):
    """Publish ``tmp`` as ``path``, replacing what is there (``force``)."""
    if path.is_dir() and not path.is_symlink():
        # Move the old folder aside first so the swap is as short as possible.
        old = Path(tempfile.mkdtemp(prefix=f".{path.name}.old-", dir=parent))
        old.rmdir()
        path.rename(old)
        os.replace(tmp, path)
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(tmp, path)


def _remove(path):
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path, ignore_errors=True)
    else:
        with contextlib.suppress(FileNotFoundError):
            path.unlink()


def _appeared(path):
    return TripletkitError(f"output {str(path)!r} already exists: it appeared while this run was writing (another "
                           "run with the same output?); nothing was written, pass force=True to replace it")


@contextlib.contextmanager
def atomic_paths(paths, force=False, directory=False):
    """Yield temporary paths beside ``paths``; on success publish them all, or none.

    Parameters
    ----------
    paths : sequence of str or Path
        Final output locations, published in this order.
    force : bool, default False
        Replace existing outputs.
    directory : bool or sequence of bool, default False
        Per path (or for all): yield a fresh empty temporary folder instead of a file name.

    Without ``force`` every output is published without replacing: a hard link (files), else an
    atomic ``renameat2`` with ``RENAME_NOREPLACE`` (Linux), else an exclusive claim of the name.
    If an output appeared since the start (another run writing the same output), the run stops
    with a :class:`TripletkitError`, its temporary outputs are removed and the outputs it already
    published in this call are withdrawn, so two runs racing for one output never both succeed
    and never mix their files. On any exception (including KeyboardInterrupt) the temporary
    outputs are removed and previous outputs, if any, are left untouched.
    """
    paths = [Path(p) for p in paths]
    kinds = [bool(directory)] * len(paths) if isinstance(directory, bool) else [bool(d) for d in directory]
    if len(kinds) != len(paths):
        raise ValueError("directory must be a bool or one bool per path")
    paths = [check_output(p, force=force, directory=d) for p, d in zip(paths, kinds)]
    tmps = []
    try:
        for path, is_dir in zip(paths, kinds):
            parent = path.parent if str(path.parent) else Path(".")
            prefix = f".{path.name}.tmp-"
            if is_dir:
                tmp = Path(tempfile.mkdtemp(prefix=prefix, dir=parent))
                tmps.append(tmp)
                tmp.chmod(0o777 & ~_umask())
            else:
                fd, name = tempfile.mkstemp(prefix=prefix, dir=parent)
                os.close(fd)
                tmp = Path(name)
                tmps.append(tmp)
                # mkstemp creates 0600; give the output the permissions an ordinary open() would.
                tmp.chmod(0o666 & ~_umask())
        yield list(tmps)
        published = []  # (path, identity of what we published there)
        try:
            for path, tmp in zip(paths, tmps):
                st = tmp.lstat()
                if force:
                    _publish_replacing(tmp, path, path.parent if str(path.parent) else Path("."))
                else:
                    try:
                        _publish_no_replace(tmp, path)
                    except FileExistsError:
                        raise _appeared(path) from None
                published.append((path, (st.st_dev, st.st_ino)))
        except BaseException:
            for path, ident in published:
                with contextlib.suppress(OSError):
                    st = path.lstat()
                    if (st.st_dev, st.st_ino) == ident:  # still ours: withdraw it
                        _remove(path)
            raise
    finally:
        for tmp in tmps:  # after success only a hard link's source is gone; a failure leaves them all
            if tmp.exists() or tmp.is_symlink():
                _remove(tmp)


@contextlib.contextmanager
def atomic_path(path, force=False, directory=False):
    """Yield a temporary path beside ``path``; on success publish it as ``path``.

    Parameters
    ----------
    path : str or Path
        Final output location (a file, or a folder when ``directory`` is true).
    force : bool, default False
        Replace an existing output.
    directory : bool, default False
        Yield a fresh empty temporary folder instead of a file name.

    The output is published without replacing anything unless ``force`` is set, so an output that
    appeared while this run was writing (another run with the same output) is refused with a
    :class:`TripletkitError` (see :func:`atomic_paths`). On any exception (including
    KeyboardInterrupt) the temporary output is removed and the previous output, if any, is left
    untouched.
    """
    with atomic_paths([path], force=force, directory=directory) as (tmp,):
        yield tmp


# ---------------------------------------------------------------------------------------------
# Parquet: the options of every file the package writes and reads, and the messages of a failed read
# ---------------------------------------------------------------------------------------------
#: Options of every Parquet file the package writes: zstd, and a CRC-32 checksum on every page so
#: that a page damaged after writing is found when the file is read.
PARQUET_WRITE = {"compression": "zstd", "write_page_checksum": True}
#: Options of every Parquet read (``pyarrow.parquet.read_table``, ``ParquetFile``, the dataset
#: scan options): verify the page checksums a file carries (pages written without one are read as
#: they are).
PARQUET_READ = {"page_checksum_verification": True}

#: Names that pyarrow's dataset discovery skips inside a folder (hidden files, ``_SUCCESS``,
#: ``_temporary/`` of other writers): any path component below the folder starting with these.
IGNORED_PREFIXES = (".", "_")


def parquet_files(folder):
    """The ``.parquet`` files below ``folder``, sorted, skipping what pyarrow's discovery skips.

    A file is skipped when its name or a folder between it and ``folder`` starts with ``.`` or
    ``_`` (:data:`IGNORED_PREFIXES`), as ``pyarrow.dataset.dataset(folder)`` does.
    """
    root = Path(folder)
    out = []
    for f in root.rglob("*.parquet"):
        if any(part.startswith(IGNORED_PREFIXES) for part in f.relative_to(root).parts):
            continue
        if f.is_file():
            out.append(str(f))
    return sorted(out)


def read_parquet(path, what, columns=None, suffix=""):
    """Read one Parquet file with checksum verification; a failure is one :class:`TripletkitError`.

    Parameters
    ----------
    path : str or Path
    what : str
        What the file is, for messages (``"embedding table"``, ``"triplet table"``).
    columns : list of str, optional
    suffix : str, optional
        Said after the file's name in messages (``" of folder 'dump'"``).
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        # ParquetFile, not read_table: read_table goes through pyarrow.dataset, whose import also
        # imports pandas when it is installed (a third of a second at every start)
        with pq.ParquetFile(str(path), **PARQUET_READ) as handle:
            return handle.read(columns=columns)
    except (pa.ArrowException, OSError) as exc:
        raise parquet_error(exc, [path], what, suffix) from None


def read_parquet_schema(path, what, suffix=""):
    """The Arrow schema of a Parquet file (its footer only); a failure is one :class:`TripletkitError`."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        return pq.read_schema(str(path))
    except (pa.ArrowException, OSError) as exc:
        raise parquet_error(exc, [path], what, suffix) from None


def read_parquet_files(files, what, suffix="", base_dir=None):
    """Read Parquet files of one schema as one table (a ``pyarrow.dataset``), verifying checksums.

    With ``base_dir`` (the folder the files were found in), Hive partition keys in the paths below
    it (``label=7/part-0.parquet``) come back as columns, as ``pyarrow.dataset`` reads them.
    """
    import pyarrow as pa
    import pyarrow.dataset as ds

    fmt = ds.ParquetFileFormat(default_fragment_scan_options=ds.ParquetFragmentScanOptions(**PARQUET_READ))
    hive = {} if base_dir is None else {"partitioning": "hive", "partition_base_dir": str(base_dir)}
    try:
        return ds.dataset(list(files), format=fmt, **hive).to_table()
    except (pa.ArrowException, OSError) as exc:
        raise parquet_error(exc, files, what, suffix) from None


def _first_line(exc):
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def parquet_error(exc, files, what, suffix=""):
    """The one-line :class:`TripletkitError` for a failed read of ``files`` (one or more Parquet files).

    Messages name the file as ``{what} '{file}'{suffix}``. A page checksum failure names the file
    and the row group; a file that is not Parquet at all says what it looks like (CSV, other
    text); anything else quotes pyarrow's first line.
    """
    files = [str(f) for f in files]
    name = files[0] if len(files) == 1 else None
    if "checksum" in str(exc).lower() or "page integrity" in str(exc).lower():
        found = _damaged_row_group(files)
        if found is not None:
            name, group = found
            return TripletkitError(
                f"{what} {name!r}{suffix} is damaged: row group {group} fails its page checksum (the data changed "
                "after it was written); restore the file from a copy or write it again"
            )
    if name is not None:
        looks = _looks_like(name)
        if looks is not None:
            return TripletkitError(f"{what} {name!r}{suffix} is not a Parquet file; it looks like {looks}: convert it "
                                   "to Parquet")
        return TripletkitError(f"cannot read {what} {name!r}{suffix} as Parquet ({_first_line(exc)}); is the file "
                               "complete?")
    return TripletkitError(f"cannot read the {len(files)} {what}s{suffix} as Parquet ({_first_line(exc)}); is every "
                           "file complete?")


def _damaged_row_group(files):
    """(file, row group) of the first page that fails its checksum, or None."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    for name in files:
        try:
            pf = pq.ParquetFile(name, **PARQUET_READ)
        except (pa.ArrowException, OSError):
            continue
        for group in range(pf.metadata.num_row_groups):
            try:
                pf.read_row_group(group)
            except (pa.ArrowException, OSError) as exc:
                if "checksum" in str(exc).lower() or "page integrity" in str(exc).lower():
                    return name, group
    return None


def _looks_like(path):
    """"CSV" or "text" for a file that starts like one instead of with Parquet's magic bytes, else None."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(4096)
    except OSError:
        return None
    if not head or head.startswith(b"PAR1") or b"\0" in head:
        return None
    try:
        text = head.decode("utf-8")
    except UnicodeDecodeError as exc:
        if exc.start < len(head) - 4:  # not just a character cut at the end of the sample
            return None
        text = head[:exc.start].decode("utf-8")
    lines = [line for line in text.splitlines() if line.strip()]
    if not lines:
        return None
    if any(sep in lines[0] for sep in (",", ";", "\t")):
        return "CSV"
    return "text"


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


def say(verb, text, quiet=False):
    """Print one progress line ``[verb] text`` on stderr, unless ``quiet``."""
    if not quiet:
        print(f"[{verb}] {text}", file=sys.stderr, flush=True)
