"""The command line: one-line errors with exit code 2, JSON output, options from configs."""

import json
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tripletkit.cli import build_parser, main
from tripletkit.tables.embeddings import write_table


@pytest.fixture
def small_table(tmp_path, rng):
    emb = rng.normal(size=(12, 4)).astype(np.float32)
    labels = np.repeat(np.arange(4), 3)
    path = tmp_path / "t.parquet"
    write_table(path, np.arange(12), labels, emb)
    return path


def _run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_check_json_keys(capsys, small_table):
    code, out, err = _run(capsys, "check", str(small_table), "--json")
    assert code == 0 and err == ""
    data = json.loads(out)
    for key in ("rows", "dim", "identities", "singletons", "invalid_rows", "unit_norm"):
        assert key in data
    assert data["rows"] == 12 and data["dim"] == 4 and data["identities"] == 4


def test_bad_input_is_one_line_and_exit_2(capsys, tmp_path):
    code, out, err = _run(capsys, "check", str(tmp_path / "missing.parquet"))
    assert code == 2 and out == ""
    assert err.count("\n") == 1 and err.startswith("error: embedding table") and "does not exist" in err


def test_usage_error_is_one_line_and_exit_2(capsys):
    with pytest.raises(SystemExit) as info:
        main(["mine"])
    assert info.value.code == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "required" in err


def test_loss_command(capsys, tmp_path, small_table):
    # Triplet 0: anchor 0, positive 1 (label 0), negative 3 (label 1); hand-built table of ids.
    trip = pa.table({"anchor": [0, 4], "positive": [1, 5], "negative": [3, 0]})
    pq.write_table(trip, tmp_path / "trip.parquet")
    code, out, err = _run(capsys, "loss", str(tmp_path / "trip.parquet"), str(small_table), "--json")
    assert code == 0, err
    data = json.loads(out)
    assert data["triplets"] == 2 and sum(data["regimes"].values()) == 2
    assert data["mean_loss"] >= 0 and 0 <= data["active_fraction"] <= 1


def test_loss_command_rejects_unknown_ids(capsys, tmp_path, small_table):
    pq.write_table(pa.table({"anchor": [0], "positive": [1], "negative": [99]}), tmp_path / "trip.parquet")
    code, _, err = _run(capsys, "loss", str(tmp_path / "trip.parquet"), str(small_table))
    assert code == 2 and "99" in err and err.count("\n") == 1


def test_options_are_generated_from_config_fields():
    from tripletkit.config import MiningConfig

    args = build_parser().parse_args(["mine", "t.parquet", "--out", "o.parquet", "--margin", "0.3",
                                      "--regimes", "hard", "easy", "--exclude-duplicates"])
    assert args.cfg_MiningConfig_margin == 0.3
    assert args.cfg_MiningConfig_regimes == ["hard", "easy"]
    assert args.cfg_MiningConfig_exclude_duplicates is True
    assert args.cfg_MiningConfig_seed is None  # unset options leave the config value alone
    assert MiningConfig().seed == 0


def test_python_dash_m_and_version():
    out = subprocess.run([sys.executable, "-m", "tripletkit", "--version"], capture_output=True, text=True)
    assert out.returncode == 0 and out.stdout.startswith("tripletkit ")


def test_package_exports_the_verbs_as_functions():
    import importlib

    import tripletkit

    importlib.import_module("tripletkit.sweeps")  # importing the submodule must not shadow the verb
    for name in ("check", "mine", "score", "sweep", "demo", "loss"):
        assert callable(getattr(tripletkit, name)) and not isinstance(getattr(tripletkit, name), type(tripletkit))


def test_starting_the_command_imports_nothing_heavy():
    # numpy, pyarrow and faiss load inside the command's Ctrl-C handling (tripletkit/__main__.py),
    # so importing the package and the parser must not load them
    code = ("import sys, tripletkit, tripletkit.cli, tripletkit.__main__\n"
            "tripletkit.cli.build_parser()\n"
            "print(sorted(m for m in ('numpy', 'pyarrow', 'faiss', 'sklearn', 'matplotlib') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_console_script_entry_point_is_the_interrupt_safe_one():
    import tomllib
    from pathlib import Path

    project = tomllib.loads((Path(__file__).resolve().parents[1] / "pyproject.toml").read_text())["project"]
    assert project["scripts"]["tripletkit"] == "tripletkit.__main__:main"


def test_help_gives_one_default_per_option_and_lists_choices():
    # every option of every command: at most one "(default:" in its help; every option whose
    # config field has choices lets argparse check them and shows them
    import dataclasses

    from tripletkit.cli import build_parser
    from tripletkit.config import ComputeConfig, EvaluationConfig, MiningConfig

    parser = build_parser()
    commands = parser._subparsers._group_actions[0].choices  # argparse keeps them here
    seen = 0
    for name, sub in commands.items():
        for action in sub._actions:
            assert (action.help or "").count("(default:") <= 1, (name, action.option_strings, action.help)
            seen += 1
    fields = {f.name: f for cls in (MiningConfig, EvaluationConfig, ComputeConfig) for f in dataclasses.fields(cls)}
    for name in ("mine", "score"):
        for action in commands[name]._actions:
            key = action.dest.split("_", 2)[-1] if action.dest.startswith("cfg_") else None
            field = fields.get(key)
            if field is not None and (field.metadata.get("choices") or field.metadata.get("each")):
                listed = field.metadata.get("choices") or field.metadata.get("each")
                assert tuple(action.choices) == tuple(listed), key
                assert ", ".join(listed) in action.help
    assert seen > 50
    assert "(default: none)" in commands["mine"].format_help() and "(default: no cap)" not in commands["mine"].format_help()


def test_errors_name_the_python_parameter_in_python_and_the_flag_on_the_command_line(tmp_path, capsys):
    # One error, two audiences (issue 15): a Python caller reads the parameter it would pass,
    # a shell user the flag. A NaN row is refused until invalid rows are dropped.
    import tripletkit
    from tripletkit import TripletkitError

    x = np.eye(4, dtype=np.float32)
    x[2] = np.nan
    path = tmp_path / "nan.parquet"
    write_table(path, np.arange(4), np.array([0, 0, 1, 1]), x)
    with pytest.raises(TripletkitError, match=r"fix them or pass drop_invalid=True$"):
        tripletkit.score(path)
    assert main(["score", str(path), "--out", str(tmp_path / "rep")]) == 2
    err = capsys.readouterr().err
    assert err.endswith("fix them or pass --drop-invalid\n") and "drop_invalid" not in err
    # an existing output: force=True in Python, --force on the command line
    (tmp_path / "rep").mkdir()
    with pytest.raises(TripletkitError, match=r"already exists; pass force=True to replace it$"):
        tripletkit.score(path, tmp_path / "rep", table_options={"drop_invalid": True})
    assert main(["score", str(path), "--out", str(tmp_path / "rep"), "--drop-invalid"]) == 2
    assert capsys.readouterr().err.endswith("already exists; pass --force to replace it\n")


def test_parameter_names_are_turned_into_the_commands_flags():
    from tripletkit.cli import as_flags

    parser = build_parser()
    assert as_flags("pass index='exact' or run without scheduler=...", parser) == \
        "pass --index exact or run without --scheduler"
    assert as_flags("lower memory_mb=... or block_rows=..., or pass threads=0", parser) == \
        "lower --memory-mb or --block-rows, or pass --threads 0"
    # a path keeps its quotes (it may hold spaces); a word loses them
    assert as_flags("out='my runs/t.parquet' is the input; choose another out=...", parser) == \
        "--out 'my runs/t.parquet' is the input; choose another --out"
    # names that are not options of any command are left as they are
    assert as_flags("pair 3 is marked same=True", parser) == "pair 3 is marked same=True"
