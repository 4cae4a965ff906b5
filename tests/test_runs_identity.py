"""Run identity: what the run id covers, the plan the ingest step holds to, the seal.

The run id must change with anything that shapes the data and nothing else; the
ingest step reads exactly the bytes that were planned or refuses; a run folder
is complete only when its seal matches; ``latest`` follows the current inputs.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

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
from panelpipe.config import REPO_ROOT, analysis_settings, validate_config
from panelpipe.findings import PanelpipeError
from panelpipe.runs import SEAL, check_plan, check_run, plan_runs, run_id, seal_step
from panelpipe.steps import ingest_step


def _plan(cwd: Path, **over: Any) -> Any:
    (cwd / "a.csv").write_text(HOSTILE_HEADER + hostile_rows(), encoding="utf-8")
    config = validate_config({"output_dir": "out", "analyses": {"t": hostile_analysis(**over)}})
    return config, plan_runs(config)["t"]


@pytest.mark.parametrize(
    "options",
    [
        {"missing": ["-"]},
        {"rename": {"grant": "grant"}},
        {"decimal": ","},
        {"delimiter": ";"},
        {"encoding": "latin-1"},
    ],
    ids=["missing", "rename", "decimal", "delimiter", "encoding"],
)
def test_every_reading_option_of_a_source_is_part_of_the_run_id(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, options: dict[str, Any]
) -> None:
    monkeypatch.chdir(tmp_path)
    _, plain = _plan(tmp_path)
    _, optioned = _plan(tmp_path, sources=[{"path": "a.csv", **options}])
    assert optioned.run_id != plain.run_id


def test_moving_a_delivery_keeps_the_run_id(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.chdir(tmp_path)
    _, here = _plan(tmp_path)
    (tmp_path / "moved").mkdir()
    (tmp_path / "a.csv").rename(tmp_path / "moved" / "a.csv")
    config = validate_config(
        {"output_dir": "out", "analyses": {"t": hostile_analysis(sources=["moved/a.csv"])}}
    )
    assert plan_runs(config)["t"].run_id == here.run_id


def test_an_option_added_later_is_covered_without_a_change_here() -> None:
    settings = {"unit": "region", "sources": ["ignored.csv"]}
    plain = run_id([{"sha256": "0" * 64, "options": {}}], settings, "code")
    later = run_id([{"sha256": "0" * 64, "options": {"thousands": ","}}], settings, "code")
    assert plain != later
    # The paths in `sources` stay out of the id.
    assert plain == run_id([{"sha256": "0" * 64, "options": {}}], {"unit": "region"}, "code")


def test_a_plan_that_no_longer_holds_is_refused_naming_the_file(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.chdir(tmp_path)
    config, plan = _plan(tmp_path)
    earlier = json.dumps({"t": plan.to_dict()})
    check_plan(plan_runs(config), earlier)  # unchanged: passes
    with (tmp_path / "a.csv").open("a", encoding="utf-8") as fh:
        fh.write("007,2018,12,1.5,1\n")
    with pytest.raises(PanelpipeError, match=r"a\.csv changed \(SHA-256 .* while the run was"):
        check_plan(plan_runs(config), earlier)


def test_the_ingest_step_reads_only_the_planned_bytes(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.chdir(tmp_path)
    config, plan = _plan(tmp_path)
    settings = analysis_settings(config, "t")
    outputs = (str(tmp_path / "w" / "raw.parquet"), str(tmp_path / "w" / "sources.json"))
    (tmp_path / "a.csv").write_text(HOSTILE_HEADER + hostile_rows(units=5), encoding="utf-8")
    with pytest.raises(PanelpipeError, match=r"a\.csv changed .* Nothing was estimated"):
        ingest_step(settings, *outputs, run=plan.run_id, planned=plan.to_dict())
    assert not (tmp_path / "w").exists()
    with pytest.raises(PanelpipeError, match=r"is not the run of the current inputs"):
        ingest_step(settings, *outputs, run="0" * 16, planned=plan.to_dict())


def test_a_run_folder_is_complete_only_when_its_seal_matches(tmp_path: Path) -> None:
    folder = tmp_path / "t" / "0123456789abcdef"
    folder.mkdir(parents=True)
    files = []
    for name in ("report.html", "results.json"):
        (folder / name).write_text(name, encoding="utf-8")
        files.append(str(folder / name))
    (folder / ".report.html.x1.tmp").write_text("left by a killed write", encoding="utf-8")
    assert check_run(folder).state == "incomplete"
    seal_step(files, str(folder / SEAL))
    assert check_run(folder).state == "complete"
    assert not (folder / ".report.html.x1.tmp").exists()
    assert (tmp_path / "t" / "latest").read_text(encoding="utf-8") == folder.name + "\n"
    (folder / "results.json").write_text("edited", encoding="utf-8")
    damaged = check_run(folder)
    assert damaged.state == "damaged" and "results.json differs" in damaged.reason
    (folder / "results.json").unlink()
    assert "results.json is missing" in check_run(folder).reason
    (folder / SEAL).write_text('{"files": {"../x": "0"}}', encoding="utf-8")
    assert "outside the run folder" in check_run(folder).reason


def _summary(result: subprocess.CompletedProcess[str]) -> dict[str, Any]:
    return json.loads(result.stdout.strip().splitlines()[-1])


@pytest.mark.slow
def test_a_source_changed_while_the_run_starts_is_refused(
    earlier_run: Callable[[], Callable[[], None]], tmp_path: Path
) -> None:
    check = earlier_run()
    earlier = next(p.name for p in (tmp_path / "out" / "t").iterdir() if p.is_dir())
    config = write_hostile_config(tmp_path, hostile_analysis(sources=["a.csv", "b.csv"]))
    (tmp_path / "a.csv").write_text(HOSTILE_HEADER + hostile_rows(), encoding="utf-8")
    late = range(2024, 2025)
    (tmp_path / "b.csv").write_text(HOSTILE_HEADER + hostile_rows(years=late), encoding="utf-8")
    mark = tmp_path / "paused"
    proc = start_paused(tmp_path, config, "ingest", mark)
    try:
        wait_paused(proc, mark)
        # The delivery is still being copied when the ingest step starts.
        more = HOSTILE_HEADER + hostile_rows(units=8, years=late)
        (tmp_path / "b.csv").write_text(more, encoding="utf-8")
        os.kill(int(mark.read_text()), signal.SIGUSR1)
        out, err = proc.communicate(timeout=600)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode != 0
    assert "b.csv changed (SHA-256" in err and "while the run was starting" in err
    (line,) = [json.loads(x) for x in out.splitlines() if x.startswith("{")]
    assert line["status"] == "failed" and line["report"] is None
    assert not (tmp_path / "out" / "t" / line["run_id"] / "work" / "raw.parquet").exists()
    assert (tmp_path / "out" / "t" / "latest").read_text().strip() == earlier
    check()


@pytest.mark.slow
def test_latest_follows_a_withdrawn_delivery(
    earlier_run: Callable[[], Callable[[], None]], tmp_path: Path
) -> None:
    check = earlier_run()
    analysis = tmp_path / "out" / "t"
    earlier = next(p.name for p in analysis.iterdir() if p.is_dir())
    (tmp_path / "a.csv").write_text(HOSTILE_HEADER + hostile_rows(), encoding="utf-8")
    (tmp_path / "b.csv").write_text(
        HOSTILE_HEADER + hostile_rows(years=range(2024, 2025)), encoding="utf-8"
    )
    config = write_hostile_config(tmp_path, hostile_analysis(sources=["*.csv"]))
    delivered = run_panelpipe(tmp_path, "run", "--config", str(config))
    assert delivered.returncode == 0, delivered.stderr[-3000:]
    assert (analysis / "latest").read_text().strip() == _summary(delivered)["run_id"] != earlier

    (tmp_path / "b.csv").unlink()  # the 2024 delivery is withdrawn
    plain = subprocess.run(
        [
            sys.executable,
            "-m",
            "snakemake",
            "--snakefile",
            str(REPO_ROOT / "Snakefile"),
            "--configfile",
            str(config),
            "--cores",
            "1",
        ],
        cwd=tmp_path,
        text=True,
        capture_output=True,
        timeout=600,
    )
    assert plain.returncode == 0, plain.stderr[-3000:]
    assert (analysis / "latest").read_text().strip() == earlier
    (analysis / "latest").write_text(_summary(delivered)["run_id"] + "\n")
    again = run_panelpipe(tmp_path, "run", "--config", str(config))
    assert again.returncode == 0, again.stderr[-3000:]
    assert _summary(again)["status"] == "unchanged" and _summary(again)["run_id"] == earlier
    assert (analysis / "latest").read_text().strip() == earlier
    check()
