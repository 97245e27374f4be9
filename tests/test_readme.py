"""The README's Python session runs as written, on the bundled demo tables."""

import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def _python_blocks(section):
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    body = text.split(f"## {section}\n", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```python\n(.*?)```", body, flags=re.S)


def test_the_python_session_runs_on_the_demo_tables(tmp_path, monkeypatch, capsys):
    pytest.importorskip("pandas")
    blocks = _python_blocks("From Python")
    assert len(blocks) == 1
    code = blocks[0].replace('"demo_data/', f'"{ROOT / "demo_data"}/')
    monkeypatch.chdir(tmp_path)
    namespace = {}
    exec(compile(code, "README.md", "exec"), namespace)
    # it scored the held-out table and printed the headline, and mined a triplet file it streamed
    assert re.fullmatch(r"EER \d+\.\d\d%, Recall@1 \d+\.\d\d%\n", capsys.readouterr().out)
    assert 0 < namespace["report"]["verification"]["eer"] < 0.5
    assert (tmp_path / "triplets.parquet").exists()
    assert namespace["anchor"].dtype.kind == "i"
