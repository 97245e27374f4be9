"""score(): the report dict, pair lists, degenerate tables, atomic output and the CLI command."""

import dataclasses
import json
import os
import tomllib
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tripletkit._errors import TripletkitError, TripletkitWarning
from tripletkit.cli import main
from tripletkit.config import ComputeConfig, EvaluationConfig, load_config
from tripletkit._memory import estimate_and_guard, format_bytes
from tripletkit.evaluate import score, scoring_bytes
from _support import grouped_rows, traced_peak
from tripletkit.report import CAUTION
from tripletkit.tables.embeddings import EmbeddingTable, write_table

ROOT = Path(__file__).resolve().parents[1]
TOP_KEYS = ["tripletkit_version", "input", "config", "verification", "retrieval", "clustering", "health",
            "warnings", "caution", "plots", "seconds", "stage_seconds"]
FAST = EvaluationConfig(bootstrap=20, fmr=(0.001, 0.01, 0.1))


def _clustered(rng, identities=8, per=6, dim=6, spread=0.6, groups=True):
    """Seeded identities: a random centre each, rows scattered around it (test data only)."""
    centres = rng.normal(size=(identities, dim))
    labels = np.repeat(np.arange(identities), per)
    emb = (centres[labels] + spread * rng.normal(size=(labels.size, dim))).astype(np.float32)
    ids = np.array([f"r{i:03d}" for i in range(labels.size)], dtype=object)
    names = np.array([f"seal-{c}" for c in labels], dtype=object)
    grp = np.array(["north" if c % 2 else "south" for c in labels], dtype=object) if groups else None
    return ids, names, emb, grp


@pytest.fixture
def table_path(tmp_path, rng):
    ids, names, emb, grp = _clustered(rng)
    path = tmp_path / "heldout.parquet"
    write_table(path, ids, names, emb, grp)
    return path


def _pairs_brute(table):
    """Every pair i < j of the table, materialised: scores (float64 cosines), genuine flags, rows."""
    i, j = np.triu_indices(table.n, k=1)
    e = table.embeddings.astype(np.float64)
    s = np.einsum("ij,ij->i", e[i], e[j])
    return s, table.labels[i] == table.labels[j], i, j


def _strip_times(report):
    return {k: v for k, v in report.items() if k not in ("seconds", "stage_seconds")}


# ---------------------------------------------------------------------------------------------
# the report dict
# ---------------------------------------------------------------------------------------------
def test_report_keys_are_stable_and_json_valid(table_path):
    report = score(table_path, config=FAST, quiet=True)
    assert list(report) == TOP_KEYS
    assert set(report["input"]) >= {"path", "fingerprint", "rows", "identities", "dim"}
    assert report["input"]["rows"] == 48 and report["input"]["identities"] == 8 and report["input"]["dim"] == 6
    ver = report["verification"]
    for key in ("genuine_pairs", "impostor_pairs", "auc", "eer", "eer_threshold", "fnmr_at_fmr", "roc", "det",
                "groups"):
        assert key in ver
    assert ver["genuine_pairs"] == 8 * 15 and ver["impostor_pairs"] == 48 * 47 // 2 - 120
    assert list(ver["fnmr_at_fmr"]) == ["0.001", "0.01", "0.1"]
    for entry in ver["fnmr_at_fmr"].values():
        assert {"fnmr", "threshold", "ci"} <= set(entry)
    # 1008 impostor pairs resolve FMR 0.01 (needs 300) but not 0.001 (needs 3000): rule of 3
    assert ver["fnmr_at_fmr"]["0.001"]["fnmr"] is None and "rule of 3" in ver["fnmr_at_fmr"]["0.001"]["reason"]
    assert ver["fnmr_at_fmr"]["0.01"]["fnmr"] is not None and len(ver["fnmr_at_fmr"]["0.01"]["ci"]) == 2
    assert list(report["retrieval"]["recall_at_k"]) == ["1", "5", "10"]
    assert {"r_precision", "map_at_r"} <= set(report["retrieval"])
    assert {"purity", "nmi", "ari", "clusters"} <= set(report["clustering"])
    assert report["clustering"]["clusters"] == 8
    assert {"mean_impostor_cosine", "effective_dimension", "collapsed"} <= set(report["health"])
    assert report["caution"] == CAUTION and report["warnings"] == [] and report["plots"] == []
    assert report["config"] == dataclasses.asdict(FAST)
    text = json.dumps(report, allow_nan=False)  # plain JSON values, no NaN anywhere
    assert json.loads(text)["verification"]["genuine_pairs"] == 120


def test_same_seed_same_numbers_and_row_order_does_not_matter(tmp_path, rng):
    ids, names, emb, grp = _clustered(rng)
    a = score((ids, names, emb, grp), config=FAST, quiet=True)
    b = score((ids, names, emb, grp), config=FAST, quiet=True)
    assert _strip_times(a) == _strip_times(b)
    perm = rng.permutation(ids.size)
    c = score((ids[perm], names[perm], emb[perm], grp[perm]), config=dataclasses.replace(FAST, bootstrap=0),
              quiet=True)
    d = score((ids, names, emb, grp), config=dataclasses.replace(FAST, bootstrap=0), quiet=True)
    # matrix-product scores may differ in the last bit when rows move, so compare closely, not exactly
    assert c["verification"]["auc"] == pytest.approx(d["verification"]["auc"], abs=1e-9)
    assert c["verification"]["eer"] == pytest.approx(d["verification"]["eer"], abs=1e-6)
    assert c["retrieval"]["map_at_r"] == pytest.approx(d["retrieval"]["map_at_r"], abs=1e-9)


def test_threads_change_no_number_of_the_report(rng):
    ids, names, emb, grp = _clustered(rng, identities=30, per=8)
    one, two = (score((ids, names, emb, grp), config=dataclasses.replace(FAST, threads=t, block_rows=17), quiet=True)
                for t in (1, 2))
    for r in (one, two):
        r["verification"].pop("passes")  # how the operating points were listed, not a number of the report
        r["config"].pop("threads")
    assert _strip_times(one) == _strip_times(two)


def _fnmr_at_fmr_brute(gen, imp, target):
    """FNMR at FMR by the definition, trying every threshold: the lowest FNMR over the distinct
    scores t (and one above the top) with share(impostors >= t) <= target. Returns (fnmr, t)."""
    candidates = np.append(np.unique(np.concatenate([gen, imp])), np.inf)
    best = None
    for t in candidates:
        if np.mean(imp >= t) <= target:
            f = np.mean(gen < t)
            if best is None or f < best[0]:
                best = (f, t)
    return best


def test_verification_matches_brute_force_over_materialised_pairs(table_path):
    report = score(table_path, config=dataclasses.replace(FAST, bootstrap=0), quiet=True)
    ver = report["verification"]
    s, same, _, _ = _pairs_brute(EmbeddingTable.read(table_path))
    fnmr, t = _fnmr_at_fmr_brute(s[same], s[~same], 0.01)
    # float64 brute-force scores and the float32 scores of the report differ by ~1e-7
    assert ver["fnmr_at_fmr"]["0.01"]["fnmr"] == pytest.approx(fnmr, abs=1e-12)
    assert ver["fnmr_at_fmr"]["0.01"]["threshold"] == pytest.approx(t, abs=1e-6)
    fnmr, t = _fnmr_at_fmr_brute(s[same], s[~same], 0.1)
    assert ver["fnmr_at_fmr"]["0.1"]["fnmr"] == pytest.approx(fnmr, abs=1e-12)


def test_groups_are_reported_at_the_global_thresholds(table_path):
    report = score(table_path, config=dataclasses.replace(FAST, bootstrap=0), quiet=True)
    groups = report["verification"]["groups"]
    assert sorted(groups) == ["north", "south"]
    table = EmbeddingTable.read(table_path)
    s, same, i, j = _pairs_brute(table)
    _, t = _fnmr_at_fmr_brute(s[same], s[~same], 0.01)  # the global threshold, on the brute-force scores
    assert report["verification"]["fnmr_at_fmr"]["0.01"]["threshold"] == pytest.approx(t, abs=1e-6)
    for name, entry in groups.items():
        inside = (table.groups[i] == name) & (table.groups[j] == name)
        assert entry["genuine_pairs"] == int((inside & same).sum())
        assert entry["impostor_pairs"] == int((inside & ~same).sum())
        at = entry["at_fmr"]["0.01"]
        assert at["fmr"] == pytest.approx(np.mean(s[inside & ~same] >= t), abs=1e-12)
        assert at["fnmr"] == pytest.approx(np.mean(s[inside & same] < t), abs=1e-12)
    assert report["input"]["groups"] == 2


def test_no_group_column_no_groups(tmp_path, rng):
    ids, names, emb, _ = _clustered(rng, groups=False)
    report = score((ids, names, emb), config=FAST, quiet=True)
    assert "groups" not in report["verification"] and report["input"]["groups"] is None


def test_clustering_off_gives_null_section(table_path):
    report = score(table_path, config=dataclasses.replace(FAST, clustering=False), quiet=True)
    assert report["clustering"] is None and "clustering" not in report["stage_seconds"]


# ---------------------------------------------------------------------------------------------
# pair lists
# ---------------------------------------------------------------------------------------------
def _write_pairs(path, left, right, same=None):
    cols = {"left": pa.array(list(left)), "right": pa.array(list(right))}
    if same is not None:
        cols["same"] = pa.array([bool(v) for v in same], type=pa.bool_())
    pq.write_table(pa.table(cols), path)
    return path


def test_pair_list_of_every_pair_agrees_with_all_pairs(tmp_path, table_path):
    table = EmbeddingTable.read(table_path)
    _, same, i, j = _pairs_brute(table)
    plist = _write_pairs(tmp_path / "pairs.parquet", table.ids[i], table.ids[j], same)
    cfg = dataclasses.replace(FAST, bootstrap=0)
    full = score(table_path, config=cfg, quiet=True)["verification"]
    listed = score(table_path, config=dataclasses.replace(cfg, pairs=str(plist)), quiet=True)
    assert listed["input"]["pair_list"] == str(plist)
    lv = listed["verification"]
    assert lv["genuine_pairs"] == full["genuine_pairs"] and lv["impostor_pairs"] == full["impostor_pairs"]
    # row-wise and matrix-product float32 scores may differ in the last bit: compare closely
    assert lv["auc"] == pytest.approx(full["auc"], abs=1e-9)
    assert lv["eer"] == pytest.approx(full["eer"], abs=1e-6)
    assert lv["eer_threshold"] == pytest.approx(full["eer_threshold"], abs=1e-6)
    for key, entry in full["fnmr_at_fmr"].items():
        other = lv["fnmr_at_fmr"][key]
        if entry["fnmr"] is None:
            assert other["fnmr"] is None
        else:
            assert other["fnmr"] == pytest.approx(entry["fnmr"], abs=1e-12)
            assert other["threshold"] == pytest.approx(entry["threshold"], abs=1e-6)
    for name, g in full["groups"].items():
        assert lv["groups"][name]["genuine_pairs"] == g["genuine_pairs"]
        assert lv["groups"][name]["at_fmr"]["0.01"]["fnmr"] == pytest.approx(g["at_fmr"]["0.01"]["fnmr"], abs=1e-12)


def test_pair_list_without_same_column_and_in_config_file(tmp_path, table_path):
    table = EmbeddingTable.read(table_path)
    _write_pairs(tmp_path / "p.parquet", table.ids[:20], table.ids[1:21])  # neighbours: mostly genuine
    cfg_file = tmp_path / "score.toml"
    cfg_file.write_text('[evaluation]\npairs = "p.parquet"\nbootstrap = 0\nfmr = [0.1]\n')
    cfg = load_config(cfg_file).evaluation  # relative to the config file's folder
    report = score(table_path, config=cfg, quiet=True)
    v = report["verification"]
    same = table.labels[:20] == table.labels[1:21]
    assert v["genuine_pairs"] == int(same.sum()) and v["impostor_pairs"] == int((~same).sum())
    assert v["fnmr_at_fmr"]["0.1"]["fnmr"] is None  # 4 impostor pairs < 3/0.1: not resolvable


def test_pair_list_same_disagreement_names_the_first_pair(tmp_path, table_path):
    table = EmbeddingTable.read(table_path)
    _, same, i, j = _pairs_brute(table)
    same = same.copy()
    same[3] = not same[3]
    same[7] = not same[7]
    plist = _write_pairs(tmp_path / "pairs.parquet", table.ids[i], table.ids[j], same)
    with pytest.raises(TripletkitError, match=r"row 3 \(left 'r000', right 'r004'\) says same=.* 2 pairs disagree"):
        score(table_path, config=dataclasses.replace(FAST, pairs=str(plist)), quiet=True)


def test_pair_list_unknown_id_is_an_error(tmp_path, table_path):
    plist = _write_pairs(tmp_path / "pairs.parquet", ["r000", "r001"], ["r002", "nobody"])
    with pytest.raises(TripletkitError, match=r"1 'right' ids of pair list .* not in the embedding table '.*heldout\.parquet' \(first: 'nobody'\)"):
        score(table_path, config=dataclasses.replace(FAST, pairs=str(plist)), quiet=True)


@pytest.mark.parametrize("columns, message", [
    ({"left": ["r000"], "other": ["r001"]}, r"has no column 'right'"),
    ({"left": ["r000"], "right": ["r001"], "same": [1]}, r"column 'same' has type int64; expected boolean"),
    ({"left": ["r000"], "right": [None]}, r"column 'right' has 1 null values"),
    ({"left": ["r000"], "right": ["r000"]}, r"row 0 pairs id 'r000' with itself"),
])
def test_pair_list_bad_columns(tmp_path, table_path, columns, message):
    path = tmp_path / "bad.parquet"
    pq.write_table(pa.table({k: pa.array(v, type=pa.string() if k != "same" else None) for k, v in columns.items()}),
                   path)
    with pytest.raises(TripletkitError, match=message):
        score(table_path, config=dataclasses.replace(FAST, pairs=str(path)), quiet=True)


def test_pair_list_missing_file(tmp_path, table_path):
    with pytest.raises(TripletkitError, match=r"pair list .*nothere.parquet' does not exist"):
        score(table_path, config=dataclasses.replace(FAST, pairs=str(tmp_path / "nothere.parquet")), quiet=True)


# ---------------------------------------------------------------------------------------------
# degenerate tables: warnings and nulls, not crashes
# ---------------------------------------------------------------------------------------------
def test_one_identity_gives_warnings_and_nulls(tmp_path, rng):
    emb = rng.normal(size=(5, 4)).astype(np.float32)
    with pytest.warns(TripletkitWarning) as record:
        report = score((np.arange(5), np.zeros(5, np.int64), emb), out=tmp_path / "rep", config=FAST, quiet=True)
    messages = [str(w.message) for w in record]
    assert any(m.startswith("verification:") and "no impostor pairs" in m for m in messages)
    assert any(m.startswith("clustering:") for m in messages) and any(m.startswith("health:") for m in messages)
    assert report["warnings"] == messages
    ver = report["verification"]
    assert ver["impostor_pairs"] == 0 and ver["genuine_pairs"] == 10
    assert ver["auc"] is None and ver["eer"] is None and ver["reason"]
    assert all(e["fnmr"] is None and e["reason"] for e in ver["fnmr_at_fmr"].values())
    assert report["clustering"]["purity"] is None and report["clustering"]["reason"]
    assert report["health"]["mean_impostor_cosine"] is None and "reason" in report["health"]
    # retrieval is still defined: every neighbour is of the one identity
    assert report["retrieval"]["recall_at_k"]["1"] == 1.0
    assert any(w.startswith("verification:") for w in report["warnings"])
    written = json.loads((tmp_path / "rep" / "report.json").read_text())
    assert written["verification"]["eer"] is None and written["plots"] == []
    assert not list((tmp_path / "rep").glob("*.png"))
    assert "Not drawn" in (tmp_path / "rep" / "report.md").read_text()


def test_two_rows_of_two_identities(tmp_path):
    emb = np.array([[1.0, 0.0], [0.6, 0.8]], np.float32)
    with pytest.warns(TripletkitWarning) as record:
        report = score((np.array([1, 2]), np.array(["a", "b"], object), emb), out=tmp_path / "rep",
                       config=FAST, quiet=True)
    messages = [str(w.message) for w in record]
    assert any("no genuine pairs" in m for m in messages)
    assert any(m.startswith("retrieval:") for m in messages)
    assert report["verification"]["genuine_pairs"] == 0 and report["verification"]["impostor_pairs"] == 1
    assert report["verification"]["auc"] is None
    assert report["retrieval"]["map_at_r"] is None and report["retrieval"]["skipped_queries"] == 2
    # mean impostor cosine of the one impostor pair is its cosine, 0.6 (hand-computed)
    assert report["health"]["mean_impostor_cosine"] == pytest.approx(0.6, abs=1e-6)
    assert report["clustering"]["clusters"] == 2
    json.dumps(report, allow_nan=False)
    assert (tmp_path / "rep" / "report.md").is_file()


def test_single_row(tmp_path):
    with pytest.warns(TripletkitWarning):
        report = score((np.array([7]), np.array([0]), np.ones((1, 3), np.float32)), config=FAST, quiet=True)
    assert report["verification"]["genuine_pairs"] == 0 and report["verification"]["impostor_pairs"] == 0
    assert report["retrieval"]["recall_at_k"]["1"] is None
    assert report["health"]["effective_dimension"] is None
    json.dumps(report, allow_nan=False)


# ---------------------------------------------------------------------------------------------
# output folder: atomic, no overwrite without force
# ---------------------------------------------------------------------------------------------
def test_writes_report_folder(tmp_path, table_path):
    out = tmp_path / "rep"
    report = score(table_path, out=out, config=FAST, quiet=True)
    assert sorted(p.name for p in out.iterdir()) == ["report.json", "report.md", "roc_det.png", "score_histogram.png"]
    assert [p["file"] for p in report["plots"]] == ["roc_det.png", "score_histogram.png"]
    assert json.loads((out / "report.json").read_text())["verification"]["auc"] == report["verification"]["auc"]


def test_refuses_to_overwrite_and_force_replaces(tmp_path, table_path):
    out = tmp_path / "rep"
    out.mkdir()
    (out / "old.txt").write_text("keep me")
    with pytest.raises(TripletkitError, match="already exists; pass force=True"):
        score(table_path, out=out, config=FAST, quiet=True)
    assert (out / "old.txt").read_text() == "keep me"
    score(table_path, out=out, config=FAST, quiet=True, force=True)
    assert not (out / "old.txt").exists() and (out / "report.json").is_file()


def test_failure_mid_write_leaves_nothing(tmp_path, table_path, monkeypatch):
    import tripletkit.report as report_module

    def broken(*args, **kwargs):
        raise RuntimeError("disk full (simulated)")

    monkeypatch.setattr(report_module, "plot_score_histogram", broken)
    before = sorted(os.listdir(tmp_path))
    with pytest.raises(RuntimeError, match="simulated"):
        score(table_path, out=tmp_path / "rep", config=FAST, quiet=True)
    assert sorted(os.listdir(tmp_path)) == before  # no folder, no temporary sibling


def test_missing_output_parent_fails_before_the_work(tmp_path, table_path):
    with pytest.raises(TripletkitError, match="does not exist; create it first"):
        score(table_path, out=tmp_path / "no" / "rep", config=FAST, quiet=True)


def test_plots_off(tmp_path, table_path):
    score(table_path, out=tmp_path / "rep", config=dataclasses.replace(FAST, plots=False), quiet=True)
    assert not list((tmp_path / "rep").glob("*.png"))


def test_compute_without_scheduler_scores_in_this_process(table_path):
    # A ComputeConfig without a scheduler means this process, as by default; the Dask path is
    # tested in tests/engines/test_dask.py.
    plain = score(table_path, config=FAST, quiet=True)
    same = score(table_path, config=FAST, quiet=True, compute=ComputeConfig())
    assert same["verification"]["auc"] == plain["verification"]["auc"] > 0.5


def test_bad_config_type(table_path):
    with pytest.raises(TripletkitError, match="config must be an EvaluationConfig"):
        score(table_path, config={"bootstrap": 3}, quiet=True)


def test_progress_on_stderr_unless_quiet(capsys, table_path):
    score(table_path, config=FAST)
    err = capsys.readouterr().err
    assert "[score] verification over all 1,128 pairs" in err and "[score] clustering" in err
    score(table_path, config=FAST, quiet=True)
    assert capsys.readouterr().err == ""


# ---------------------------------------------------------------------------------------------
# the command line and the example config
# ---------------------------------------------------------------------------------------------
def test_cli_score_json(capsys, tmp_path, table_path):
    out = tmp_path / "rep"
    code = main(["score", str(table_path), "--out", str(out), "--json", "--quiet", "--bootstrap", "10",
                 "--fmr", "0.01", "0.1", "--recall-k", "1", "3"])
    printed, err = capsys.readouterr()
    assert code == 0, err
    data = json.loads(printed)
    assert list(data) == TOP_KEYS
    assert list(data["verification"]["fnmr_at_fmr"]) == ["0.01", "0.1"]
    assert list(data["retrieval"]["recall_at_k"]) == ["1", "3"]
    assert data["config"]["bootstrap"] == 10
    assert json.loads((out / "report.json").read_text())["input"]["fingerprint"] == data["input"]["fingerprint"]


def test_cli_missing_table_is_one_line_and_exit_2(capsys, tmp_path):
    code = main(["score", str(tmp_path / "missing.parquet"), "--out", str(tmp_path / "rep")])
    printed, err = capsys.readouterr()
    assert code == 2 and printed == ""
    assert err.count("\n") == 1 and err.startswith("error: embedding table") and "does not exist" in err
    assert not (tmp_path / "rep").exists()


def test_cli_existing_output_exit_2(capsys, tmp_path, table_path):
    (tmp_path / "rep").mkdir()
    code = main(["score", str(table_path), "--out", str(tmp_path / "rep"), "--quiet"])
    assert code == 2 and "already exists" in capsys.readouterr().err


def test_example_config_documents_every_key():
    path = ROOT / "configs" / "score.toml"
    cfg = load_config(path).evaluation
    raw = tomllib.loads(path.read_text())["evaluation"]
    text = path.read_text()
    for f in dataclasses.fields(EvaluationConfig):
        # every key appears (pairs is commented out: the demo scores all pairs) with a comment above it
        line = next((ln for ln in text.splitlines() if ln.lstrip("# ").startswith(f"{f.name} =")), None)
        assert line is not None, f.name
        above = text.splitlines()[text.splitlines().index(line) - 1]
        assert above.startswith("#"), f.name
    assert "pairs" not in raw and cfg.pairs is None
    assert cfg.fmr == (0.0001, 0.001, 0.01)
    # the demo held-out set resolves every FMR target of the example (rule of 3: >= 3/FMR impostor pairs)
    demo = EmbeddingTable.read(ROOT / "demo_data" / "heldout_embeddings.parquet")
    sizes = demo.identity_sizes()
    impostors = demo.n * (demo.n - 1) // 2 - int(np.sum(sizes * (sizes - 1) // 2))
    assert impostors >= 3 / min(cfg.fmr)


# ---------------------------------------------------------------------------------------------
# outside reference
# ---------------------------------------------------------------------------------------------
def test_auc_equals_sklearn_roc_auc_score(table_path):
    # Reference: scikit-learn, sklearn.metrics.roc_auc_score and roc_curve, on every pair materialised.
    from sklearn.metrics import roc_auc_score, roc_curve

    report = score(table_path, config=dataclasses.replace(FAST, bootstrap=0), quiet=True)
    table = EmbeddingTable.read(table_path)
    i, j = np.triu_indices(table.n, k=1)
    # float32 products like the blocked path, so the two see the same scores up to the last bit
    s = np.einsum("ij,ij->i", table.embeddings[i], table.embeddings[j]).astype(np.float64)
    same = table.labels[i] == table.labels[j]
    assert report["verification"]["auc"] == pytest.approx(roc_auc_score(same, s), abs=1e-6)
    fpr, tpr, _ = roc_curve(same, s)
    # FNMR at FMR 0.01 = 1 - the highest TPR among ROC points with FPR <= 0.01
    expected = 1.0 - tpr[fpr <= 0.01].max()
    assert report["verification"]["fnmr_at_fmr"]["0.01"]["fnmr"] == pytest.approx(expected, abs=1e-12)


_SAME_EVERYWHERE = r"""
import json, sys
import numpy as np
from tripletkit.config import EvaluationConfig
from tripletkit.evaluate import score
from tripletkit.metrics.verification import verify_all_pairs
from tripletkit.tables.embeddings import EmbeddingTable

path = sys.argv[1]
out = {"score": [], "verify": [], "passes": []}
for threads, memory_mb in ((1, 16), (2, 512)):
    r = score(path, config=EvaluationConfig(threads=threads, memory_mb=memory_mb, plots=False), quiet=True)
    for key in ("seconds", "stage_seconds"):
        r.pop(key)
    r["config"].pop("threads"), r["config"].pop("memory_mb")
    out["passes"].append(r["verification"].pop("passes"))
    out["score"].append(r)
table = EmbeddingTable.read(path)
groups = np.where(table.labels % 3 == 0, "bay", "spit")
for workers, budget in ((1, 1 << 20), (2, 1 << 20), (2, 256 << 20)):
    r = verify_all_pairs(table.embeddings, table.labels, groups=groups, workers=workers, memory_budget=budget,
                         fmr_targets=(0.001, 0.01), bootstrap=50)
    out["passes"].append(r.pop("passes"))
    out["verify"].append(r)
print(json.dumps(out))
"""


def test_report_is_the_same_bit_for_bit_whatever_the_blas_threads_workers_and_budget(tmp_path):
    # The demo's held-out table scored in fresh processes with 1 and 2 BLAS/OpenMP threads, 1 and
    # 2 verification workers, budgets whose blocks differ in shape and that take one pass or two:
    # every number of the report, the AUC and the thresholds included, is equal bit for bit (the
    # scores are exact cosines on a grid, see tripletkit/_exact.py). JSON keeps every float's bits.
    import subprocess
    import sys

    heldout = str(ROOT / "demo_data" / "heldout_embeddings.parquet")
    results = []
    for blas in ("1", "2"):
        env = dict(os.environ, OPENBLAS_NUM_THREADS=blas, OMP_NUM_THREADS=blas, MKL_NUM_THREADS=blas)
        done = subprocess.run([sys.executable, "-c", _SAME_EVERYWHERE, heldout], capture_output=True, text=True,
                              env=env, cwd=tmp_path, timeout=600)
        assert done.returncode == 0, done.stderr
        results.append(json.loads(done.stdout))
    reports = [r for res in results for r in res["score"]]
    assert all(r == reports[0] for r in reports[1:])
    verified = [r for res in results for r in res["verify"]]
    assert all(r == verified[0] for r in verified[1:])
    # both ways of listing the refined bins were exercised
    assert {p for res in results for p in res["passes"]} == {1, 2}


# ---------------------------------------------------------------------------------------------
# the memory estimate of a scoring run
# ---------------------------------------------------------------------------------------------
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
    with pytest.raises(TripletkitError, match=r"^n must be a whole number >= 0, got -1"):
        scoring_bytes(-1, 4, 0)
    with pytest.raises(TripletkitError, match=r"^n must be a whole number >= 0, got 2.5"):
        scoring_bytes(2.5, 4, 0)


# -- estimators against what real runs allocate -----------------------------------------------
# Tolerance: the estimate is a planning figure, not an accounting; within a factor of 2.5 of
# the traced numpy allocations either way (our choice; measured ratios were 0.7 to 2.0).
@pytest.mark.parametrize("n, d", [(4000, 64), (2000, 256)])
def test_scoring_estimate_tracks_traced_allocations(rng, n, d):
    from tripletkit.tables.embeddings import EmbeddingTable

    ids, labels, X = grouped_rows(rng, n, d)
    table = EmbeddingTable.from_arrays(ids, labels, X)
    cfg = EvaluationConfig(memory_mb=16, bootstrap=0, clustering=False, plots=False)
    scored = traced_peak(lambda: score(table, config=cfg, quiet=True))
    est = scoring_bytes(n, d, 0, memory_mb=16, genuine_pairs=(n // 20) * 20 * 19 // 2, identities=n // 20)
    assert scored / 2.5 <= est <= 2.5 * scored, (format_bytes(scored), format_bytes(est))
