"""Memory guard: estimate what a run will hold and refuse it up front, with a suggestion.

A run that needs more memory than the machine has is otherwise killed by the operating system
halfway through (no message, or a ``MemoryError`` traceback). :func:`estimate_and_guard` compares
an estimate with the memory still available and raises :class:`~tripletkit._errors.TripletkitError`
with one line that says what to change (a smaller block, the approximate index, a subset).

The estimators count the large arrays the code allocates (matrices, indexes, search blocks,
score buffers); they leave out what is small or hard to predict (Python objects, BLAS work
buffers, allocator slack), so the guard only lets a run plan to use :data:`USABLE_SHARE` of
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

__all__ = ["ENV_LIMIT", "USABLE_SHARE", "available_bytes", "estimate_and_guard", "format_bytes",
           "scoring_bytes"]

#: Environment variable that sets the available memory in MB (overrides detection).
ENV_LIMIT = "TRIPLETKIT_MEMORY_LIMIT_MB"
#: Share of the available memory an estimated run may use; the rest is headroom for what the
#: estimates leave out (common practice, no source).
USABLE_SHARE = 0.8

_MB = 2**20
# Verification: histogram counts over 2**19 + 2**11 bins; about seven int64 arrays of them are
# alive at once (measured with tracemalloc on small tables, where they dominate).
_HISTOGRAM_BYTES = 7 * 8 * (2**19 + 2**11)
# Each verification worker thread also has its own int64 histogram with an int32 scratch one
# (its block buffers: tripletkit.metrics.verification._BYTES_PER_BLOCK_SCORE per score).
_WORKER_HISTOGRAM_BYTES = 12 * (2**19 + 2**11)
# Verification keeps the highest impostor scores in at most this share of its memory budget
# (tripletkit.metrics.verification._KEEP_SHARE).
_KEEP_SHARE = 0.5
# One genuine pair score kept for the exact second pass: float64 score, int64 identity, group code.
_BYTES_PER_GENUINE = 24
# Rows (or columns) of integer coordinates per block of the effective dimension (2**(52 - 2*20)).
_HEALTH_BLOCK = 4096


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
        What the user can change, e.g. ``"lower --block-rows or use --index ivf"``.
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


# ---------------------------------------------------------------------------------------------
# estimators (the large arrays of each job; keep them in step with the code they describe)
# ---------------------------------------------------------------------------------------------
def _check_sizes(**values):
    for name, value in values.items():
        if isinstance(value, bool) or not isinstance(value, int) or value < 0:
            raise ValueError(f"{name} must be a whole number >= 0, got {value!r}")


def scoring_bytes(n, d, block_rows, *, memory_mb=512, genuine_pairs=0, identities=0, workers=None):
    """Estimated peak bytes of :func:`tripletkit.evaluate.score` on all pairs of an ``n x d`` table.

    Parameters
    ----------
    n, d : int
        Rows and dimension of the held-out table.
    block_rows : int
        Rows per scoring block (0: sized from ``memory_mb`` as the verification does).
    memory_mb : int
        The evaluation's memory budget (``memory_mb``).
    genuine_pairs : int
        Genuine pairs of the table (sum over identities of s (s - 1) / 2); their scores are kept
        for the exact operating points.
    identities : int
        Identities (the k of the clustering's k-means).
    workers : int, optional
        Verification worker threads (default: as the verification chooses them, one per CPU
        within the budget; see :func:`tripletkit.metrics.verification.default_workers`).

    Returns
    -------
    int
        The table and the verification's sorted copy on the exact-cosine grid (float64), the
        block buffers (13 bytes per score of a block and worker), the score histograms, the kept genuine
        scores and highest impostor scores, the retrieval index and its result block, the
        k-means copy and centroids, and the effective dimension's int64 and float64 (m, m) matrices,
        m = min(n, d), with a block of integer rows (health).
    """
    _check_sizes(n=n, d=d, block_rows=block_rows, memory_mb=memory_mb, genuine_pairs=genuine_pairs,
                 identities=identities)
    budget = memory_mb * _MB
    from .metrics.allpairs import BYTES_PER_BLOCK_SCORE as _BYTES_PER_BLOCK_SCORE, block_size, workers_for

    nn = max(n, 1)
    b = block_size(nn, block_rows or None, budget)  # the verification's own rules
    workers = workers_for(nn, b, budget) if workers is None else max(1, min(int(workers), -(-nn // b)))
    vectors = n * d * 4
    # the sorted copy snapped to the exact-cosine grid is float64: twice the table
    verification = (2 * vectors + workers * (_BYTES_PER_BLOCK_SCORE * b * n + _WORKER_HISTOGRAM_BYTES)
                    + _HISTOGRAM_BYTES + genuine_pairs * _BYTES_PER_GENUINE + int(_KEEP_SHARE * budget))
    # retrieval and k-means work on a float64 copy on the exact-cosine grid (twice the table)
    retrieval = 2 * vectors + budget
    clustering = 2 * vectors + identities * d * 12 + n * 16
    m = min(n, d)
    # the exact int64 matrix and its float64 centred copy, and one block of integer rows
    health = 16 * m * m + 8 * m * min(_HEALTH_BLOCK, max(n, d))
    # the stages run one after another: the table stays, the largest stage sets the peak
    return int(vectors + max(verification, retrieval, clustering, health))
