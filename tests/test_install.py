"""A non-editable install runs an analysis from any directory.

The project is built into a wheel from a copy of its sources (so the repository
is never written to), installed without dependencies into a fresh virtual
environment whose only other packages are this test environment's (a ``.pth``
file lists its site-packages), and `panelpipe run --config` is called from a
folder that holds nothing but the configuration and the data.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
import sysconfig
from pathlib import Path

import pytest

from _support import HOSTILE_HEADER, hostile_analysis, hostile_rows, write_hostile_config
from panelpipe.config import REPO_ROOT

pytestmark = pytest.mark.slow

SOURCES = ("pyproject.toml", "setup.py", "MANIFEST.in", "README.md", "Snakefile", "workflow")


def _call(*cmd: str | Path, cwd: Path) -> subprocess.CompletedProcess[str]:
    done = subprocess.run(
        [str(c) for c in cmd], cwd=cwd, text=True, capture_output=True, timeout=600
    )
    assert done.returncode == 0, f"{cmd}\n{done.stdout[-3000:]}\n{done.stderr[-3000:]}"
    return done


@pytest.fixture(scope="module")
def installed(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The python of a fresh virtual environment with panelpipe installed from a wheel."""
    base = tmp_path_factory.mktemp("install")
    source = base / "source"
    source.mkdir()
    for name in SOURCES:
        src = REPO_ROOT / name
        if src.is_dir():
            ignore = shutil.ignore_patterns("__pycache__", "*.egg-info", "_workflow")
            shutil.copytree(src, source / name, ignore=ignore)
        else:
            shutil.copy2(src, source / name)
    # Offline: the build uses this environment's setuptools (the test extra pins one
    # that builds wheels by itself).
    _call(
        sys.executable,
        "-m",
        "pip",
        "wheel",
        "--no-deps",
        "--no-build-isolation",
        "--wheel-dir",
        base / "wheels",
        source,
        cwd=base,
    )
    (wheel,) = (base / "wheels").glob("panelpipe-*.whl")
    venv = base / "venv"
    _call(sys.executable, "-m", "venv", "--without-pip", venv, cwd=base)
    python = venv / "bin" / "python"
    site = _call(
        python, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])", cwd=base
    ).stdout.strip()
    # The dependencies come from this environment, after the new one's own packages.
    Path(site, "_dependencies.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    _call(
        sys.executable,
        "-m",
        "pip",
        "--python",
        python,
        "install",
        "--no-deps",
        "--no-index",
        wheel,
        cwd=base,
    )
    return python


def test_the_installed_package_carries_its_workflow(installed: Path, tmp_path: Path) -> None:
    where = _call(
        installed,
        "-c",
        "import panelpipe.config as c; print(c.__file__); print(c.WORKFLOW_ROOT)",
        cwd=tmp_path,
    ).stdout.split()
    package, workflow = Path(where[0]), Path(where[1])
    assert installed.parent.parent in package.parents, "imported from the repository"
    assert REPO_ROOT not in workflow.parents
    assert (workflow / "Snakefile").is_file()
    assert (workflow / "workflow" / "schemas" / "config.schema.yaml").is_file()


def test_an_analysis_runs_from_another_directory(installed: Path, tmp_path: Path) -> None:
    project = tmp_path / "elsewhere"
    project.mkdir()
    (project / "a.csv").write_text(HOSTILE_HEADER + hostile_rows(), encoding="utf-8")
    config = write_hostile_config(project, hostile_analysis())
    # Started outside the repository; relative paths in the config resolve against
    # the folder the run starts from.
    done = subprocess.run(
        [str(installed), "-m", "panelpipe", "run", "--config", str(config), "--cores", "1"],
        cwd=project,
        text=True,
        capture_output=True,
        timeout=600,
    )
    assert done.returncode == 0, done.stderr[-4000:]
    assert "Traceback" not in done.stderr
    runs = list((project / "out" / "t").glob("*/results.json"))
    assert len(runs) == 1
    results = json.loads(runs[0].read_text(encoding="utf-8"))
    assert set(results["models"]) == {"pooled_ols", "fixed_effects"}
    assert (runs[0].parent / "report.html").is_file()
    assert not (REPO_ROOT / "out").exists()
