"""What ``panelpipe run`` prints: a line per step, errors in full, a calm Ctrl-C."""

from __future__ import annotations

import json
import os
import shutil
import signal
from collections.abc import Callable
from pathlib import Path

import pytest

from _support import (
    HOSTILE_HEADER,
    hostile_analysis,
    hostile_rows,
    run_panelpipe,
    start_paused,
    wait_paused,
    write_hostile_config,
)
from panelpipe.config import REPO_ROOT
from panelpipe.progress import StepProgress

# The shape of Snakemake 9's output around one job that finishes and one that fails
# (abridged from a real run of the demo).
SNAKEMAKE_LINES = """\
Building DAG of jobs...
[Wed Dec  2 15:50:12 2026]
localrule ingest:
    input: a.csv
    log: out/t/0123456789abcdef/logs/ingest.log
    jobid: 3
    wildcards: analysis=t, run_id=0123456789abcdef
    resources: tmpdir=/tmp, mem_mb=1000
[Wed Dec  2 15:50:14 2026]
Finished jobid: 3 (Rule: ingest)
1 of 8 steps (12%) done
[Wed Dec  2 15:50:14 2026]
localrule validate:
    jobid: 4
    wildcards: analysis=t, run_id=0123456789abcdef

panelpipe: a.csv, line 7: the period '20x9' is not a year;
  correct the value and run again.

[Wed Dec  2 15:50:15 2026]
Error in rule validate:
    message: For details, please check the log file.
    jobid: 4
    log: out/t/0123456789abcdef/logs/validate.log (check log file(s) for error details)
Exiting because a job execution failed. Look below for error messages
"""


def test_one_line_per_step_and_the_whole_message() -> None:
    shown: list[str] = []
    ticks = iter([10.0, 12.5, 13.0, 14.25])
    progress = StepProgress(shown.append, clock=lambda: next(ticks))
    progress.feed(SNAKEMAKE_LINES.splitlines(keepends=True))
    assert shown == [
        "panelpipe: ingest    t  done (2.5 s)",
        "panelpipe: a.csv, line 7: the period '20x9' is not a year;",
        "  correct the value and run again.",
        "panelpipe: validate  t  failed (1.2 s)",
    ]
    assert progress.messages == 1 and progress.failed_steps == 1


def test_snakemake_8_finished_lines_are_read() -> None:
    shown: list[str] = []
    progress = StepProgress(shown.append, clock=lambda: 1.0)
    progress.feed(
        [
            "rule estimate:\n",
            "    jobid: 5\n",
            "    wildcards: analysis=regional_jobs, run_id=0123456789abcdef\n",
            "Finished job 5.\n",
            "localrule all:\n",
            "    jobid: 0\n",
            "Finished job 0.\n",
        ]
    )
    assert shown == ["panelpipe: estimate  regional_jobs  done (0.0 s)"]


@pytest.mark.slow
def test_the_demo_prints_at_most_15_lines_and_keeps_the_whole_log(tmp_path: Path) -> None:
    shutil.copytree(REPO_ROOT / "config", tmp_path / "config")
    done = run_panelpipe(tmp_path, "run")
    assert done.returncode == 0, done.stderr[-3000:]
    lines = done.stdout.splitlines() + done.stderr.splitlines()
    assert len(lines) <= 15, "\n".join(lines)
    (summary,) = done.stdout.splitlines()
    status = json.loads(summary)
    assert list(status) == ["analysis", "status", "run_id", "report"]
    assert status["status"] == "ok"
    folder = Path(status["report"]).parent
    for step in ("ingest", "validate", "estimate", "diagnose", "compare", "report"):
        assert f"panelpipe: {step:<9} regional_jobs  done (" in done.stderr
    log = (folder / "logs" / "snakemake.log").read_text(encoding="utf-8")
    assert "Finished jobid" in log or "Finished job" in log
    assert f"{folder / 'logs' / 'snakemake.log'}" in done.stderr


@pytest.mark.slow
def test_a_failed_step_shows_its_message_in_full(
    earlier_run: Callable[[], Callable[[], None]], tmp_path: Path
) -> None:
    check = earlier_run()
    bad = hostile_rows().replace("003,2020,", "003,20x0,", 1)
    (tmp_path / "a.csv").write_text(HOSTILE_HEADER + bad, encoding="utf-8")
    config = write_hostile_config(tmp_path, hostile_analysis())
    done = run_panelpipe(tmp_path, "run", "--config", str(config))
    assert done.returncode != 0
    assert "Traceback" not in done.stderr
    assert "a.csv" in done.stderr and "20x0" in done.stderr, done.stderr
    assert "failed (" in done.stderr
    assert len(done.stderr.splitlines()) <= 15, done.stderr
    (summary,) = [json.loads(x) for x in done.stdout.splitlines()]
    assert summary["status"] == "failed"
    log = tmp_path / "out" / "t" / summary["run_id"] / "logs" / "snakemake.log"
    assert "Error in rule" in log.read_text(encoding="utf-8")
    verbose = run_panelpipe(tmp_path, "run", "--config", str(config), "--verbose")
    assert verbose.returncode != 0 and "Error in rule" in verbose.stderr
    check()


@pytest.mark.slow
def test_ctrl_c_is_one_line_and_publishes_nothing(
    earlier_run: Callable[[], Callable[[], None]], tmp_path: Path
) -> None:
    check = earlier_run()
    analysis = tmp_path / "out" / "t"
    earlier = next(p.name for p in analysis.iterdir() if p.is_dir())
    rows = HOSTILE_HEADER + hostile_rows(years=range(2018, 2025))
    (tmp_path / "a.csv").write_text(rows, encoding="utf-8")
    config = write_hostile_config(tmp_path, hostile_analysis())
    mark = tmp_path / "paused"
    proc = start_paused(tmp_path, config, "report:writing", mark, cores=1)
    wait_paused(proc, mark)  # waits on the file the paused step writes
    os.kill(proc.pid, signal.SIGINT)  # what Ctrl-C at a terminal sends
    out, err = proc.communicate(timeout=600)
    assert proc.returncode == 130
    assert "Traceback" not in err and "KeyboardInterrupt" not in err
    assert err.splitlines()[-1].startswith("panelpipe: interrupted;"), err
    assert out == ""
    new = next(p for p in analysis.iterdir() if p.is_dir() and p.name != earlier)
    assert not (new / "report.html").exists() and not (new / "checksums.json").exists()
    assert (analysis / "latest").read_text(encoding="utf-8").strip() == earlier
    check()


def test_compare_writes_numbers_as_the_report_does() -> None:
    from panelpipe.changes import render_changes

    text = render_changes(
        {
            "analysis": "t",
            "run_a": "0123456789abcdef",
            "run_b": "fedcba9876543210",
            "periods_added": ["2025"],
            "periods_gone": [],
            "units_added": [],
            "units_gone": [],
            "revised_cells": 1,
            "noise_threshold": 1.96,
            "revisions": [
                {
                    "unit": "007",
                    "period": "2019",
                    "column": "jobs",
                    "old": 12.345678901234,
                    "new": 12.5,
                }
            ],
            "estimates": [
                {
                    "model": "fixed_effects",
                    "term": "grant",
                    "old": 0.000012345678,
                    "new": 0.81234567,
                    "z": 1.0,
                    "beyond_noise": False,
                }
            ],
            "tests": {
                "hausman": {
                    "name": "Do fixed and random effects disagree? Hausman test, classical",
                    "old_p": 6.128309589835843e-288,
                    "new_p": 0.04321987,
                }
            },
        }
    )
    # Common practice, no source: p-values below 0.001 are written as "< 0.001".
    assert "p < 0.001 → 0.043" in text
    assert "e-288" not in text and "12.345678901234" not in text
    assert "jobs: 12.3457 → 12.5000" in text
    # Tests are named as in the report, not by their results.json keys.
    assert "Do fixed and random effects disagree?" in text and "test hausman" not in text
    assert "1.235e-05 →      0.8123" in text
