"""The memory guard: available memory (faked), the one-line refusal, and the estimators.

The scoring estimator is checked twice: against hand-computed sums of its documented terms, and
against the allocations that ``tracemalloc`` traces during real runs of ``score`` (numpy's arrays).
The mining estimate is tested with the mining plan (tests/mining/test_plan.py).
"""

import pytest
from _support import grouped_rows, traced_peak

from tripletkit import _memory
from tripletkit._errors import TripletkitError
from tripletkit._memory import ENV_LIMIT, USABLE_SHARE, available_bytes, estimate_and_guard, format_bytes, scoring_bytes

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


# -- estimators: hand-computed sums of the documented terms -----------------------------------
def test_scoring_bytes_hand_computed():
    # n=1000, d=8, 100 rows per block, memory_mb=16, no genuine pairs, 10 identities, 2 workers.
    # verification: float64 copy on the exact-cosine grid 64,000 + per worker (blocks
    # 13*100*1000 = 1,300,000 + histogram 12*526,336) + histograms 7*8*526,336 + kept impostors
    # 0.5 * 16 MiB = 8,388,608 -> the largest stage; plus the table 32,000
    bins = 2**19 + 2**11
    assert scoring_bytes(1000, 8, 100, memory_mb=16, identities=10, workers=2) == 32_000 + 64_000 \
        + 2 * (1_300_000 + 12 * bins) + 7 * 8 * bins + 8_388_608
    # genuine scores add 24 bytes each
    assert scoring_bytes(1000, 8, 100, memory_mb=16, genuine_pairs=1000) - \
        scoring_bytes(1000, 8, 100, memory_mb=16) == 24_000
    # one worker fewer: one block buffer and one histogram less
    assert scoring_bytes(1000, 8, 100, memory_mb=16, workers=2) - scoring_bytes(1000, 8, 100, memory_mb=16, workers=1) \
        == 1_300_000 + 12 * bins


def test_scoring_bytes_health_term_grows_with_min_n_d_squared():
    # the effective dimension builds the smaller of the (d, d) scatter and the (n, n) Gram
    # matrix: 12 rows of 100,000 dimensions need a 12 x 12 matrix, not 80 GB (d^2 * 8 bytes)
    wide = scoring_bytes(12, 100_000, 0)
    assert wide < 2**30
    # hand-computed where health is the largest stage: n = d = 2,000, one row per block,
    # memory_mb = 1, 2 workers -> table 2,000 * 2,000 * 4 = 16,000,000; health 16 * 2,000^2 (the
    # int64 and float64 matrices) + 8 * 2,000 * 2,000 (a block of integer rows) = 96,000,000,
    # above verification (float64 copy 32,000,000 + 2 * (13 * 2,000 + 6,316,032) + histograms
    # 29,474,816 + 524,288 kept = 74,683,168) and retrieval
    assert scoring_bytes(2000, 2000, 1, memory_mb=1, workers=2) == 16_000_000 + 96_000_000
    with pytest.raises(TripletkitError, match="or use a lower-dimensional projection"):
        estimate_and_guard("scoring 12 x 100,000", wide, suggestion="or use a lower-dimensional projection",
                           available=wide // 2)


def test_scoring_bytes_rejects_bad_sizes():
    with pytest.raises(ValueError):
        scoring_bytes(-1, 4, 0)
    with pytest.raises(ValueError):
        scoring_bytes(2.5, 4, 0)


# -- estimators against what real runs allocate -----------------------------------------------
# Tolerance: the estimate is a planning figure, not an accounting; within a factor of 2.5 of
# the traced numpy allocations either way (our choice; measured ratios were 0.7 to 2.0).
@pytest.mark.parametrize("n, d", [(4000, 64), (2000, 256)])
def test_scoring_estimate_tracks_traced_allocations(rng, n, d):
    from tripletkit.config import EvaluationConfig
    from tripletkit.evaluate import score
    from tripletkit.tables.embeddings import EmbeddingTable

    ids, labels, X = grouped_rows(rng, n, d)
    table = EmbeddingTable.from_arrays(ids, labels, X)
    cfg = EvaluationConfig(memory_mb=16, bootstrap=0, clustering=False, plots=False)
    scored = traced_peak(lambda: score(table, config=cfg, quiet=True))
    est = scoring_bytes(n, d, 0, memory_mb=16, genuine_pairs=(n // 20) * 20 * 19 // 2, identities=n // 20)
    assert scored / 2.5 <= est <= 2.5 * scored, (format_bytes(scored), format_bytes(est))
