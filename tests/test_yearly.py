"""Three yearly deliveries, a revised history and a run killed midway.

The scenario of an unattended yearly rerun: each year a new file arrives; the
third year's file also re-delivers a revised value for an earlier year; the
third run is killed with SIGKILL in the middle and the next invocation must
complete it. Nothing of an earlier run may change.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest
import yaml

from _support import run_panelpipe as panelpipe
from panelpipe.config import REPO_ROOT

pytestmark = pytest.mark.slow

DEMO = REPO_ROOT / "config" / "demo"


def configure(cwd: Path, files: list[str]) -> None:
    analysis = {
        "sources": [f"deliveries/{f}" for f in files],
        "unit": "region",
        "period": "year",
        "outcome": "youth_employment",
        "regressors": ["subsidy_rate", "broadband_share"],
        "estimators": ["pooled_ols", "fixed_effects", "random_effects"],
        "inference": ["classical", "cluster"],
    }
    (cwd / "jobs.yaml").write_text(
        yaml.safe_dump({"output_dir": "reports", "analyses": {"jobs": analysis}})
    )


def summary(result: subprocess.CompletedProcess[str]) -> dict:
    return json.loads(result.stdout.strip().splitlines()[-1])


def snapshot(folder: Path) -> dict[Path, bytes]:
    return {p: p.read_bytes() for p in folder.rglob("*") if p.is_file()}


@pytest.fixture
def yearly(tmp_path: Path) -> Path:
    history = pd.read_csv(DEMO / "regional_jobs_2011_2024.csv", dtype={"region": str})
    latest = pd.read_csv(DEMO / "regional_jobs_2025.csv", dtype={"region": str})
    out = tmp_path / "deliveries"
    out.mkdir()
    history[history.year <= 2023].to_csv(out / "jobs_2011_2023.csv", index=False)
    history[history.year == 2024].to_csv(out / "jobs_2024.csv", index=False)
    revised = history[(history.year == 2023) & (history.region == "R017")].copy()
    revised["youth_employment"] += 3.5  # the statistics office corrected 2023 for R017
    pd.concat([latest, revised]).to_csv(out / "jobs_2025.csv", index=False)
    return tmp_path


def test_three_yearly_deliveries_with_a_revision_and_a_killed_run(yearly: Path) -> None:
    cwd = yearly
    configure(cwd, ["jobs_2011_2023.csv"])
    first = panelpipe(cwd, "run", "--config", "jobs.yaml")
    assert first.returncode == 0, first.stderr[-3000:]
    run_a = summary(first)["run_id"]
    folder_a = cwd / "reports" / "jobs" / run_a
    frozen_a = snapshot(folder_a)

    # A rerun with nothing new does no estimation.
    again = panelpipe(cwd, "run", "--config", "jobs.yaml")
    assert again.returncode == 0 and summary(again)["status"] == "unchanged"
    assert "every analysis is up to date" in again.stderr
    assert snapshot(folder_a) == frozen_a

    # Year two: a new folder; the first is untouched byte for byte.
    configure(cwd, ["jobs_2011_2023.csv", "jobs_2024.csv"])
    second = panelpipe(cwd, "run", "--config", "jobs.yaml")
    assert second.returncode == 0, second.stderr[-3000:]
    run_b = summary(second)["run_id"]
    assert run_b != run_a and summary(second)["status"] == "ok"
    assert snapshot(folder_a) == frozen_a
    assert (cwd / "reports" / "jobs" / "latest").read_text().strip() == run_b
    changed = panelpipe(cwd, "compare", f"reports/jobs/{run_a}", f"reports/jobs/{run_b}")
    assert "periods added: 2024" in changed.stdout

    # Year three, killed in the middle of its run.
    configure(cwd, ["jobs_2011_2023.csv", "jobs_2024.csv", "jobs_2025.csv"])
    frozen_b = snapshot(cwd / "reports" / "jobs" / run_b)
    proc = subprocess.Popen(
        [sys.executable, "-m", "panelpipe", "run", "--config", "jobs.yaml"],
        cwd=cwd,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        start_new_session=True,
    )
    deadline = time.monotonic() + 300
    target = None
    while time.monotonic() < deadline and target is None:
        time.sleep(0.05)
        for folder in (cwd / "reports" / "jobs").iterdir():
            if folder.name not in {run_a, run_b} and (folder / "work" / "models.json").exists():
                target = folder
    assert target is not None, "the third run never reached estimation"
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    assert not (target / "report.html").exists() or (target / "results.json").exists()
    assert (cwd / "reports" / "jobs" / "latest").read_text().strip() == run_b

    third = panelpipe(cwd, "run", "--config", "jobs.yaml")
    assert third.returncode == 0, third.stderr[-3000:]
    run_c = summary(third)["run_id"]
    assert run_c == target.name and summary(third)["status"] == "ok"
    results = json.loads((target / "results.json").read_text())
    assert results["data"]["last_period"] == "2025"
    assert any(f["code"] == "revised" for f in results["validation"]["findings"])
    assert results["changes"]["run_a"] == run_b
    assert snapshot(folder_a) == frozen_a and snapshot(cwd / "reports" / "jobs" / run_b) == frozen_b

    changed = panelpipe(cwd, "compare", f"reports/jobs/{run_b}", f"reports/jobs/{run_c}")
    assert changed.returncode == 0, changed.stderr
    assert "periods added: 2025" in changed.stdout
    assert "historical cells revised: 1" in changed.stdout
    assert "R017 2023 youth_employment" in changed.stdout
    as_json = json.loads(
        panelpipe(cwd, "compare", f"reports/jobs/{run_b}", f"reports/jobs/{run_c}", "--json").stdout
    )
    assert as_json["revisions"][0]["unit"] == "R017"


def test_two_runs_on_one_output_never_interleave(yearly: Path) -> None:
    from panelpipe.findings import PanelpipeError
    from panelpipe.runs import run_lock

    with (
        run_lock(yearly / "reports"),
        pytest.raises(PanelpipeError, match="another panelpipe run"),
        run_lock(yearly / "reports"),
    ):
        pass
    configure(yearly, ["jobs_2011_2023.csv"])
    holder = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "import sys; from pathlib import Path; from panelpipe.runs import run_lock\n"
            "with run_lock(Path(sys.argv[1])):\n    print('held', flush=True); sys.stdin.read()",
            str(yearly / "reports"),
        ],
        stdin=subprocess.PIPE,  # held until the test is done with it, however slow the machine
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
        blocked = panelpipe(yearly, "run", "--config", "jobs.yaml")
        assert blocked.returncode == 2
        assert "another panelpipe run" in blocked.stderr
    finally:
        holder.kill()
        holder.wait()
