"""Memory guard: estimate what a run will hold and refuse it up front, with a suggestion.

A run that needs more memory than the machine has is otherwise killed by the operating system
halfway through (no message, or a ``MemoryError`` traceback). :func:`estimate_and_guard` compares
an estimate with the memory still available and raises :class:`~tripletkit._errors.TripletkitError`
with one line that says what to change (a smaller block, the approximate index, a subset).

Each job estimates its own bytes next to its plan (``mining.plan.mining_bytes``,
``evaluate.scoring_bytes``): they count the large arrays the code allocates (matrices, indexes,
search blocks, score buffers) and leave out what is small or hard to predict (Python objects, BLAS
work buffers, allocator slack), so the guard only lets a run plan to use :data:`USABLE_SHARE` of
what is available.

Available memory is, in this order: the ``TRIPLETKIT_MEMORY_LIMIT_MB`` environment variable
(a cap set by the user, or a fake value in tests); otherwise the smaller of ``MemAvailable`` in
``/proc/meminfo`` and the room left under a cgroup memory limit (containers, batch schedulers:
their limit is invisible in ``/proc/meminfo``); otherwise ``os.sysconf`` (free physical pages).
When none can be read the guard lets the run go ahead.
"""

from __future__ import annotations

import os
from pathlib import Path

from ._errors import TripletkitError

__all__ = ["ENV_LIMIT", "USABLE_SHARE", "available_bytes", "estimate_and_guard", "format_bytes"]

#: Environment variable that sets the available memory in MB (overrides detection).
ENV_LIMIT = "TRIPLETKIT_MEMORY_LIMIT_MB"
#: Share of the available memory an estimated run may use; the rest is headroom for what the
#: estimates leave out (common practice, no source).
USABLE_SHARE = 0.8

_MB = 2**20


# ---------------------------------------------------------------------------------------------
# how much memory there is
# ---------------------------------------------------------------------------------------------
def _env_limit():
    text = os.environ.get(ENV_LIMIT)
    if text is None or not text.strip():
        return None
    try:
        mb = float(text)
    except ValueError:
        mb = float("nan")
    if not mb > 0 or mb == float("inf"):
        raise TripletkitError(f"environment variable {ENV_LIMIT} must be a positive number of MB, got {text!r}; "
                              "unset it to use the detected memory")
    return int(mb * _MB)


def _meminfo(path="/proc/meminfo"):
    """``MemAvailable`` of ``/proc/meminfo`` in bytes, or None."""
    try:
        with open(path, encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    parts = line.split()
                    return int(parts[1]) * (1024 if len(parts) < 3 or parts[2].lower() == "kb" else 1)
    except (OSError, ValueError, IndexError):
        return None
    return None


def _read_int(path):
    try:
        text = Path(path).read_text(encoding="ascii").strip()
    except (OSError, UnicodeDecodeError):
        return None
    if text == "max":
        return None
    try:
        return int(text)
    except ValueError:
        return None


def _stat_value(path, key):
    try:
        for line in Path(path).read_text(encoding="ascii").splitlines():
            name, _, value = line.partition(" ")
            if name == key:
                return int(value)
    except (OSError, UnicodeDecodeError, ValueError):
        return None
    return None


def _cgroup_room(root="/sys/fs/cgroup"):
    """Bytes left under this process's cgroup memory limit, or None when there is no limit.

    Page cache counts as used in the cgroup but is given back under pressure, so the inactive
    file pages are added back to the room.
    """
    root = Path(root)
    # cgroup v2 (unified hierarchy)
    limit = _read_int(root / "memory.max")
    if limit is not None:
        used = _read_int(root / "memory.current") or 0
        cache = _stat_value(root / "memory.stat", "inactive_file") or 0
        return max(0, limit - used + cache)
    # cgroup v1: no limit shows as a huge number
    limit = _read_int(root / "memory" / "memory.limit_in_bytes")
    if limit is not None and limit < 2**60:
        used = _read_int(root / "memory" / "memory.usage_in_bytes") or 0
        cache = _stat_value(root / "memory" / "memory.stat", "total_inactive_file") or 0
        return max(0, limit - used + cache)
    return None


def _sysconf():
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (AttributeError, ValueError, OSError):
        return None


def available_bytes():
    """Memory this process may still allocate, in bytes, or None when it cannot be told.

    Returns
    -------
    int or None
        ``TRIPLETKIT_MEMORY_LIMIT_MB`` (in bytes) when set; else the smaller of ``MemAvailable``
        and the room under a cgroup limit; else free physical pages from ``os.sysconf``.
    """
    limit = _env_limit()
    if limit is not None:
        return limit
    found = [v for v in (_meminfo(), _cgroup_room()) if v is not None]
    if found:
        return min(found)
    return _sysconf()


def format_bytes(n):
    """``n`` bytes as a short text with binary units (``"1.5 GiB"``)."""
    n = float(n)
    for unit in ("bytes", "KiB", "MiB", "GiB", "TiB"):
        if n < 1024 or unit == "TiB":
            return f"{n:.0f} {unit}" if unit == "bytes" else f"{n:.1f} {unit}"
        n /= 1024
    raise AssertionError("unreachable")


# ---------------------------------------------------------------------------------------------
# the guard
# ---------------------------------------------------------------------------------------------
def estimate_and_guard(what, bytes_needed, *, suggestion, available=None):
    """Refuse a run whose estimated memory exceeds what is available.

    Parameters
    ----------
    what : str
        The run, for the message (e.g. ``"mining 1,000,000 x 128 rows"``).
    bytes_needed : int
        Estimate of the job (e.g. :func:`tripletkit.mining.plan.mining_bytes`).
    suggestion : str
        What the user can change, e.g. ``"lower block_rows=... or use index='ivf'"``.
    available : int, optional
        Available bytes; by default :func:`available_bytes` (tests pass a fake value here or set
        ``TRIPLETKIT_MEMORY_LIMIT_MB``).

    Returns
    -------
    int or None
        The available bytes the decision was made on (None: unknown, the run goes ahead).

    Raises
    ------
    TripletkitError
        When ``bytes_needed`` is more than :data:`USABLE_SHARE` of the available memory.

    Examples
    --------
    >>> estimate_and_guard("scoring", 10 * 2**20, suggestion="use fewer rows", available=2**30)
    1073741824
    """
    needed = int(bytes_needed)
    if needed < 0:
        raise ValueError(f"bytes_needed must be >= 0, got {bytes_needed!r}")
    avail = available_bytes() if available is None else int(available)
    if avail is None:
        return None
    if needed > USABLE_SHARE * avail:
        raise TripletkitError(
            f"{what} needs about {format_bytes(needed)} of memory but only {format_bytes(avail)} is available "
            f"(a run may plan on {USABLE_SHARE:.0%} of it); {suggestion}"
        )
    return avail
