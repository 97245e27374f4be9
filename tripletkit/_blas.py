"""Keep faiss's bundled OpenBLAS off its slowest kernels on CPUs it does not know.

The faiss-cpu wheels bundle their own OpenBLAS (0.3.15 in faiss-cpu 1.15), which faiss uses for
the matrix products of every flat (exact) search. That OpenBLAS predates recent Intel server
CPUs (e.g. model 207, Emerald Rapids) and falls back there to its generic "Prescott" (SSE3)
kernels: on the project machine a flat inner-product self-search of 30,000 x 128 took 6.1 s
with them and 1.9 s with the Skylake-X kernels the CPU supports (measured 2026-12-02,
``threadpoolctl.threadpool_info()`` reports the chosen kernels as ``architecture``).

OpenBLAS reads the environment variable ``OPENBLAS_CORETYPE`` when it is loaded, so before
faiss is first imported we set it, unless the user has, to the newest kernel family whose
instructions this CPU has: ``SKYLAKEX`` with AVX-512 (F, BW, DQ, VL), ``HASWELL`` with AVX2 and
FMA; nothing otherwise (then OpenBLAS detects as usual). numpy is imported first, so its own
OpenBLAS (which knows these CPUs) has already chosen its kernels and is unaffected. Only Linux
on x86-64 is touched: that is where the flags are read (``/proc/cpuinfo``).

``import tripletkit`` stays light (no numpy): :func:`hint_before_faiss` only registers an import
hook that sets the variable the moment faiss is first imported, by any module, and then removes
itself.
"""

from __future__ import annotations

import os
import sys

__all__ = ["coretype_for", "hint_openblas_coretype", "hint_before_faiss"]

_AVX512 = {"avx512f", "avx512bw", "avx512dq", "avx512vl"}


def coretype_for(flags):
    """The OpenBLAS core type for a set of ``/proc/cpuinfo`` flags, or None to let it detect."""
    flags = set(flags)
    if _AVX512 <= flags:
        return "SKYLAKEX"
    if {"avx2", "fma"} <= flags:
        return "HASWELL"
    return None


def _cpu_flags():
    try:
        with open("/proc/cpuinfo", encoding="ascii", errors="replace") as fh:
            for line in fh:
                if line.startswith("flags"):
                    return line.split(":", 1)[1].split()
    except OSError:
        pass
    return []


def hint_openblas_coretype():
    """Set ``OPENBLAS_CORETYPE`` for faiss's OpenBLAS if faiss is not loaded and the user has not set it.

    Returns
    -------
    str or None
        The value set, or None when nothing was changed.
    """
    if "OPENBLAS_CORETYPE" in os.environ or "faiss" in sys.modules:
        return None
    import numpy  # noqa: F401  (loaded before the variable is set; see above)

    if not sys.platform.startswith("linux") or os.uname().machine.lower() not in ("x86_64", "amd64"):
        return None
    core = coretype_for(_cpu_flags())
    if core is not None:
        os.environ["OPENBLAS_CORETYPE"] = core
    return core


class _BeforeFaiss:
    """An import hook (a meta path finder) that runs :func:`hint_openblas_coretype` when faiss is first
    imported. It needs only ``find_spec``; not subclassing importlib.abc saves 20 ms of start-up."""

    def find_spec(self, name, path=None, target=None):
        if name == "faiss":
            _remove_hook()
            hint_openblas_coretype()
        return None  # the ordinary finders load the module


def _remove_hook():
    sys.meta_path[:] = [f for f in sys.meta_path if not isinstance(f, _BeforeFaiss)]


def hint_before_faiss():
    """Arrange for :func:`hint_openblas_coretype` to run just before faiss is first imported."""
    if "faiss" in sys.modules:
        return
    if not any(isinstance(f, _BeforeFaiss) for f in sys.meta_path):
        sys.meta_path.insert(0, _BeforeFaiss())
