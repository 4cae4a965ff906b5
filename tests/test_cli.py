"""The command line: inspect and init on the demo data, compare's errors."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import yaml

from panelpipe.cli import main
from panelpipe.config import REPO_ROOT, validate_config

HISTORY = REPO_ROOT / "config" / "demo" / "regional_jobs_2011_2024.csv"


def test_inspect_finds_unit_and_period_of_the_demo(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["inspect", str(HISTORY), "--json"]) == 0
    profile = json.loads(capsys.readouterr().out)
    assert profile["rows"] == 554
    assert profile["unit_candidates"][0] == "region"
    assert profile["period_candidates"] == ["year"]
    assert profile["panel"]["units"] == 40 and profile["panel"]["periods"] == 14
    assert profile["panel"]["gaps"] == 6 and profile["panel"]["duplicate_keys"] == 0
    assert main(["inspect", str(HISTORY)]) == 0
    assert "as a panel of region × year: 40 units, 14 periods" in capsys.readouterr().out


def test_inspect_reports_a_missing_file(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["inspect", "nowhere.csv"]) == 2
    assert "nowhere.csv: no such file" in capsys.readouterr().err


def test_init_writes_a_valid_config_and_never_overwrites(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "jobs.yaml"
    args = [
        "init",
        str(HISTORY),
        "--unit",
        "region",
        "--period",
        "year",
        "--outcome",
        "youth_employment",
        "-o",
        str(out),
    ]
    assert main(args) == 0
    config = yaml.safe_load(out.read_text())
    validate_config(config)
    analysis = next(iter(config["analyses"].values()))
    assert analysis["regressors"] == [
        "subsidy_rate",
        "broadband_share",
        "log_median_wage",
        "coastal",
    ]
    before = out.read_bytes()
    assert main(args) == 2
    assert "already exists" in capsys.readouterr().err
    assert out.read_bytes() == before


def test_init_rejects_an_unknown_column(capsys: pytest.CaptureFixture[str]) -> None:
    assert (
        main(["init", str(HISTORY), "--unit", "region", "--period", "year", "--outcome", "jobs"])
        == 2
    )
    assert "column 'jobs' not found" in capsys.readouterr().err


def test_compare_rejects_a_folder_that_is_not_a_run(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["compare", str(tmp_path), str(tmp_path)]) == 2
    assert "not a completed run folder" in capsys.readouterr().err


def test_check_passes_on_the_demo(
    capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.chdir(REPO_ROOT)
    assert main(["check"]) == 0
    assert "regional_jobs: validation pass" in capsys.readouterr().out


@pytest.mark.parametrize(
    ("stem", "expected"),
    [
        ("Données régionales ÉTÉ", "donnees_regionales_ete"),
        ("数据", "panel"),
        ("ß-Straße_2024", "ss-strasse_2024"),
        ("x" * 300, "x" * 64),
        ("__Jobs--2024__", "jobs--2024"),
        ("jobs[2024]", "jobs_2024"),
        ("²³ ⅷ", "23_viii"),
    ],
    ids=["accents", "no-latin", "sharp-s", "long", "edges", "glob-chars", "compatibility"],
)
def test_init_on_any_file_name_writes_a_config_that_loads(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, stem: str, expected: str
) -> None:
    from _support import HOSTILE_HEADER, hostile_rows
    from panelpipe.config import load_config, resolve_sources

    monkeypatch.chdir(tmp_path)
    data = tmp_path / f"{stem[:200]}.csv"
    data.write_text(HOSTILE_HEADER + hostile_rows(), encoding="utf-8")
    out = tmp_path / "c.yaml"
    args = ["init", data.name, "--unit", "region", "--period", "year", "--outcome", "jobs"]
    assert main([*args, "--regressors", "grant", "-o", str(out)]) == 0
    config = load_config(out)
    assert list(config["analyses"]) == [expected]
    assert resolve_sources(config["analyses"][expected]["sources"], analysis="a") == [
        Path(data.name)
    ]


def test_demo_refuses_a_year_it_cannot_write(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from panelpipe.demo import main as demo_main

    with pytest.raises(SystemExit) as stop:
        demo_main([str(tmp_path), "--year", "2026"])
    assert stop.value.code == 2
    err = capsys.readouterr().err
    assert "--year 2026: the simulation has the years 2011 to 2025" in err
    assert list(tmp_path.iterdir()) == []
    with pytest.raises(SystemExit) as stop:
        demo_main([str(tmp_path), "--history"])
    assert stop.value.code == 2
    assert "--history needs --year" in capsys.readouterr().err


def test_demo_year_error_through_the_command_line(tmp_path: Path) -> None:
    import subprocess
    import sys

    done = subprocess.run(
        [sys.executable, "-m", "panelpipe.demo", "deliveries", "--year", "2026"],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert done.returncode == 2
    assert "Traceback" not in done.stderr
    assert "the simulation has the years 2011 to 2025" in done.stderr
    assert not (tmp_path / "deliveries").exists()
