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


# ---------------------------------------------------------------- text that must stay true


def test_the_code_cites_only_documents_of_the_repository() -> None:
    """A ``.md`` file named in the workflow exists here, or is one a run writes."""
    import re

    written = {
        name
        for smk in (REPO_ROOT / "workflow" / "rules").glob("*.smk")
        for name in re.findall(r'"([\w.-]+\.md)"', smk.read_text(encoding="utf-8"))
    }
    cited = {
        (path.relative_to(REPO_ROOT).as_posix(), name)
        for path in [*(REPO_ROOT / "workflow").rglob("*"), REPO_ROOT / "Snakefile"]
        if path.is_file()
        and path.suffix in {".py", ".smk", ".yaml", ".j2", ""}
        and "egg-info" not in path.as_posix()
        for name in re.findall(r"[\w./-]+\.md\b", path.read_text(encoding="utf-8"))
    }
    missing = [
        (f, n) for f, n in sorted(cited) if n not in written and not (REPO_ROOT / n).is_file()
    ]
    assert not missing, missing


def test_the_schema_describes_the_period_forms_that_are_read() -> None:
    """periods.py reads whole numbers, dates, year-quarter and year-month text."""
    import yaml

    schema = yaml.safe_load((REPO_ROOT / "workflow/schemas/config.schema.yaml").read_text())
    text = schema["definitions"]["analysis"]["properties"]["period"]["description"]
    assert "integer years" not in text
    for form in ("whole numbers", "dates", "quarter", "month"):
        assert form in text, (form, text)


def test_the_guide_names_every_module_that_reads_or_writes_files() -> None:
    """DEVELOPERS.md's rule on where files are read and written holds for the package."""
    import re

    io = re.compile(
        r"open\(|read_text\(|write_text\(|read_bytes\(|write_bytes\(|read_parquet\(|"
        r"read_csv\(|to_parquet\(|to_csv\(|os\.replace\(|\.unlink\(|mkdir\("
    )
    doing = {
        p.name
        for p in (REPO_ROOT / "workflow" / "panelpipe").glob("*.py")
        if io.search(p.read_text())
    }
    guide = (REPO_ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    rule = re.search(r"files are read and written only[^\n]*(?:\n  [^\n-][^\n]*)*", guide)
    assert rule, "DEVELOPERS.md states where files are read and written"
    named = set(re.findall(r"`(\w+\.py)`", rule.group(0)))
    assert doing <= named, sorted(doing - named)
