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


# ---------------------------------------------------------------------------------------------
# NaN and infinity: refused for every float key, naming the file, the section and the key
# ---------------------------------------------------------------------------------------------
def _float_keys():
    """(section, key, is_list) for every float field of every section, from the dataclasses."""
    import dataclasses
    import typing

    from tripletkit.config import _SECTIONS, SweepRun, unwrap_optional

    out = []
    for section, cls in list(_SECTIONS.items()) + [("sweep.runs", SweepRun)]:
        hints = typing.get_type_hints(cls)
        for f in dataclasses.fields(cls):
            tp, _ = unwrap_optional(hints[f.name])
            if tp is float:
                out.append((section, f.name, False))
            elif typing.get_origin(tp) is tuple and typing.get_args(tp)[0] is float:
                out.append((section, f.name, True))
    return out


FLOAT_KEYS = _float_keys()


def test_the_float_keys_are_all_found():
    found = {(s, k) for s, k, _ in FLOAT_KEYS}
    assert {("mining", "margin"), ("mining", "duplicate_cosine"), ("mining", "weighted_cutoff"),
            ("evaluation", "fmr"), ("evaluation", "confidence"), ("sweep", "margins"), ("sweep", "confidence"),
            ("head", "learning_rate"), ("head", "momentum"), ("sweep.runs", "margin")} <= found


@pytest.mark.parametrize("value", ["nan", "inf", "-inf", "+inf"])
@pytest.mark.parametrize("section, key, is_list", FLOAT_KEYS, ids=[f"{s}.{k}" for s, k, _ in FLOAT_KEYS])
def test_nan_and_infinity_are_refused_naming_file_section_and_key(tmp_path, section, key, is_list, value):
    if section == "sweep.runs":
        text = f'[sweep]\nmode = "checkpoints"\n[[sweep.runs]]\nheldout = "h.parquet"\n{key} = {value}\n'
        where = r"\[sweep\]\.runs\[0\]\." + key
    else:
        text = f"[{section}]\n{key} = " + (f"[{value}]" if is_list else value) + "\n"
        where = rf"\[{section}\]\.{key}" + (r"\[0\]" if is_list else "")
    with pytest.raises(TripletkitError, match=rf"^.*c\.toml {where} must be a finite number, got {value.lstrip('+')}$"):
        load_config(_cfg(tmp_path, text))


@pytest.mark.parametrize("key, value", [("margin", float("nan")), ("duplicate_cosine", float("inf")),
                                        ("weighted_cutoff", float("nan")), ("margin", 10**400)])
def test_nan_and_infinity_are_refused_as_options(key, value):
    with pytest.raises(TripletkitError, match=rf"^--{key.replace('_', '-')} must be a finite number"):
        override(MiningConfig(), **{key: value})


def test_a_section_built_in_python_is_checked_too():
    with pytest.raises(TripletkitError, match=r"^MiningConfig\.margin must be a finite number, got nan$"):
        override(MiningConfig(margin=float("nan")))
    with pytest.raises(TripletkitError, match=r"^MiningConfig\.margin = 4\.5 cannot be reached"):
        override(MiningConfig(margin=4.5))


# ---------------------------------------------------------------------------------------------
# a margin that no distance between unit vectors can reach
# ---------------------------------------------------------------------------------------------
# ||a - b||^2 = 2 - 2 cos(a, b) lies in [0, 4] for unit vectors, ||a - b|| in [0, 2] (cos in [-1, 1]).
@pytest.mark.parametrize("distance, top", [("squared", 4), ("euclidean", 2)])
def test_margin_must_be_below_the_largest_distance(tmp_path, distance, top):
    ok = load_config(_cfg(tmp_path, f'[mining]\ndistance = "{distance}"\nmargin = {top - 0.01}\n'))
    assert ok.mining.margin == top - 0.01
    for margin in (top, top + 1.5):
        with pytest.raises(TripletkitError, match=rf"c\.toml \[mining\]\.margin = {float(margin)} cannot be reached "
                                                  rf"with distance = {distance}: distances between unit vectors lie "
                                                  rf"in \[0, {top}\], so the margin must lie in \(0, {top}\)$"):
            load_config(_cfg(tmp_path, f'[mining]\ndistance = "{distance}"\nmargin = {margin}\n'))


def test_margin_range_follows_an_overridden_distance():
    c = override(MiningConfig(), margin=3.0)  # fine for the squared distance
    with pytest.raises(TripletkitError, match=r"^margin = 3\.0 cannot be reached with distance = euclidean: .*"
                                              r"must lie in \(0, 2\)$"):
        override(c, distance="euclidean")
    with pytest.raises(TripletkitError, match=r"^--margin = 2\.5 cannot be reached with distance = euclidean"):
        override(MiningConfig(), margin=2.5, distance="euclidean")


@pytest.mark.parametrize("text, match", [
    ("[sweep]\nmargins = [0.1, 4.5]\n", r"c\.toml \[sweep\]\.margins\[1\] = 4\.5 cannot be reached with distance = "
                                        r"squared"),
    ('[mining]\ndistance = "euclidean"\n[sweep]\nmode = "checkpoints"\n[[sweep.runs]]\nmargin = 2.0\n'
     'heldout = "h.parquet"\n', r"c\.toml \[sweep\]\.runs\[0\]\.margin = 2\.0 cannot be reached with distance = "
                                r"euclidean"),
])
def test_sweep_margins_must_be_reachable(tmp_path, text, match):
    with pytest.raises(TripletkitError, match=match):
        load_config(_cfg(tmp_path, text))
