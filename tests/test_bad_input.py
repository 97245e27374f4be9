"""Bad input, measured: one table of cases, each a command, an input built in tmp_path, the expected
one-line message and exit code 2, and proof that nothing was written or changed.

Every case runs ``tripletkit.cli.main(argv)`` in-process (a few also through
``python -m tripletkit``) and checks that

- the exit code is 2 and stdout is empty;
- stderr is exactly one line, starting with ``error:``, matching the case's message;
- the folder the case works in is exactly as before: no output file or folder, no temporary
  dot-file (``.NAME.tmp-*``), and no input modified (sizes and modification times compared).

Degenerate input, decided per command (documented in docs/limits.md)
---------------------------------------------------------------------
What users expect is a result when one can be computed and one clear line when it cannot:

============================  =========  ======================  ======================  =========
input                         check      mine                    score (all pairs)       sweep
============================  =========  ======================  ======================  =========
one identity only             exit 1     exit 2 (no negatives)   exit 2 (no impostor     exit 2
                              (a                                 pairs)
                              problem
                              line)
no genuine pairs (every       exit 1     exit 2 (no anchors)     exit 2 (no genuine      exit 2
identity has one row)                                            pairs)
all rows identical            exit 0     exit 0: every triplet   exit 0: EER 0.5, AUC    exit 0
                                         is semi-hard (d_ap =    0.5, health.collapsed
                                         d_an = 0) and every     true (a collapsed
                                         cross-label pair a      model is a result)
                                         suspect duplicate
dimension 1                   exit 0     exit 0 (distance-       exit 0
                                         weighted: exit 2)
huge dimension (d = 100,000,  exit 0     exit 0                  exit 0, or exit 2 with
12 rows)                                                         an out-of-memory line
============================  =========  ======================  ======================  =========

The Python functions (``mine``, ``score``) keep treating the first two rows as legal but
degenerate (a TripletkitWarning and nulls), so a training loop is not stopped by one odd epoch;
the commands stop instead of writing a file that holds only nulls.
"""

import json
import os
import re
import resource
import subprocess
import sys
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tripletkit._errors import TripletkitError
from tripletkit.cli import main
from tripletkit.tables.embeddings import write_table

REPO = Path(__file__).resolve().parents[1]


# ---------------------------------------------------------------------------------------------
# inputs
# ---------------------------------------------------------------------------------------------
def _rng(tmp):
    # one seeded generator per case; the seed is the suite's (tests/conftest.py) plus the case's
    # folder name length, so cases do not share draws
    return np.random.default_rng(20261201 + len(tmp.name))


def _fixed(x):
    x = np.ascontiguousarray(x, dtype=np.float32)
    return pa.FixedSizeListArray.from_arrays(pa.array(x.reshape(-1)), x.shape[1])


def _parquet(path, **columns):
    pq.write_table(pa.table(columns), path)
    return str(path)


def good(tmp, name="good.parquet", n=24, d=4, identities=6, labels=None, first_label=0):
    """A valid table: ``identities`` identities of n / identities rows each."""
    rng = _rng(tmp)
    labels = np.repeat(np.arange(identities), n // identities) + first_label if labels is None else labels
    X = rng.normal(size=(labels.size, d))
    write_table(tmp / name, np.arange(labels.size), labels, X)
    return str(tmp / name)


def _labels(n=24, identities=6):
    return np.repeat(np.arange(identities), n // identities)


def _emb(tmp, n=24, d=4):
    return _fixed(_rng(tmp).normal(size=(n, d)))


def empty_file(tmp):
    (tmp / "empty.parquet").write_bytes(b"")
    return str(tmp / "empty.parquet")


def truncated(tmp):
    data = Path(good(tmp, "whole.parquet")).read_bytes()
    (tmp / "whole.parquet").unlink()
    (tmp / "cut.parquet").write_bytes(data[: len(data) // 2])
    return str(tmp / "cut.parquet")


def not_parquet(tmp):
    (tmp / "notes.parquet").write_text("id,label,embedding\n1,a,0.1 0.2\n")
    return str(tmp / "notes.parquet")


def mixed_folder(tmp):
    (tmp / "dump").mkdir()
    good(tmp / "dump", "part-0.parquet", d=4)
    good(tmp / "dump", "part-1.parquet", d=5)
    return str(tmp / "dump")


def folder_without_parquet(tmp):
    (tmp / "dump").mkdir()
    (tmp / "dump" / "README.txt").write_text("embeddings go here")
    return str(tmp / "dump")


def folder_with_hidden_parts_only(tmp):
    (tmp / "dump").mkdir()
    good(tmp / "dump", ".part-0.parquet")
    (tmp / "dump" / "_temporary").mkdir()
    good(tmp / "dump" / "_temporary", "part-1.parquet")
    return str(tmp / "dump")


def folder_with_broken_part(tmp):
    (tmp / "dump").mkdir()
    good(tmp / "dump", "part-0.parquet")
    (tmp / "dump" / "part-1.parquet").write_bytes(b"PAR1 not really")
    return str(tmp / "dump")


def without(column):
    def build(tmp):
        cols = {"id": np.arange(24), "label": _labels(), "embedding": _emb(tmp)}
        del cols[column]
        return _parquet(tmp / "t.parquet", **cols)
    return build


def with_column(column, value_fn):
    def build(tmp):
        cols = {"id": np.arange(24), "label": _labels(), "embedding": _emb(tmp)}
        cols[column] = value_fn(tmp)
        return _parquet(tmp / "t.parquet", **cols)
    return build


def bad_rows(kind):
    def build(tmp):
        X = _rng(tmp).normal(size=(24, 4)).astype(np.float32)
        if kind == "nan":
            X[3, 1] = np.nan
        elif kind == "inf":
            X[5, 0] = -np.inf
        elif kind == "zero":
            X[7] = 0.0
        elif kind == "all":
            X[:] = np.nan
        return _parquet(tmp / "t.parquet", id=np.arange(24), label=_labels(), embedding=_fixed(X))
    return build


def zero_rows(tmp):
    return _parquet(tmp / "t.parquet", id=pa.array([], pa.int64()), label=pa.array([], pa.int64()),
                    embedding=pa.array([], pa.list_(pa.float32(), 4)))


def one_identity(tmp):
    return good(tmp, "one_identity.parquet", labels=np.full(12, 7))


def singletons(tmp):
    return good(tmp, "singletons.parquet", labels=np.arange(12))


def dim1(tmp):
    return good(tmp, "dim1.parquet", d=1)


# configs
def config(text, name="c.toml"):
    def build(tmp):
        (tmp / name).write_text(text)
        return str(tmp / name)
    return build


def sweep_config(heldout_labels=None, extra="", head=""):
    """A fit-head sweep over two small feature tables (labels 0-5 train, 100-105 held out)."""
    def build(tmp):
        good(tmp, "train.parquet", n=36, d=6)
        labels = np.repeat(np.arange(6), 4) + 100 if heldout_labels is None else heldout_labels
        good(tmp, "heldout.parquet", d=6, labels=labels)
        text = ('[sweep]\nmargins = [0.1, 0.2]\nprimary = "eer"\nbootstrap = 5\n'
                '[data]\ntrain = "train.parquet"\nheldout = "heldout.parquet"\n[head]\ndim = 3\nepochs = 1\n' + head +
                '[evaluation]\nbootstrap = 0\nclustering = false\nplots = false\n' + extra)
        (tmp / "sweep.toml").write_text(text)
        return str(tmp / "sweep.toml")
    return build


# ---------------------------------------------------------------------------------------------
# the table of cases
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Case:
    name: str
    build: Callable  # tmp -> argv (inputs written into tmp; outputs named inside tmp)
    message: str  # regex searched in the one stderr line


def mine_on(make, *extra):
    return lambda tmp: ["mine", make(tmp), "--out", str(tmp / "triplets.parquet"), "--quiet", *extra]


def score_on(make, *extra):
    return lambda tmp: ["score", make(tmp), "--out", str(tmp / "report"), "--quiet", *extra]


def check_on(make, *extra):
    return lambda tmp: ["check", make(tmp), *extra]


def mine_with_config(make_config, *extra):
    return lambda tmp: ["mine", good(tmp), "--config", make_config(tmp), "--out", str(tmp / "t.parquet"),
                        "--quiet", *extra]


def score_with_config(make_config, *extra):
    return lambda tmp: ["score", good(tmp), "--config", make_config(tmp), "--out", str(tmp / "report"),
                        "--quiet", *extra]


def sweep_with(make_config, *extra):
    return lambda tmp: ["sweep", make_config(tmp), "--out", str(tmp / "sweep"), "--quiet", *extra]


def _existing_output(kind, command):
    def build(tmp):
        src = good(tmp)
        out = tmp / ("triplets.parquet" if command == "mine" else "report")
        if kind == "file":
            out.write_text("an earlier output")
        else:
            out.mkdir()
            (out / "keep.txt").write_text("someone's notes")
        return [command, src, "--out", str(out), "--quiet", "--force"]  # --force cannot change the kind
    return build


def _not_forced(command):
    def build(tmp):
        src = good(tmp)
        out = tmp / ("triplets.parquet" if command == "mine" else "report")
        if command == "mine":
            out.write_text("last epoch's triplets")
        else:
            out.mkdir()
            (out / "report.json").write_text("{}")
        return [command, src, "--out", str(out), "--quiet"]
    return build


def _out_is_input(tmp):
    src = good(tmp)
    return ["mine", src, "--out", src, "--quiet", "--force"]


def _out_holds_input(tmp):
    (tmp / "data").mkdir()
    src = good(tmp / "data")
    return ["score", src, "--out", str(tmp / "data"), "--quiet", "--force"]


def _sweep_margin_zero(tmp):
    path = Path(sweep_config()(tmp))
    path.write_text(path.read_text().replace("margins = [0.1, 0.2]", "margins = [0.0, 0.2]"))
    return ["sweep", str(path), "--out", str(tmp / "sweep"), "--quiet"]


def _not_utf8(tmp):
    (tmp / "c.toml").write_bytes(b"\xff\xfe[mining]")
    return str(tmp / "c.toml")


def _out_parent_is_a_file(tmp):
    src = good(tmp)
    return ["mine", src, "--out", str(Path(src) / "t.parquet")]


def _loss_unknown_ids(tmp):
    src = good(tmp)
    trip = _parquet(tmp / "trip.parquet", anchor=[0, 1], positive=[1, 2], negative=[5, 999])
    return ["loss", trip, src]


def _loss_on(**columns):
    def build(tmp):
        src = good(tmp)
        return ["loss", _parquet(tmp / "trip.parquet", **columns), src]
    return build


def _loss_string_table(tmp):
    src = good(tmp, labels=_labels())
    table = pq.read_table(src)
    table = table.set_column(0, "id", pa.array([f"p-{i:04d}" for i in range(24)]))
    pq.write_table(table, tmp / "strings.parquet")
    Path(src).unlink()
    return ["loss", _parquet(tmp / "trip.parquet", anchor=[0, 1], positive=[1, 2], negative=[5, 6]),
            str(tmp / "strings.parquet")]


CASES = [
    # -- files --------------------------------------------------------------------------------
    Case("missing-table", lambda tmp: ["mine", str(tmp / "nothere.parquet"), "--out", str(tmp / "t.parquet")],
         r"^error: embedding table '.*nothere\.parquet' does not exist; check the path$"),
    Case("empty-0-byte-file", score_on(empty_file), r"cannot read embedding table '.*empty\.parquet' as Parquet "
         r"\(.*0 bytes.*\); is the file complete\?$"),
    Case("truncated-file", mine_on(truncated), r"cannot read embedding table '.*cut\.parquet' as Parquet \(.*magic "
         r"bytes.*\)"),
    Case("text-file-named-parquet", check_on(not_parquet),
         r"^error: embedding table '.*notes\.parquet' is not a Parquet file; it looks like CSV: convert it to "
         r"Parquet$"),
    Case("folder-mixed-schemas", mine_on(mixed_folder),
         r"folder '.*dump' mixes Parquet files with different schemas \(part-0\.parquet and part-1\.parquet\)"),
    Case("folder-without-parquet", score_on(folder_without_parquet),
         r"folder '.*dump' holds no \.parquet files \(names starting with '\.' or '_' are skipped, as by pyarrow's "
         r"dataset discovery\)$"),
    Case("folder-with-hidden-parquet-only", check_on(folder_with_hidden_parts_only),
         r"folder '.*dump' holds no \.parquet files \(names starting with '\.' or '_' are skipped"),
    Case("folder-with-broken-part", check_on(folder_with_broken_part),
         r"cannot read part '.*dump/part-1\.parquet' of folder '.*dump' as Parquet"),
    # -- columns of the table contract ---------------------------------------------------------
    Case("missing-id-column", mine_on(without("id")),
         r"id column 'id' is missing in .* \(columns: label, embedding\); name it with --id-column$"),
    Case("missing-label-column", score_on(without("label")), r"label column 'label' is missing .*--label-column$"),
    Case("missing-embedding-column", check_on(without("embedding")),
         r"embedding column 'embedding' is missing .*--embedding-column$"),
    Case("embedding-column-named-wrong", mine_on(good, "--embedding-column", "vector"),
         r"embedding column 'vector' is missing .*\(columns: id, label, embedding\)"),
    Case("float-ids", mine_on(with_column("id", lambda tmp: np.arange(24) * 1.0)),
         r"id column 'id' .* has type double; expected int64 or string$"),
    Case("bool-ids", check_on(with_column("id", lambda tmp: np.arange(24) % 2 == 0)),
         r"id column 'id' .* has type bool; expected int64 or string$"),
    Case("uint64-ids-beyond-int64", check_on(with_column(
        "id", lambda tmp: pa.array(np.arange(24, dtype=np.uint64) + np.uint64(2**63)))),
         r"id column 'id' .* has uint64 values above 9223372036854775807; store the ids as int64 or string$"),
    Case("float-labels", score_on(with_column("label", lambda tmp: _labels() * 0.5)),
         r"label column 'label' .* has type double; expected int64 or string$"),
    Case("string-embeddings", mine_on(with_column("embedding", lambda tmp: [f"{i} 0.5" for i in range(24)])),
         r"embedding column 'embedding' .* has type string; expected fixed_size_list<float32>\[d\] or list<float32>$"),
    Case("integer-embeddings", score_on(with_column(
        "embedding", lambda tmp: pa.array([[1, 2, 3]] * 24, pa.list_(pa.int64())))),
         r"embedding column 'embedding' .* holds int64 values; expected float32 or float64$"),
    Case("float16-embeddings", mine_on(with_column(
        "embedding", lambda tmp: pa.array([np.ones(3, np.float16)] * 24, pa.list_(pa.float16())))),
         r"holds halffloat values; expected float32 or float64$"),
    Case("ragged-lengths", mine_on(with_column(
        "embedding", lambda tmp: pa.array([[0.5, 1.0, 2.0]] * 23 + [[0.5, 1.0]], pa.list_(pa.float32())))),
         r"has rows of length 3 and 2 \(first ragged id: 23\); every row must have the same length$"),
    Case("zero-length-rows", score_on(with_column(
        "embedding", lambda tmp: pa.array([[]] * 24, pa.list_(pa.float32())))),
         r"has rows of length 0; every row needs at least one value$"),
    Case("null-embedding-row", mine_on(with_column(
        "embedding", lambda tmp: pa.array([[0.5, 1.0]] * 23 + [None], pa.list_(pa.float32())))),
         r"embedding column 'embedding' .* has 1 null rows \(first ids: 23\); every row needs a vector"),
    Case("null-inside-embedding", score_on(with_column(
        "embedding", lambda tmp: pa.array([[0.5, 1.0]] * 23 + [[0.5, None]], pa.list_(pa.float32())))),
         r"has 1 null values inside rows; every value must be a number$"),
    Case("duplicate-int-ids", mine_on(with_column("id", lambda tmp: np.r_[np.arange(23), 4])),
         r"id column 'id' .* has duplicate ids \(first: 4\); ids must be unique$"),
    Case("duplicate-string-ids", score_on(with_column("id", lambda tmp: [f"p-{i % 20:04d}" for i in range(24)])),
         r"has duplicate ids \(first: 'p-0000'\); ids must be unique$"),
    Case("null-ids", mine_on(with_column("id", lambda tmp: pa.array(list(range(23)) + [None], pa.int64()))),
         r"id column 'id' .* has 1 null values \(first at row 23\); every row needs an id$"),
    Case("null-labels", score_on(with_column("label", lambda tmp: pa.array([None] + list(range(23)), pa.int64()))),
         r"label column 'label' .* has 1 null values \(first at row 0\); every row needs a label$"),
    Case("null-groups", score_on(with_column("group", lambda tmp: pa.array([None] * 3 + ["reef"] * 21))),
         r"group column 'group' .* has 3 null values \(first at row 0\); fill them"),
    Case("nested-groups", mine_on(with_column("group", lambda tmp: pa.array([{"site": 1}] * 24))),
         r"group column 'group' .* has type struct<site: int64>; expected strings or integers"),
    Case("nan-values", mine_on(bad_rows("nan")),
         r"embeddings in .* have 1 rows with NaN/Inf \(first ids: 3\); fix them or pass --drop-invalid$"),
    Case("inf-values", score_on(bad_rows("inf")), r"have 1 rows with NaN/Inf \(first ids: 5\)"),
    Case("zero-norm-row", mine_on(bad_rows("zero")), r"have 1 zero-norm rows \(first ids: 7\)"),
    Case("every-row-invalid-dropped", score_on(bad_rows("all"), "--drop-invalid"),
         r"every row of the table .* is invalid \(NaN/Inf or zero norm\)$"),
    Case("zero-rows", score_on(zero_rows), r"table in .* has no rows; is it the right file\?$"),
    # -- degenerate tables (see the decision table above) --------------------------------------
    Case("mine-one-identity", mine_on(one_identity),
         r"has a single identity \(label 7\), so there are no impostor pairs; mining needs at least 2 identities"),
    Case("score-one-identity", score_on(one_identity),
         r"has a single identity \(label 7\), so there are no impostor pairs; scoring needs at least 2 identities"),
    Case("mine-no-genuine-pairs", mine_on(singletons),
         r"every identity of table .* has one row, so there are no genuine pairs; mining needs identities with "
         r"at least 2 rows"),
    Case("score-no-genuine-pairs", score_on(singletons), r"so there are no genuine pairs; scoring needs"),
    Case("label-column-is-the-id-column", mine_on(good, "--label-column", "id"), r"so there are no genuine pairs"),
    Case("sweep-heldout-one-identity", sweep_with(sweep_config(heldout_labels=np.full(24, 100))),
         r"single identity \(label 100\), so there are no impostor pairs; a sweep on the held-out set needs"),
    Case("sweep-heldout-no-genuine-pairs", sweep_with(sweep_config(heldout_labels=np.arange(24) + 100)),
         r"no genuine pairs; a sweep on the held-out set needs identities with at least 2 rows"),
    Case("distance-weighted-dimension-1", mine_on(dim1, "--select", "distance-weighted"),
         r"select = distance-weighted needs embeddings of dimension >= 2, got 1$"),
    # -- configs ------------------------------------------------------------------------------
    Case("config-unknown-key", mine_with_config(config("[mining]\nmargn = 0.2\n")),
         r"c\.toml \[mining\]: unknown key 'margn'; known keys: margin, distance"),
    Case("config-unknown-section", score_with_config(config("[scoring]\nbootstrap = 10\n")),
         r"unknown section \[scoring\]; known sections: \[mining\], \[evaluation\]"),
    Case("config-wrong-type", mine_with_config(config('[mining]\nmargin = "wide"\n')),
         r"\[mining\]\.margin must be a number, got 'wide'$"),
    Case("config-wrong-type-bool", score_with_config(config('[evaluation]\nclustering = "yes"\n')),
         r"\[evaluation\]\.clustering must be a true/false, got 'yes'$"),
    Case("config-float-for-int", mine_with_config(config("[mining]\npositives_per_anchor = 2.5\n")),
         r"\[mining\]\.positives_per_anchor must be a whole number, got 2\.5$"),
    Case("config-margin-zero", mine_with_config(config("[mining]\nmargin = 0\n")),
         r"\[mining\]\.margin must be > 0\.0, got 0\.0$"),
    Case("config-margin-nan", mine_with_config(config("[mining]\nmargin = nan\n")),
         r"^error: .*c\.toml \[mining\]\.margin must be a finite number, got nan$"),
    Case("config-margin-inf", mine_with_config(config("[mining]\nmargin = inf\n")),
         r"^error: .*c\.toml \[mining\]\.margin must be a finite number, got inf$"),
    Case("config-duplicate-cosine-nan", mine_with_config(config("[mining]\nduplicate_cosine = nan\n")),
         r"^error: .*c\.toml \[mining\]\.duplicate_cosine must be a finite number, got nan$"),
    Case("config-weighted-cutoff-nan", mine_with_config(config('[mining]\nselect = "distance-weighted"\n'
                                                               'weighted_cutoff = nan\n')),
         r"^error: .*c\.toml \[mining\]\.weighted_cutoff must be a finite number, got nan$"),
    Case("config-fmr-inf", score_with_config(config("[evaluation]\nfmr = [0.001, -inf]\n")),
         r"\[evaluation\]\.fmr\[1\] must be a finite number, got -inf$"),
    Case("config-margin-unreachable", mine_with_config(config("[mining]\nmargin = 4.0\n")),
         r"c\.toml \[mining\]\.margin = 4\.0 cannot be reached with distance = squared: distances between unit "
         r"vectors lie in \[0, 4\], so the margin must lie in \(0, 4\)$"),
    Case("option-margin-unreachable", mine_on(good, "--distance", "euclidean", "--margin", "2"),
         r"--margin = 2\.0 cannot be reached with distance = euclidean: .* must lie in \(0, 2\)$"),
    Case("loss-margin-unreachable", lambda tmp: ["loss", _parquet(tmp / "trip.parquet", anchor=[0], positive=[1],
                                                                  negative=[5]), good(tmp), "--margin", "4.5"],
         r"margin = 4\.5 cannot be reached with distance = squared"),
    Case("config-fmr-above-1", score_with_config(config("[evaluation]\nfmr = [0.001, 1.5]\n")),
         r"\[evaluation\]\.fmr\[1\] must be <= 1\.0, got 1\.5$"),
    Case("config-confidence-1", score_with_config(config("[evaluation]\nconfidence = 1.0\n")),
         r"\[evaluation\]\.confidence must be < 1\.0, got 1\.0$"),
    Case("config-bad-choice", mine_with_config(config('[mining]\nselect = "hardestest"\n')),
         r"\[mining\]\.select must be one of hardest, random, distance-weighted; got 'hardestest'$"),
    Case("config-empty-regimes", mine_with_config(config("[mining]\nregimes = []\n")),
         r"\[mining\]\.regimes must not be empty$"),
    Case("config-not-toml", mine_with_config(config("[mining\nmargin = 0.2\n")), r"is not valid TOML"),
    Case("config-not-utf8", mine_with_config(_not_utf8), r"config file '.*c\.toml' is not UTF-8 text$"),
    Case("config-missing", lambda tmp: ["score", good(tmp), "--config", str(tmp / "none.toml"), "--out",
                                        str(tmp / "r")], r"config file '.*none\.toml' does not exist$"),
    Case("config-pair-list-missing", score_with_config(config('[evaluation]\npairs = "pairs.parquet"\n')),
         r"pair list '.*pairs\.parquet' does not exist"),
    Case("option-margin-zero", mine_on(good, "--margin", "0"), r"^error: --margin must be > 0\.0, got 0\.0$"),
    Case("option-margin-not-a-number", mine_on(good, "--margin", "wide"),
         r"^error: tripletkit mine: argument --margin: expected a number, got 'wide'"),
    Case("option-margin-nan", mine_on(good, "--margin", "nan"), r"expected a finite number, got 'nan'"),
    Case("option-recall-k-zero", score_on(good, "--recall-k", "0"), r"--recall-k\[0\] must be >= 1, got 0$"),
    Case("sweep-config-missing", lambda tmp: ["sweep", str(tmp / "none.toml"), "--out", str(tmp / "s")],
         r"config file '.*none\.toml' does not exist$"),
    Case("sweep-fit-head-without-data", sweep_with(config('[sweep]\nmargins = [0.1]\n')),
         r"fit-head mode needs \[data\] train and heldout"),
    Case("sweep-head-diverges", sweep_with(sweep_config(head="learning_rate = 1e308\n")),
         r"^error: the projection head diverged at margin 0\.1 in epoch 1 of 1: the projection head's (raw outputs|"
         r"weights|gradients) overflowed to Inf/NaN; lower \[head\] learning_rate \(now 1e\+308, try 1e\+306\)$"),
    Case("sweep-margin-zero", _sweep_margin_zero, r"\[sweep\]\.margins\[0\] must be > 0\.0, got 0\.0$"),
    # -- outputs ------------------------------------------------------------------------------
    Case("out-parent-is-a-file", _out_parent_is_a_file,
         r"output parent '.*good\.parquet' is not a folder"),
    Case("out-parent-missing", lambda tmp: ["score", good(tmp), "--out", str(tmp / "no" / "such" / "report")],
         r"output folder '.*no/such' does not exist; create it first$"),
    Case("mine-out-exists-no-force", _not_forced("mine"), r"output '.*triplets\.parquet' already exists; pass --force"),
    Case("score-out-exists-no-force", _not_forced("score"), r"output '.*report' already exists; pass --force"),
    Case("mine-out-is-the-input", _out_is_input, r"--out '.*good\.parquet' is the input '.*good\.parquet'; writing "
         r"there would destroy the input"),
    Case("score-out-holds-the-input", _out_holds_input, r"--out '.*data' contains the input '.*good\.parquet'"),
    Case("mine-out-is-a-folder", _existing_output("folder", "mine"),
         r"output '.*triplets\.parquet' is an existing folder but a file is written here"),
    Case("score-out-is-a-file", _existing_output("file", "score"),
         r"output '.*report' is an existing file but a folder is written here"),
    Case("demo-out-parent-is-a-file", lambda tmp: ["demo", "--out", str(Path(good(tmp)) / "demo"), "--quiet"],
         r"output parent '.*good\.parquet' is not a folder"),
    Case("loss-triplets-missing", lambda tmp: ["loss", str(tmp / "none.parquet"), good(tmp)],
         r"triplet table '.*none\.parquet' does not exist; check the path$"),
    Case("loss-unknown-ids", _loss_unknown_ids, r"999"),
    # ids of triplet tables follow the rules of embedding tables: 0.7 is no id, and 1.0 is not 1
    Case("loss-float-ids", _loss_on(anchor=[0.7, 1.2, 20.6], positive=[1, 2, 21], negative=[5, 6, 7]),
         r"^error: anchor ids of triplet table '.*trip\.parquet' \(column 'anchor'\) have type double; ids are int64 "
         r"or strings \(as in the embedding table\)$"),
    Case("loss-whole-float-ids", _loss_on(anchor=[0, 1], positive=[1.0, 2.0], negative=[5, 6]),
         r"positive ids of triplet table .* have type double"),
    Case("loss-bool-ids", _loss_on(anchor=[0, 1], positive=[1, 2], negative=[True, False]),
         r"negative ids of triplet table .* have type bool"),
    Case("loss-null-ids", _loss_on(anchor=pa.array([0, None], pa.int64()), positive=[1, 2], negative=[5, 6]),
         r"anchor ids of triplet table .* have 1 null values \(first at row 1\); every row needs an id$"),
    Case("loss-many-unknown-ids", _loss_on(anchor=[0, 1, 2, 3, 4, 5, 6, 7], positive=[1, 2, 3, 0, 5, 6, 7, 4],
                                           negative=[999, 998, 997, 996, 995, 994, 8, 999]),
         r"^error: 7 negative ids are not in the embedding table '.*good\.parquet' \(first: 999, 998, 997, 996, "
         r"995\); use the table the ids come from$"),
    Case("loss-integer-ids-for-string-table", _loss_string_table,
         r"anchor ids are integers but the ids of the embedding table '.*strings\.parquet' are strings"),
]
def _snapshot(root):
    """Every path under ``root`` with its kind, size and modification time."""
    out = {}
    for dirpath, dirnames, filenames in os.walk(root):
        for name in dirnames + filenames:
            p = Path(dirpath) / name
            st = p.lstat()
            # a folder's own mtime changes when a temporary file comes and goes: compare its contents only
            out[str(p.relative_to(root))] = (True, 0, 0) if p.is_dir() else (False, st.st_size, st.st_mtime_ns)
    return out


def _run(argv):
    try:
        return main(argv)
    except SystemExit as exc:  # argparse usage errors exit from inside the parser
        return exc.code


def test_the_table_is_large_and_names_are_unique():
    assert len(CASES) >= 30
    assert len({c.name for c in CASES}) == len(CASES)


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.name)
def test_bad_input_is_one_line_exit_2_and_writes_nothing(case, tmp_path, capsys, monkeypatch):
    work = tmp_path / case.name
    work.mkdir()
    monkeypatch.chdir(work)
    argv = case.build(work)
    capsys.readouterr()
    before = _snapshot(work)
    code = _run(argv)
    out, err = capsys.readouterr()
    assert code == 2, (code, err)
    assert out == ""
    lines = err.splitlines()
    assert len(lines) == 1 and err.endswith("\n"), err
    assert lines[0].startswith("error: ")
    assert re.search(case.message, lines[0]), lines[0]
    assert _snapshot(work) == before  # no output, no temporary dot-file, no input touched


# the same through the real command, for a few cases (exit code and stderr of the process)
@pytest.mark.parametrize("name", ["truncated-file", "mine-one-identity", "config-unknown-key"])
def test_bad_input_through_python_dash_m(name, tmp_path):
    case = next(c for c in CASES if c.name == name)
    argv = case.build(tmp_path)
    before = _snapshot(tmp_path)
    proc = subprocess.run([sys.executable, "-m", "tripletkit", *argv], capture_output=True, text=True,
                          cwd=tmp_path, timeout=120)
    assert proc.returncode == 2 and proc.stdout == ""
    assert proc.stderr.count("\n") == 1 and re.search(case.message, proc.stderr.strip())
    assert _snapshot(tmp_path) == before


# ---------------------------------------------------------------------------------------------
# degenerate input that is accepted (the decision table of the module docstring)
# ---------------------------------------------------------------------------------------------
def _warning_lines_only(err):
    lines = err.splitlines()
    assert all(line.startswith("warning: ") for line in lines), err
    return lines


def test_check_reports_one_identity_and_singletons(tmp_path, capsys):
    # like a linter: exit 1, the summary, then one line per problem that mine and score refuse
    assert main(["check", one_identity(tmp_path), "--json"]) == 1
    data = json.loads(capsys.readouterr().out)
    assert data["identities"] == 1 and len(data["problems"]) == 1 and "single identity" in data["problems"][0]
    assert main(["check", singletons(tmp_path)]) == 1
    out, err = capsys.readouterr()
    assert err == "" and "singletons: 12\n" in out and "identities: 12\n" in out
    problems = [line for line in out.splitlines() if line.startswith("problem: ")]
    assert problems == [line for line in out.splitlines()[-len(problems):]]  # after the summary
    assert len(problems) == 1 and "so there are no genuine pairs; mining or scoring needs" in problems[0]


@pytest.mark.parametrize("make, args, code, problems", [
    (bad_rows("nan"), [], 1, [r"has 1 rows with NaN/Inf or zero norm \(first ids: 3\); mine and score refuse them"]),
    (bad_rows("zero"), ["--drop-invalid"], 0, []),
    (bad_rows("all"), ["--drop-invalid"], 1, [r"every row of the table .* is invalid \(NaN/Inf or zero norm\): "
                                              r"there is nothing to mine or score$"]),
    (good, [], 0, []),
])
def test_check_exit_code_says_whether_mine_and_score_accept_the_table(tmp_path, capsys, make, args, code, problems):
    src = make(tmp_path)
    assert main(["check", src, "--json", *args]) == code
    out, err = capsys.readouterr()
    data = json.loads(out)
    assert err == "" and data["rows"] == 24  # every row of the file, valid or not
    assert len(data["problems"]) == len(problems)
    for text, pattern in zip(data["problems"], problems):
        assert re.search(pattern, text), text
    if code == 1 and not args:  # what check calls a problem, mine refuses
        assert main(["mine", src, "--out", str(tmp_path / "t.parquet"), "--quiet"]) == 2


def test_identical_rows_mine_all_semi_hard(tmp_path, capsys):
    src = str(tmp_path / "identical.parquet")
    write_table(src, np.arange(10), np.repeat(np.arange(5), 2), np.ones((10, 4), np.float32))
    out = tmp_path / "t.parquet"
    assert main(["mine", src, "--out", str(out), "--json", "--quiet"]) == 0
    summary = json.loads(capsys.readouterr().out)
    trip = pq.read_table(out).to_pydict()
    # d_ap = d_an = 0 < 0 + margin: semi-hard by the DESIGN.md boundaries, never hard
    assert summary["regimes"]["hard"] == 0 and summary["regimes"]["semi-hard"] == len(trip["anchor"]) > 0
    assert set(trip["regime"]) == {"semi-hard"}
    # every cross-label pair is a suspect duplicate: 45 pairs - 5 same-label pairs = 40
    assert summary["suspect_duplicates"] == 40


def test_identical_rows_score_collapsed_with_eer_one_half(tmp_path, capsys):
    src = tmp_path / "t.parquet"
    write_table(src, np.arange(10), np.repeat(np.arange(5), 2), np.ones((10, 4), np.float32))
    assert main(["score", str(src), "--out", str(tmp_path / "r"), "--json", "--quiet", "--bootstrap", "0"]) == 0
    out, err = capsys.readouterr()
    _warning_lines_only(err)
    report = json.loads(out)
    # every score is 1: at t = 1 FMR = 1 and FNMR = 0, above it FMR = 0 and FNMR = 1, so the
    # curves cross at 0.5, and the ROC is the diagonal (AUC 0.5), hand-computed
    assert report["verification"]["eer"] == pytest.approx(0.5)
    assert report["verification"]["auc"] == pytest.approx(0.5)
    assert report["health"]["collapsed"] is True
    assert (tmp_path / "r" / "report.json").is_file()


@pytest.mark.parametrize("command", ["mine", "score"])
def test_dimension_one_works(tmp_path, capsys, command):
    src = dim1(tmp_path)
    out = tmp_path / ("t.parquet" if command == "mine" else "r")
    assert main([command, src, "--out", str(out), "--quiet", "--json"]) == 0, capsys.readouterr().err
    _warning_lines_only(capsys.readouterr().err)
    assert out.exists()


def _limit_address_space():
    # 8 GiB of address space: a 100,000 x 100,000 float64 matrix (80 GB) fails at once instead
    # of swapping or hanging on a machine with much memory
    resource.setrlimit(resource.RLIMIT_AS, (8 * 2**30, 8 * 2**30))


@pytest.mark.parametrize("command", ["check", "mine", "score"])
def test_huge_dimension_works_or_fails_clearly(tmp_path, command):
    src = good(tmp_path, n=12, d=100_000, identities=4)
    out = tmp_path / ("t.parquet" if command == "mine" else "r")
    argv = [command, src] + ([] if command == "check" else ["--out", str(out), "--quiet", "--bootstrap", "10"]
                             if command == "score" else ["--out", str(out), "--quiet"])
    proc = subprocess.run([sys.executable, "-m", "tripletkit", *argv], capture_output=True, text=True,
                          cwd=tmp_path, timeout=240, preexec_fn=_limit_address_space)
    if command in ("check", "mine") or proc.returncode == 0:
        assert proc.returncode == 0, proc.stderr
        assert command == "check" or out.exists()
    else:
        # a stage that does not fit the address-space limit: one clear line, no output
        assert proc.returncode == 2
        errors = [line for line in proc.stderr.splitlines() if not line.startswith("warning: ")]
        assert len(errors) == 1 and errors[0].startswith("error: ") and "memory" in errors[0]
        assert not out.exists() and not list(tmp_path.glob(".r.tmp-*"))


# ---------------------------------------------------------------------------------------------
# how the command maps failures that are not TripletkitError
# ---------------------------------------------------------------------------------------------
def test_warnings_print_as_one_line_each(tmp_path, capsys):
    src = tmp_path / "t.parquet"
    write_table(src, np.arange(10), np.repeat(np.arange(5), 2), np.ones((10, 4), np.float32))
    assert main(["score", str(src), "--out", str(tmp_path / "r"), "--quiet", "--bootstrap", "0"]) == 0
    err = capsys.readouterr().err
    lines = _warning_lines_only(err)
    assert any("health: the embeddings have no variance" in line for line in lines)
    assert "cli.py" not in err  # not Python's two-line format with the source line


def test_memory_error_is_one_line(tmp_path, capsys, monkeypatch):
    import tripletkit.tables.embeddings as table_module

    def boom(*args, **kwargs):
        raise MemoryError("Unable to allocate 74.5 GiB")

    monkeypatch.setattr(table_module.EmbeddingTable, "read", classmethod(lambda cls, *a, **k: boom()))
    code = main(["score", good(tmp_path), "--out", str(tmp_path / "r"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1
    assert err.startswith("error: out of memory while running score; lower --memory-mb or --block-rows")
    assert not (tmp_path / "r").exists()


def test_os_error_is_one_line(tmp_path, capsys, monkeypatch):
    import tripletkit.mining.run as mining_run

    def full_disk(*args, **kwargs):
        raise OSError(28, "No space left on device", str(tmp_path / "t.parquet"))

    monkeypatch.setattr(mining_run, "mine_table", full_disk)
    code = main(["mine", good(tmp_path), "--out", str(tmp_path / "t.parquet"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1
    assert re.match(r"error: No space left on device \(.*t\.parquet\); check the path, permissions and free space",
                    err)
    assert not (tmp_path / "t.parquet").exists() and not list(tmp_path.glob(".t.parquet.tmp-*"))


def test_internal_error_is_one_line_exit_1_and_debug_shows_it(tmp_path, capsys, monkeypatch):
    import tripletkit.tables.check as table_module

    monkeypatch.setattr(table_module, "check", lambda *a, **k: [][1])
    src = good(tmp_path)
    assert main(["check", src]) == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert err.startswith("error: internal error (IndexError: list index out of range); this is a bug in tripletkit")
    with pytest.raises(IndexError):
        main(["--debug", "check", src])


def test_closed_stdout_pipe_is_not_an_error(tmp_path):
    src = good(tmp_path)
    proc = subprocess.Popen([sys.executable, "-m", "tripletkit", "check", src, "--json"], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, cwd=tmp_path)
    proc.stdout.close()  # like `| head -0`: the reader is gone before the output is printed
    err = proc.stderr.read().decode()
    proc.wait(timeout=60)
    assert "Traceback" not in err and proc.returncode == 0


# ---------------------------------------------------------------------------------------------
# the Python functions guard their inputs as the commands do
# ---------------------------------------------------------------------------------------------
def test_api_mine_never_overwrites_the_table_it_read(tmp_path):
    from tripletkit.mining import mine
    from tripletkit.tables.embeddings import EmbeddingTable

    src = good(tmp_path)
    before = Path(src).read_bytes()
    with pytest.raises(TripletkitError, match="is the input .*; writing there would destroy the input"):
        mine(EmbeddingTable.read(src), out=src, force=True, quiet=True)
    assert Path(src).read_bytes() == before


def test_api_score_never_replaces_a_folder_holding_its_input(tmp_path):
    from tripletkit.config import EvaluationConfig
    from tripletkit.evaluate import score

    (tmp_path / "data").mkdir()
    src = good(tmp_path / "data")
    with pytest.raises(TripletkitError, match="destroy the input"):
        score(src, out=tmp_path / "data", force=True, quiet=True,
              config=EvaluationConfig(bootstrap=0, clustering=False, plots=False))
    assert Path(src).is_file()


def test_effective_dimension_memory_does_not_grow_with_d_squared(rng):
    import tracemalloc

    from tripletkit.metrics.health import effective_dimension

    X = rng.normal(size=(10, 2000)).astype(np.float32)
    tracemalloc.start()
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            value = effective_dimension(X)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    # reference: participation ratio from the eigenvalues of the (n, n) Gram matrix of the
    # centred rows, which has the same non-zero eigenvalues as the (d, d) scatter matrix; ours
    # is computed in integers on a 2**-20 grid (relative to the largest coordinate), hence rel
    Xc = X.astype(np.float64) - X.astype(np.float64).mean(axis=0)
    lam = np.linalg.eigvalsh(Xc @ Xc.T)
    assert value == pytest.approx(lam.sum() ** 2 / (lam**2).sum(), rel=1e-5)
    assert peak < 8 * 2**20  # the (d, d) float64 scatter alone would be 32 MB


def test_mean_impostor_cosine_is_a_cosine(tmp_path):
    from tripletkit.metrics.health import mean_impostor_cosine
    from tripletkit.tables.embeddings import EmbeddingTable

    # ten copies of one vector of six ones: each unit row is 1/sqrt(6) rounded to float32
    t = EmbeddingTable.from_arrays(np.arange(10), np.repeat(np.arange(5), 2), np.ones((10, 6)))
    assert -1.0 <= mean_impostor_cosine(t.embeddings, t.labels) <= 1.0


# ---------------------------------------------------------------------------------------------
# two runs racing for one output: exactly one publishes, the other stops with one line
# ---------------------------------------------------------------------------------------------
def _race_argv(command, tmp):
    if command == "mine":
        return ["mine", good(tmp, n=120, d=8, identities=20), "--out", str(tmp / "out.parquet"), "--quiet"]
    if command == "score":
        return ["score", good(tmp, n=120, d=8, identities=20), "--out", str(tmp / "out"), "--quiet",
                "--bootstrap", "0", "--no-plots", "--no-clustering"]
    return ["sweep", sweep_config()(tmp), "--out", str(tmp / "out"), "--quiet"]


@pytest.mark.parametrize("command", ["mine", "score", "sweep"])
def test_two_runs_racing_for_one_output(tmp_path, command):
    argv = _race_argv(command, tmp_path)
    inputs = _snapshot(tmp_path)
    # started together: both pass the start-of-run check while the other is still importing or
    # computing, or the later one already finds the output; either way exactly one may publish
    procs = [subprocess.Popen([sys.executable, "-m", "tripletkit", *argv], cwd=tmp_path, text=True,
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE) for _ in range(2)]
    results = [(p.wait(timeout=300), *p.communicate()) for p in procs]
    codes = sorted(code for code, _, _ in results)
    assert codes == [0, 2], results
    _, out, err = next(r for r in results if r[0] == 2)
    assert out == "" and err.count("\n") == 1, err
    assert re.match(r"error: output '.*out(\.parquet)?' already exists(: it appeared while this run was writing "
                    r"\(another run with the same output\?\); nothing was written)?, pass --force|"
                    r"error: output '.*out(\.parquet)?' already exists; pass --force", err), err
    published = set(_snapshot(tmp_path)) - set(inputs)
    assert not [p for p in published if Path(p).name.startswith(".")]  # no temporary left by the loser
    if command == "mine":
        assert published == {"out.parquet", "out.duplicates.parquet"}
        assert pq.read_table(tmp_path / "out.parquet").num_rows > 0
    else:
        assert json.loads((tmp_path / "out" / ("report.json" if command == "score" else "sweep.json")).read_text())


def test_demo_refuses_an_output_folder_that_appears_meanwhile(tmp_path, monkeypatch, capsys):
    from tripletkit import scenario

    out = tmp_path / "demo"
    say = scenario.say

    def say_and_race(verb, text, quiet=False):
        say(verb, text, quiet)
        if text.startswith("scoring the held-out"):
            out.mkdir()  # another run's folder, created (empty) while this demo is half way

    monkeypatch.setattr(scenario, "say", say_and_race)
    with pytest.raises(TripletkitError, match=r"^output '.*demo' already exists: it appeared while this run was "
                                              r"writing"):
        scenario.demo(out, quiet=True, sweep=False)
    assert os.listdir(tmp_path) == ["demo"] and os.listdir(out) == []


# ---------------------------------------------------------------------------------------------
# damaged data pages (footer intact): every file the package writes carries page checksums
# ---------------------------------------------------------------------------------------------
def _damage_page(path, row_group=0, column=0):
    """Flip a byte inside the last data page of a column chunk; the footer stays intact."""
    meta = pq.ParquetFile(path).metadata
    chunk = meta.row_group(row_group).column(column)
    start = chunk.dictionary_page_offset if chunk.has_dictionary_page else chunk.data_page_offset
    data = bytearray(Path(path).read_bytes())
    data[start + chunk.total_compressed_size - 2] ^= 0x5A
    Path(path).write_bytes(bytes(data))


def test_damaged_triplet_table_names_file_and_row_group(tmp_path, capsys, monkeypatch):
    from tripletkit.tables import triplets

    monkeypatch.setattr(triplets, "ROW_GROUP_ROWS", 64)  # several row groups from a small table
    src = good(tmp_path, n=60, d=6, identities=10)
    out = tmp_path / "t.parquet"
    assert main(["mine", src, "--out", str(out), "--quiet", "--regimes", "easy", "semi-hard", "hard"]) == 0
    assert pq.ParquetFile(out).metadata.num_row_groups >= 3
    capsys.readouterr()
    assert main(["loss", str(out), src]) == 0
    capsys.readouterr()
    _damage_page(out, row_group=2, column=1)  # the positive ids of the third row group
    before = _snapshot(tmp_path)
    assert main(["loss", str(out), src]) == 2
    captured = capsys.readouterr()
    assert captured.out == "" and captured.err.count("\n") == 1
    assert re.match(r"error: triplet table '.*t\.parquet' is damaged: row group 2 fails its page checksum \(the "
                    r"data changed after it was written\); restore the file from a copy or write it again$",
                    captured.err)
    assert _snapshot(tmp_path) == before


@pytest.mark.parametrize("which", ["embeddings", "duplicates", "demo"])
def test_every_written_parquet_file_carries_page_checksums(tmp_path, which):
    from tripletkit._io import read_parquet

    if which == "embeddings":
        path = Path(good(tmp_path))
    elif which == "duplicates":
        src = tmp_path / "twins.parquet"
        X = _rng(tmp_path).normal(size=(12, 4))
        X[1] = X[0]  # rows 0 and 1 under two labels: one suspect duplicate
        write_table(src, np.arange(12), np.repeat(np.arange(6), 2) + np.r_[0, 1, np.zeros(10, int)], X)
        assert main(["mine", str(src), "--out", str(tmp_path / "t.parquet"), "--quiet"]) == 0
        path = tmp_path / "t.duplicates.parquet"
        assert pq.read_table(path).num_rows >= 1
    else:
        from tripletkit.scenario import generate

        path = Path(generate(tmp_path / "demo", seed=7)["heldout_embeddings"])
    _damage_page(path, column=0)
    with pytest.raises(TripletkitError, match=r"is damaged: row group 0 fails its page checksum"):
        read_parquet(path, "table")


def test_raw_vectors_beyond_float32_range_name_the_real_problem(rng):
    from tripletkit.metrics.health import mean_impostor_cosine

    X = rng.normal(size=(10, 4))
    X[[3, 8]] *= 1e300  # finite in float64, Inf once cast to float32
    with pytest.raises(TripletkitError, match=r"^embeddings has 2 rows with values outside float32's range \(about "
                                              r"1\.2e-38 to 3\.4e38 in absolute value; first row positions: \[3, 8\]\); "
                                              r"divide the rows by their norms \(in float64\) first$"):
        mean_impostor_cosine(X, np.repeat(np.arange(5), 2))
