"""The benchmark (``python -m panelpipe.bench``) end to end on a tiny panel.

A smoke test, not a timed one: it checks that every figure is produced, positive
and written to JSON, never how large a time is. The memory measurement is
checked against a child process that holds a known amount of memory.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any

import numpy as np
import psutil
import pytest

from panelpipe import bench

pytestmark = pytest.mark.slow

TOP_KEYS = {
    "machine",
    "size",
    "pipeline",
    "bare",
    "ratios",
    "rerun",
    "bootstrap",
    "profile",
    "bare_estimates",
    "sweep",
    "sweep_fit",
    "targets",
    "work_folder",
    "code_changed_during_run",
}
MEASUREMENT_KEYS = {"wall_s", "peak_mib", "peak_single_mib", "cpu_s", "polls", "returncode"}


def test_simulated_panel_has_the_promised_shape() -> None:
    frame = bench.simulate_panel(50, 4, 3, seed=1)
    assert len(frame) == 200
    assert list(frame.columns) == ["unit", "period", "y", "x1", "x2", "x3"]
    assert frame["unit"].map(type).eq(str).all()  # unit ids are text
    assert frame.groupby("unit")["period"].nunique().eq(4).all()  # balanced
    # x1 is correlated with the unit effect: its unit means vary far more than noise alone.
    assert frame.groupby("unit")["x1"].mean().std() > 0.6
    again = bench.simulate_panel(50, 4, 3, seed=1)
    assert np.array_equal(frame["y"].to_numpy(), again["y"].to_numpy())  # seeded


def _held_until_polled(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, *, hold_mib: int = 0
) -> list[str]:
    """A child command that holds ``hold_mib`` MiB until a poll of `bench.measure` has seen it.

    The poll itself releases the child (through a file the child waits for), so the
    test waits on that event, never on a time tuned to a fast machine.
    """
    stop = tmp_path / "seen"
    script = tmp_path / "hold.py"
    script.write_text(
        "import os, sys, time\n"
        "block = b'x' * (int(sys.argv[2]) << 20)\n"
        "deadline = time.monotonic() + 300  # a bound against a hung test, not a tuning\n"
        "while not os.path.exists(sys.argv[1]) and time.monotonic() < deadline:\n"
        "    time.sleep(0.01)\n",
        encoding="utf-8",
    )
    real = bench._tree_rss

    def spy(*args: Any, **kwargs: Any) -> tuple[int, int]:
        total, largest = real(*args, **kwargs)
        if total >= hold_mib << 20:
            stop.touch()
        return total, largest

    monkeypatch.setattr(bench, "_tree_rss", spy)
    return [sys.executable, str(script), str(stop), str(hold_mib)]


def test_measure_sees_the_memory_a_child_holds(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    cmd = _held_until_polled(tmp_path, monkeypatch, hold_mib=200)
    m = bench.measure(cmd, tmp_path, label="hold")
    assert m.returncode == 0
    assert m.peak_single_mib >= 200  # the kernel's high-water mark cannot miss it
    assert m.peak_mib >= 200  # held until a poll saw it
    assert m.polls > 0


def test_a_process_whose_command_line_cannot_be_read_is_named_from_the_command(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A poll that misses a process's name (between fork and exec, or under load)."""
    cmd = _held_until_polled(tmp_path, monkeypatch)
    monkeypatch.setattr(psutil.Process, "cmdline", lambda self: [])
    m = bench.measure(cmd, tmp_path, label="hold")
    assert m.returncode == 0
    assert set(m.processes) == {"hold.py"}


def test_benchmark_end_to_end_on_a_tiny_panel(tmp_path: Path) -> None:
    out = tmp_path / "bench.json"
    code = bench.main(
        [
            "--units",
            "500",
            "--periods",
            "5",
            "--regressors",
            "3",
            "--no-sweep",
            "--keep",
            str(tmp_path / "work"),
            "--json",
            str(out),
        ]
    )
    assert code == 0
    doc = json.loads(out.read_text())
    assert set(doc) >= TOP_KEYS
    assert doc["size"]["rows"] == 2500
    for side in ("pipeline", "bare", "rerun"):
        assert set(doc[side]) >= MEASUREMENT_KEYS
        assert doc[side]["returncode"] == 0
        assert doc[side]["wall_s"] > 0
        assert doc[side]["peak_mib"] > 0
        assert doc[side]["peak_single_mib"] > 0
        assert doc[side]["cpu_s"] > 0
    assert doc["rerun"]["status"] == "unchanged"
    assert doc["ratios"]["wall"] > 0
    assert doc["ratios"]["peak"] > 0
    assert doc["ratios"]["cpu"] > 0
    assert doc["machine"]["code"]["fingerprint"]
    assert doc["bootstrap"]["wall_s"] > 0
    assert doc["bootstrap"]["draws"] == 9999
    assert doc["bootstrap"]["clusters"] == 50
    assert {"ingest", "estimate", "report"} <= set(doc["profile"])
    assert all(step["s"] > 0 for step in doc["profile"].values())
    assert set(doc["bare_estimates"]) == {"pooled_ols", "fixed_effects", "random_effects"}
    assert {"panelpipe", "snakemake", "estimate"} <= set(doc["pipeline"]["processes"])
    assert set(doc["bare"]["processes"]) == {"bare.py"}
    assert doc["sweep"] == []
    assert doc["sweep_fit"] == {}
    # The printed targets are named in the reader's words, not by a tracker number.
    printed = bench.format_report(doc)
    assert "issue" not in printed
    for target in ("wall-time ratio", "peak-memory ratio", "no-change rerun", "wild bootstrap"):
        assert f"  {target} <= " in printed
    # The kept folder holds what was measured.
    work = tmp_path / "work" / "n500"
    assert (work / "panel.parquet").is_file()
    assert (work / "bare.py").is_file()
    assert "estimators" not in (work / "panelpipe.yaml").read_text()  # package defaults apply


def test_sweep_fit_reads_proportional_cost_as_slope_one() -> None:
    def case(rows: int, seconds: float) -> bench.CaseResult:
        m = bench.Measurement(
            wall_s=seconds,
            peak_mib=rows / 1000,
            peak_single_mib=rows / 1000,
            cpu_s=seconds,
            polls=1,
            returncode=0,
            stdout="",
            stderr="",
        )
        return bench.CaseResult(rows // 10, 10, 3, rows, pipeline=m, bare=m)

    fit = bench.sweep_fit([case(100_000, 2.0), case(300_000, 6.0), case(1_000_000, 20.0)])
    for side in ("pipeline", "bare"):
        assert fit[side]["loglog_slope_s"] == pytest.approx(1.0)
        assert fit[side]["loglog_slope_mib"] == pytest.approx(1.0)
        assert fit[side]["loglog_slope_cpu"] == pytest.approx(1.0)
        assert fit[side]["fixed_s"] == pytest.approx(0.0, abs=1e-9)
        assert fit[side]["s_per_million_rows"] == pytest.approx(20.0)


def test_process_label_names_steps_modules_and_scripts() -> None:
    step = "/w/.snakemake/scripts/tmpab12cd.estimate.py"
    assert bench.process_label(["/usr/bin/python3", step]) == "estimate"
    assert bench.process_label(["python", "-m", "snakemake", "--cores", "2"]) == "snakemake"
    assert bench.process_label(["python", "/tmp/x/bare.py", "p.parquet", "3"]) == "bare.py"
    assert bench.process_label(["/bin/sleep", "1"]) == "sleep"
    assert bench.process_label([]) is None  # a zombie or a process in exec: no name to read
