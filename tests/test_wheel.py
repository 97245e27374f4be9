"""The release: the package builds as a wheel, installs into a fresh virtual environment and runs
``tripletkit demo`` from a folder outside the repository; ``tripletkit --version`` prints the
version of pyproject.toml.

The wheel is built without build isolation (``python -m build --wheel --no-isolation``, with the
``build``, ``setuptools`` and ``wheel`` of the test extra) from a copy of the files a wheel is made
of, so the repository gets no build/ or egg-info debris. The fresh environment gets the wheel
with ``--no-deps``; its dependencies (numpy, faiss, ...) are made visible by a ``.pth`` file
naming this interpreter's site-packages, so nothing is downloaded. The editable install of the
repository in that site-packages is not active there (its hook is a .pth file of that folder,
and .pth files are only read in the environment's own site folders), which the test checks.
"""

import json
import os
import shutil
import subprocess
import sys
import sysconfig
import tomllib
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
VERSION = tomllib.loads((REPO / "pyproject.toml").read_text())["project"]["version"]


def _env():
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME", "VIRTUAL_ENV")}
    env["PYTHONNOUSERSITE"] = "1"
    return env


def _run(argv, cwd, timeout=600):
    proc = subprocess.run([str(a) for a in argv], cwd=cwd, env=_env(), capture_output=True, text=True,
                          timeout=timeout)
    assert proc.returncode == 0, f"{argv}\n{proc.stdout[-2000:]}\n{proc.stderr[-4000:]}"
    return proc


@pytest.fixture(scope="module")
def installed(tmp_path_factory):
    """(python, tripletkit script) of a fresh venv with the freshly built wheel installed."""
    root = tmp_path_factory.mktemp("release")
    src = root / "src"
    src.mkdir()
    for name in ("pyproject.toml", "README.md"):
        shutil.copy2(REPO / name, src / name)
    shutil.copytree(REPO / "tripletkit", src / "tripletkit", ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
    dist = root / "dist"
    _run([sys.executable, "-m", "build", "--wheel", "--no-isolation", "--outdir", dist, src], cwd=root)
    wheels = sorted(dist.glob("tripletkit-*.whl"))
    assert [w.name for w in wheels] == [f"tripletkit-{VERSION}-py3-none-any.whl"]

    venv = root / "venv"
    _run([sys.executable, "-m", "venv", venv], cwd=root)
    python = venv / "bin" / "python"
    _run([python, "-m", "pip", "install", "--no-deps", "--no-index", "-q", wheels[0]], cwd=root)
    site = _run([python, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"], cwd=root).stdout.strip()
    ours = {sysconfig.get_paths()["purelib"], sysconfig.get_paths()["platlib"]}
    (Path(site) / "tripletkit_test_dependencies.pth").write_text("\n".join(sorted(ours)) + "\n")
    return python, venv / "bin" / "tripletkit", root


@pytest.mark.slow
def test_wheel_installs_the_package_not_the_repository(installed, tmp_path):
    python, _, root = installed
    where = _run([python, "-c", "import tripletkit, numpy, faiss, pyarrow; print(tripletkit.__file__)"],
                 cwd=tmp_path).stdout.strip()
    assert where.startswith(str(root / "venv")), where
    assert not where.startswith(str(REPO))


@pytest.mark.slow
def test_version_matches_pyproject(installed, tmp_path):
    python, script, _ = installed
    assert _run([script, "--version"], cwd=tmp_path).stdout.strip() == f"tripletkit {VERSION}"
    assert _run([python, "-m", "tripletkit", "--version"], cwd=tmp_path).stdout.strip() == f"tripletkit {VERSION}"


@pytest.mark.slow
def test_demo_runs_from_outside_the_repository(installed, tmp_path):
    _, script, _ = installed
    proc = _run([script, "demo", "--out", "seal-demo", "--quiet"], cwd=tmp_path)
    out = tmp_path / "seal-demo"
    # the tables were regenerated into the output folder (no demo_data/ beside the installed package)
    for name in ("train_embeddings", "heldout_embeddings", "train_features", "heldout_features"):
        assert (out / "data" / f"{name}.parquet").is_file()
    for rel in ("check.json", "triplets.parquet", "triplets.duplicates.parquet", "loss.json", "demo.json",
                "score/report.json", "score/report.md", "score/roc_det.png", "sweep/sweep.json", "sweep/sweep.md"):
        assert (out / rel).is_file(), rel
    assert sorted(p.name for p in tmp_path.iterdir()) == ["seal-demo"]  # nothing else, no temporary folder
    # the sweep names the config where it is now, not the temporary folder it was written in
    recorded = json.loads((out / "sweep" / "sweep.json").read_text())["config"]
    assert (tmp_path / recorded).is_file() and ".tmp-" not in recorded
    assert "error" not in proc.stderr.lower()
