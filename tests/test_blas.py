"""tripletkit._blas: faiss's bundled OpenBLAS gets kernels the CPU supports."""

import json
import os
import platform
import subprocess
import sys

import pytest

from tripletkit._blas import _cpu_flags, coretype_for

_PROBE = (
    "import json, os, tripletkit, faiss, threadpoolctl\n"
    "libs = [i for i in threadpoolctl.threadpool_info() if i.get('internal_api') == 'openblas']\n"
    "faiss_blas = [i for i in libs if 'faiss' in i['filepath']]\n"
    "print(json.dumps({'env': os.environ.get('OPENBLAS_CORETYPE'),"
    " 'faiss': faiss_blas[0].get('architecture') if faiss_blas else None}))\n"
)


def _probe(env_value):
    env = {k: v for k, v in os.environ.items() if k != "OPENBLAS_CORETYPE"}
    if env_value is not None:
        env["OPENBLAS_CORETYPE"] = env_value
    out = subprocess.run([sys.executable, "-c", _PROBE], env=env, capture_output=True, text=True, check=True)
    return json.loads(out.stdout)


def test_core_type_from_cpu_flags():
    # flag names as Linux prints them in /proc/cpuinfo; Skylake-SP introduced AVX-512 F/CD/BW/DQ/VL,
    # Haswell AVX2 and FMA, Sandy Bridge AVX only (Intel 64 and IA-32 Architectures Software
    # Developer's Manual, vol. 1, ch. 14-15; the flag lists are from memory)
    skylake_x = {"sse4_2", "avx", "avx2", "fma", "avx512f", "avx512cd", "avx512bw", "avx512dq", "avx512vl"}
    assert coretype_for(skylake_x) == "SKYLAKEX"
    assert coretype_for({"sse4_2", "avx", "avx2", "fma"}) == "HASWELL"
    assert coretype_for({"sse4_2", "avx"}) is None
    # AVX-512 F alone (Knights Landing) is not enough for the Skylake-X kernels
    assert coretype_for({"avx", "avx2", "fma", "avx512f", "avx512cd"}) == "HASWELL"


@pytest.mark.skipif(not sys.platform.startswith("linux") or platform.machine() != "x86_64",
                    reason="the hint only acts on Linux x86-64")
def test_faiss_blas_is_not_left_on_generic_kernels():
    flags = set(_cpu_flags())
    if not {"avx2", "fma"} <= flags:
        pytest.skip("this CPU has no AVX2; OpenBLAS's own detection is kept")
    got = _probe(None)
    assert got["env"] == coretype_for(flags)
    # threadpoolctl reports the kernel family OpenBLAS chose; "Prescott" is its SSE3 fallback
    assert got["faiss"] is not None and got["faiss"].lower() != "prescott", got


def test_a_user_setting_is_kept():
    got = _probe("HASWELL")
    assert got["env"] == "HASWELL"
