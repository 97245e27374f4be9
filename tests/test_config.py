"""TOML configs: sections, types, ranges, unknown keys, relative paths, overrides."""

import pytest

from tripletkit import TripletkitError
from tripletkit.config import MiningConfig, load_config, override


def _cfg(tmp_path, text):
    p = tmp_path / "c.toml"
    p.write_text(text)
    return p


def test_defaults_and_values(tmp_path):
    c = load_config(_cfg(tmp_path, '[mining]\nmargin = 0.3\nregimes = ["hard"]\nseed = 7\n'))
    assert c.mining.margin == 0.3 and c.mining.regimes == ("hard",) and c.mining.seed == 7
    assert c.mining.distance == "squared" and c.evaluation.fmr == (0.0001, 0.001, 0.01)


def test_relative_paths_are_taken_from_the_config_folder(tmp_path):
    c = load_config(_cfg(tmp_path, '[data]\ntrain = "t.parquet"\nheldout = "/abs/h.parquet"\n'))
    assert c.data.train == str(tmp_path / "t.parquet") and c.data.heldout == "/abs/h.parquet"


@pytest.mark.parametrize("text, match", [
    ("[mining]\nmargn = 0.2\n", r"\[mining\]: unknown key 'margn'; known keys: margin"),
    ("[minning]\n", r"unknown section \[minning\]"),
    ("[mining]\nmargin = 0\n", r"\[mining\]\.margin must be > 0\.0, got 0\.0"),
    ("[mining]\nmargin = -0.1\n", r"\[mining\]\.margin must be > 0\.0"),
    ('[mining]\nmargin = "big"\n', r"\[mining\]\.margin must be a number, got 'big'"),
    ('[mining]\nregimes = ["semihard"]\n', r"regimes\[0\] must be one of easy, semi-hard, hard; got 'semihard'"),
    ('[mining]\nregimes = []\n', r"regimes must not be empty"),
    ('[mining]\nregimes = ["hard", "hard"]\n', r"repeated values"),
    ('[mining]\nselect = "hardest-first"\n', r"select must be one of hardest, random, distance-weighted"),
    ("[mining]\npositives_per_anchor = 1.5\n", r"positives_per_anchor must be a whole number"),
    ("[mining]\nexclude_duplicates = 1\n", r"exclude_duplicates must be a true/false"),
    ("[evaluation]\nfmr = [0.001, 2.0]\n", r"fmr\[1\] must be <= 1\.0"),
    ('[sweep]\nmode = "checkpoints"\n[[sweep.runs]]\nmargin = 0.1\n', r"runs\[0\]: key 'heldout' is required"),
    ("[mining\nmargin = 1\n", r"is not valid TOML"),
])
def test_errors_name_the_key(tmp_path, text, match):
    with pytest.raises(TripletkitError, match=match):
        load_config(_cfg(tmp_path, text))


def test_missing_config_file(tmp_path):
    with pytest.raises(TripletkitError, match="does not exist"):
        load_config(tmp_path / "none.toml")


def test_override_validates_and_ignores_none():
    c = override(MiningConfig(), margin=0.5, regimes=["easy"], seed=None)
    assert c.margin == 0.5 and c.regimes == ("easy",) and c.seed == 0
    with pytest.raises(TripletkitError, match="--margin must be > 0.0"):
        override(MiningConfig(), margin=0.0)
    with pytest.raises(TripletkitError, match="unknown option 'margn'"):
        override(MiningConfig(), margn=0.1)
