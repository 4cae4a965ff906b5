"""Code checks that CI runs with the tests: ruff, mypy, snakefmt and snakemake --lint."""

from __future__ import annotations

import shutil
import subprocess
import sys

import pytest

from panelpipe.config import REPO_ROOT


def _run(*cmd: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(cmd, cwd=REPO_ROOT, text=True, capture_output=True, timeout=600)


@pytest.mark.parametrize(
    "cmd",
    [
        (sys.executable, "-m", "ruff", "check", "."),
        (sys.executable, "-m", "ruff", "format", "--check", "."),
        (sys.executable, "-m", "mypy", "workflow/panelpipe"),
        ("snakefmt", "--check", "Snakefile", "workflow/rules"),
    ],
    ids=["ruff-check", "ruff-format", "mypy", "snakefmt"],
)
def test_code_checks_are_clean(cmd: tuple[str, ...]) -> None:
    if cmd[0] == "snakefmt" and shutil.which("snakefmt") is None:
        pytest.skip("snakefmt is not installed (pip install -e '.[test]')")
    result = _run(*cmd)
    assert result.returncode == 0, result.stdout[-4000:] + result.stderr[-4000:]


def test_snakemake_lint_has_only_the_explained_warning() -> None:
    """The one lint left asks for a conda environment per rule.

    Every rule runs the project's own package, installed in the environment that
    runs Snakemake (README), so a per-rule environment would duplicate it.
    """
    result = _run(sys.executable, "-m", "snakemake", "--lint", "--cores", "1")
    text = result.stdout + result.stderr
    lints = [line.strip() for line in text.splitlines() if line.strip().startswith("* ")]
    assert lints, text[-2000:]
    assert all("conda environment or container" in line for line in lints), lints
