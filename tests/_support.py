"""Small helpers shared by the test files (imported as ``from _support import ...``)."""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

from panelpipe.config import AnalysisSettings


def run_panelpipe(cwd: Path, *args: str) -> subprocess.CompletedProcess[str]:
    """Run ``python -m panelpipe ARGS`` in ``cwd`` and capture its output."""
    return subprocess.run(
        [sys.executable, "-m", "panelpipe", *args],
        cwd=cwd,
        text=True,
        capture_output=True,
        timeout=600,
    )


def panel_settings(**overrides: Any) -> AnalysisSettings:
    """Settings for the simulated panels of conftest.py (unit, period, y, x1, x2, z)."""
    base: dict[str, Any] = {
        "name": "simulated",
        "sources": ("simulated.csv",),
        "unit": "unit",
        "period": "period",
        "outcome": "y",
        "regressors": ("x1", "x2", "z"),
        "period_effects": True,
        "cluster_by": ("unit",),
        "estimators": (),
        "inference": ("classical", "cluster"),
        "level": 0.95,
    }
    base.update(overrides)
    return AnalysisSettings(**base)


# ---------------------------------------------------------------- hostile inputs
#
# The battery of hostile inputs (tests/test_hostile_*.py) runs each case next to an
# earlier, complete run folder and asserts that the folder is byte-identical (and
# keeps its file modes) afterwards: whatever a bad input does, it must never
# damage what an earlier run published.

HOSTILE_HEADER = "region,year,jobs,grant,coastal\n"


def hostile_rows(units: int = 6, years: range = range(2018, 2024)) -> str:
    """A small, clean region-by-year panel (invented values) without its header."""
    out = []
    for u in range(1, units + 1):
        for y in years:
            out.append(f"{u:03d},{y},{10 + u + (y * u) % 7},{(u * 3 + y * 7) % 11 + 0.5},{u % 2}")
    return "\n".join(out) + "\n"


def hostile_analysis(**over: Any) -> dict[str, Any]:
    """An analysis of ``a.csv`` (the panel above) that runs in a few seconds."""
    base: dict[str, Any] = {
        "sources": ["a.csv"],
        "unit": "region",
        "period": "year",
        "outcome": "jobs",
        "regressors": ["grant"],
        "estimators": ["pooled_ols", "fixed_effects"],
        "inference": ["classical", "cluster"],
    }
    base.update(over)
    return base


def write_hostile_config(cwd: Path, analysis: dict[str, Any], **top: Any) -> Path:
    """``cwd/c.yaml`` with ``output_dir: out`` and one analysis named ``t``."""
    import yaml

    path = cwd / "c.yaml"
    path.write_text(
        yaml.safe_dump({"output_dir": "out", "analyses": {"t": analysis}, **top}),
        encoding="utf-8",
    )
    return path


def folder_snapshot(folder: Path) -> dict[str, tuple[bytes | str, int]]:
    """Every file and link below ``folder``: its bytes (or link target) and mode."""
    import os

    snap: dict[str, tuple[bytes | str, int]] = {}
    for path in sorted(folder.rglob("*")):
        rel = path.relative_to(folder).as_posix()
        st = path.lstat()
        if path.is_symlink():
            snap[rel] = (os.readlink(path), st.st_mode)
        elif path.is_file():
            snap[rel] = (path.read_bytes(), st.st_mode)
        else:
            snap[rel] = (b"", st.st_mode)
    return snap


# ---------------------------------------------------------------- workbooks
#
# Test fixtures only: the readers under test never write, so workbooks are written
# with openpyxl (.xlsx) and pandas' OpenDocument writer (.ods).


def workbook_bytes(rows: list[list[Any]], *, kind: str = "xlsx", sheet: str = "2024") -> bytes:
    """A one-sheet workbook holding ``rows`` (the first is the header) as its bytes."""
    import io

    buffer = io.BytesIO()
    if kind == "xlsx":
        import openpyxl

        book = openpyxl.Workbook()
        table = book.active
        assert table is not None
        table.title = sheet
        for row in rows:
            table.append(row)
        book.save(buffer)
    else:
        import pandas as pd

        frame = pd.DataFrame(rows[1:], columns=rows[0])
        frame.to_excel(buffer, sheet_name=sheet, index=False, engine="odf")
    return buffer.getvalue()


def patched_member(data: bytes, member: str, *changes: tuple[str, str]) -> bytes:
    """The zip archive ``data`` with each (old, new) replaced once in ``member``.

    Used to give a workbook what its writer cannot: a cached formula error, a merge.
    """
    import io
    import zipfile

    out = io.BytesIO()
    with zipfile.ZipFile(io.BytesIO(data)) as src, zipfile.ZipFile(out, "w") as dst:
        for info in src.infolist():
            body = src.read(info.filename)
            if info.filename == member:
                text = body.decode("utf-8")
                for old, new in changes:
                    assert old in text, f"{old!r} not in {member}"
                    text = text.replace(old, new, 1)
                body = text.encode("utf-8")
            dst.writestr(info, body)
    return out.getvalue()


def hostile_table() -> list[list[Any]]:
    """The panel of ``hostile_rows`` as workbook rows: text ids, numbers as numbers."""
    rows: list[list[Any]] = [HOSTILE_HEADER.strip().split(",")]
    for line in hostile_rows().splitlines():
        region, year, jobs, grant, coastal = line.split(",")
        rows.append([region, int(year), float(jobs), float(grant), int(coastal)])
    return rows


def refusal_message(
    cwd: Path,
    config: Path,
    *,
    whole_run: bool,
    exit_status: int,
    monkeypatch: Any,
    capsys: Any,
) -> str:
    """Run a hostile case (`panelpipe run` in a subprocess, or `check` in-process) and
    return its standard error, asserting that it was refused without a traceback."""
    from panelpipe.cli import main

    if whole_run:
        done = run_panelpipe(cwd, "run", "--config", str(config))
        message = done.stderr
        assert done.returncode != 0, message
        assert '"status": "failed"' in done.stdout
    else:
        monkeypatch.chdir(cwd)
        status = main(["check", "--config", str(config)])
        message = str(capsys.readouterr().err)
        assert status == exit_status, message
    assert "Traceback" not in message
    return message


def start_paused(
    cwd: Path, config: Path, point: str | None, mark: Path, *, cores: int | None = None
) -> subprocess.Popen[str]:
    """Start ``panelpipe run`` that pauses at fault point ``point`` (DEVELOPERS.md, "Test
    hook"): the paused process writes its id to ``mark`` and waits for SIGUSR1. The run
    gets its own process group, as a scheduler would start it."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("PANELPIPE_FAULT")}
    if point:
        env.update(PANELPIPE_FAULT=point, PANELPIPE_FAULT_MARK=str(mark))
    extra = ["--cores", str(cores)] if cores else []
    return subprocess.Popen(
        [sys.executable, "-m", "panelpipe", "run", "--config", str(config), *extra],
        cwd=cwd,
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,
    )


def wait_paused(proc: subprocess.Popen[str], mark: Path) -> None:
    """Wait until the run reaches its fault point (the mark file), or fail if it ends."""
    deadline = time.monotonic() + 600
    while not mark.exists():
        assert proc.poll() is None, proc.communicate()[1][-3000:]
        assert time.monotonic() < deadline, "the run never reached its fault point"
        time.sleep(0.05)
