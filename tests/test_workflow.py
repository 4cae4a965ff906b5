"""End to end: the real Snakemake workflow in a temporary directory.

Small configs (the demo data, a broken delivery, a hostile column name) run
through ``panelpipe run``, which calls the Snakemake command line.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
import yaml

from _support import run_panelpipe as run
from panelpipe.config import REPO_ROOT

pytestmark = pytest.mark.slow

DEMO = REPO_ROOT / "config" / "demo"


def write_config(cwd: Path, analyses: dict) -> Path:
    path = cwd / "panel.yaml"
    path.write_text(yaml.safe_dump({"output_dir": "out", "analyses": analyses}))
    return path


def demo_analysis(**over: object) -> dict:
    base = {
        "sources": ["data/regional_jobs_2011_2024.csv", "data/regional_jobs_2025.csv"],
        "unit": "region",
        "period": "year",
        "outcome": "youth_employment",
        "regressors": ["subsidy_rate", "broadband_share", "coastal"],
        "estimators": ["pooled_ols", "fixed_effects", "random_effects"],
        "inference": ["classical", "cluster"],
    }
    base.update(over)
    return base


@pytest.fixture
def workdir(tmp_path: Path) -> Path:
    shutil.copytree(DEMO, tmp_path / "data")
    return tmp_path


def test_demo_runs_end_to_end_and_a_rerun_does_no_work(workdir: Path) -> None:
    cfg = write_config(workdir, {"jobs": demo_analysis()})
    before = {p: p.read_bytes() for p in (workdir / "data").glob("*.csv")}
    first = run(workdir, "run", "--config", str(cfg))
    assert first.returncode == 0, first.stderr[-3000:]
    summary = json.loads(first.stdout.strip().splitlines()[-1])
    assert summary["analysis"] == "jobs" and summary["status"] == "ok"
    run_dir = workdir / "out" / "jobs" / summary["run_id"]
    for leaf in ("report.html", "results.json", "estimates.csv", "manifest.json"):
        assert (run_dir / leaf).is_file(), leaf
    assert (workdir / "out" / "jobs" / "latest").read_text().strip() == summary["run_id"]

    results = json.loads((run_dir / "results.json").read_text())
    assert results["schema_version"] == 1 and results["run_id"] == summary["run_id"]
    assert set(results["models"]) == {"pooled_ols", "fixed_effects", "random_effects"}
    fe = results["models"]["fixed_effects"]
    assert "coastal" not in fe["params"] and "coastal" in results["models"]["pooled_ols"]["params"]
    assert set(fe["std_errors"]) == {"classical", "cluster"}
    assert fe["headline_inference"] == "cluster"
    assert {"statistic", "df", "p_value"} <= set(results["tests"]["hausman"])
    assert any(f["code"] == "regressor_not_identified" for f in results["validation"]["findings"])
    # The audit fits the fixed-effects model in its own step: the same numbers as estimate's.
    loco = results["diagnostics"]["influential_clusters"]["effect"]
    assert loco["estimate"] == pytest.approx(fe["params"]["subsidy_rate"], rel=1e-10)
    assert loco["cr1_se"] == pytest.approx(fe["std_errors"]["cluster"]["subsidy_rate"], rel=1e-10)

    table = pd.read_csv(run_dir / "estimates.csv")
    assert list(table.columns) == [
        "model",
        "term",
        "inference",
        "estimate",
        "std_error",
        "ci_low",
        "ci_high",
        "p_value",
    ]
    manifest = json.loads((run_dir / "manifest.json").read_text())
    assert len(manifest["inputs"]) == 2 and len(manifest["inputs"][0]["sha256"]) == 64

    html = (run_dir / "report.html").read_text()
    assert "<script" not in html
    for load in ('src="http', "src='http", 'href="http', "url(http", "@import"):
        assert load not in html, load
    assert "association" in html.lower() or "associations" in html.lower()

    stamps = {p: p.stat().st_mtime_ns for p in run_dir.rglob("*") if p.is_file()}
    again = run(workdir, "run", "--config", str(cfg))
    assert again.returncode == 0
    assert "every analysis is up to date" in again.stderr
    assert json.loads(again.stdout.strip().splitlines()[-1])["status"] == "unchanged"
    assert stamps == {p: p.stat().st_mtime_ns for p in run_dir.rglob("*") if p.is_file()}
    assert before == {p: p.read_bytes() for p in (workdir / "data").glob("*.csv")}


def test_new_delivery_makes_a_new_run_and_keeps_the_old(workdir: Path) -> None:
    cfg = write_config(
        workdir,
        {
            "jobs": demo_analysis(
                sources=["data/regional_jobs_2011_2024.csv"],
                estimators=["fixed_effects"],
                inference=["cluster"],
            )
        },
    )
    first = run(workdir, "run", "--config", str(cfg))
    assert first.returncode == 0, first.stderr[-3000:]
    old = json.loads(first.stdout.strip().splitlines()[-1])["run_id"]
    old_bytes = {
        p: p.read_bytes() for p in (workdir / "out" / "jobs" / old).rglob("*") if p.is_file()
    }
    cfg = write_config(
        workdir, {"jobs": demo_analysis(estimators=["fixed_effects"], inference=["cluster"])}
    )
    second = run(workdir, "run", "--config", str(cfg))
    assert second.returncode == 0, second.stderr[-3000:]
    new = json.loads(second.stdout.strip().splitlines()[-1])["run_id"]
    assert new != old
    assert old_bytes == {
        p: p.read_bytes() for p in (workdir / "out" / "jobs" / old).rglob("*") if p.is_file()
    }
    assert (workdir / "out" / "jobs" / "latest").read_text().strip() == new
    compared = run(workdir, "compare", f"out/jobs/{old}", f"out/jobs/{new}")
    assert compared.returncode == 0, compared.stderr
    assert "periods added: 2025" in compared.stdout


def test_broken_delivery_fails_with_file_and_line(workdir: Path) -> None:
    bad = workdir / "data" / "regional_jobs_2025.csv"
    lines = bad.read_text().splitlines()
    lines.append(lines[1])  # the first region delivered twice
    bad.write_text("\n".join(lines) + "\n")
    cfg = write_config(workdir, {"jobs": demo_analysis()})
    result = run(workdir, "run", "--config", str(cfg))
    assert result.returncode != 0
    assert "analysis 'jobs': validation failed" in result.stderr
    assert "regional_jobs_2025.csv line 42" in result.stderr
    assert "Traceback" not in result.stderr.split("validation failed")[1].split("\n\n")[0]
    runs = [p for p in (workdir / "out" / "jobs").iterdir() if p.is_dir()]
    assert len(runs) == 1 and not (runs[0] / "report.html").exists()
    assert (runs[0] / "validation.json").is_file()
    page = (runs[0] / "validation.html").read_text()
    assert "duplicate_keys" in page and "regional_jobs_2025.csv line 42" in page
    assert not (workdir / "out" / "jobs" / "latest").exists()


def test_invalid_config_stops_before_anything_runs(workdir: Path) -> None:
    cfg = write_config(workdir, {"jobs": demo_analysis(estimators=["magic"])})
    result = run(workdir, "run", "--config", str(cfg))
    assert result.returncode == 2
    assert "analyses.jobs.estimators[0]: 'magic' is not one of" in result.stderr
    assert not (workdir / "out").exists()


def test_hostile_column_name_is_escaped_in_the_report(workdir: Path) -> None:
    hostile = "<script>alert(1)</script>"
    frame = pd.read_csv(workdir / "data" / "regional_jobs_2011_2024.csv", dtype={"region": str})
    frame = frame.rename(columns={"broadband_share": hostile})
    frame.to_parquet(workdir / "data" / "hostile.parquet")
    cfg = write_config(
        workdir,
        {
            "hostile": demo_analysis(
                sources=["data/hostile.parquet"],
                regressors=["subsidy_rate", hostile],
                estimators=["fixed_effects"],
                inference=["cluster"],
            )
        },
    )
    result = run(workdir, "run", "--config", str(cfg))
    assert result.returncode == 0, result.stderr[-3000:]
    run_id = json.loads(result.stdout.strip().splitlines()[-1])["run_id"]
    html = (workdir / "out" / "hostile" / run_id / "report.html").read_text()
    assert hostile not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html


def test_plain_snakemake_from_the_repository_root_dry_run() -> None:
    result = subprocess.run(
        [sys.executable, "-m", "snakemake", "--cores", "1", "--dry-run"],
        cwd=REPO_ROOT,
        text=True,
        capture_output=True,
        timeout=300,
    )
    assert result.returncode == 0, result.stderr[-3000:]
