"""A run killed at every step boundary and inside the report write still ends right.

The test hook ``PANELPIPE_FAULT=<point>`` pauses the workflow at one point and
names the paused process in ``PANELPIPE_FAULT_MARK`` (DEVELOPERS.md), so the
kill lands exactly there without racing the run. Each invocation is killed at
the next point with SIGKILL, either of its whole process group or of the
``panelpipe`` process alone (the kernel must then take Snakemake and its step
with it), and the next invocation resumes from where the last one stopped.
After every kill no process of the run is left, ``latest`` names a complete run
and the earlier run folder is byte-identical; the last invocation completes the
run and points ``latest`` at it.
"""

from __future__ import annotations

import json
import os
import signal
from collections.abc import Callable
from pathlib import Path

import psutil
import pytest

from _support import (
    HOSTILE_HEADER,
    hostile_analysis,
    hostile_rows,
    start_paused,
    wait_paused,
    write_hostile_config,
)
from panelpipe.runs import SEAL, check_run

pytestmark = pytest.mark.slow

# Each point, and the file whose presence shows its step already finished in an
# earlier invocation (estimate and diagnose may run in either order). The last
# point of a chain is one of the two after the seal's write: once the seal is
# written the run is complete and no later invocation reaches the other.
POINTS = [
    ("ingest", "work/raw.parquet"),
    ("validate", "work/panel.parquet"),
    ("estimate", "work/models.json"),
    ("diagnose", "work/diagnostics.json"),
    ("compare", "work/tests.json"),
    ("report", "report.html"),
    ("report:writing", "report.html"),
    ("seal", SEAL),
]


@pytest.mark.parametrize(
    ("first", "last"), [("group", "seal:written"), ("alone", "publish")], ids=["group", "alone"]
)
def test_killed_at_every_point_the_next_run_completes(
    earlier_run: Callable[[], Callable[[], None]], tmp_path: Path, first: str, last: str
) -> None:
    check = earlier_run()
    analysis = tmp_path / "out" / "t"
    earlier = next(p.name for p in analysis.iterdir() if p.is_dir())
    (tmp_path / "a.csv").write_text(HOSTILE_HEADER + hostile_rows(), encoding="utf-8")
    late = HOSTILE_HEADER + hostile_rows(years=range(2024, 2025))
    (tmp_path / "b.csv").write_text(late, encoding="utf-8")
    config = write_hostile_config(tmp_path, hostile_analysis(sources=["a.csv", "b.csv"]))
    modes = ["group", "alone"] if first == "group" else ["alone", "group"]
    folder: Path | None = None
    for i, (point, done) in enumerate([*POINTS, (last, None)]):
        if folder is not None and done is not None and (folder / done).exists():
            continue  # finished beside an earlier paused step
        mark = tmp_path / f"paused-{i}"
        proc = start_paused(tmp_path, config, point, mark, cores=1)
        wait_paused(proc, mark)
        family = psutil.Process(proc.pid).children(recursive=True)
        if modes[i % 2] == "group":
            os.killpg(proc.pid, signal.SIGKILL)
        else:
            os.kill(proc.pid, signal.SIGKILL)
        proc.communicate()
        _, alive = psutil.wait_procs(family, timeout=120)
        assert not alive, f"left running after a kill at {point}: {alive}"
        folder = next(p for p in analysis.iterdir() if p.is_dir() and p.name != earlier)
        assert not (folder / "report.html").exists() or point.startswith(("report", "seal", "p"))
        latest = (analysis / "latest").read_text(encoding="utf-8").strip()
        assert latest == (folder.name if point == "publish" else earlier), point
        assert check_run(analysis / latest).state == "complete"
        check()

    final = start_paused(tmp_path, config, None, tmp_path / "unused", cores=1)
    out, err = final.communicate(timeout=600)
    assert final.returncode == 0, err[-3000:]
    (line,) = [json.loads(x) for x in out.splitlines() if x.startswith("{")]
    assert line["run_id"] == folder.name and line["status"] == "unchanged"
    assert check_run(folder).state == "complete"
    assert (analysis / "latest").read_text(encoding="utf-8").strip() == folder.name
    results = json.loads((folder / "results.json").read_text(encoding="utf-8"))
    assert results["run_id"] == folder.name and results["data"]["last_period"] == "2024"
    assert not list(folder.rglob(".*.tmp"))
    check()
