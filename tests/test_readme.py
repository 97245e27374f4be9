"""The README's setup commands are the ones CI runs, and the README states what it must."""

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _code_blocks(text):
    return re.findall(r"```\n(.*?)\n```", text, flags=re.S)


def test_ci_runs_the_readme_test_command():
    readme = (ROOT / "README.md").read_text()
    setup = readme.split("## Setup on a fresh machine", 1)[1].split("\n## ", 1)[0]
    blocks = _code_blocks(setup)
    assert len(blocks) == 2, "the setup section must hold exactly two commands"
    demo, tests = (b.strip() for b in blocks)
    assert "tripletkit demo" in demo and "pytest" in tests
    ci = (ROOT / ".ci" / "run").read_text().splitlines()
    assert tests in [line.strip() for line in ci], "CI must run the README's test command verbatim"


def test_readme_opens_with_the_job_and_carries_the_caution():
    readme = (ROOT / "README.md").read_text()
    first_paragraph = readme.split("\n\n")[1]
    for word in ("triplet", "epoch", "held-out", "margin", "CPU"):
        assert word in first_paragraph
    caution = readme.split("## Caution", 1)[1]
    assert "subgroup" in caution and "local law" in caution
