"""Hostile cases for run identity, sources, output folders, locks and ``latest``.

Each case runs the real command line next to a complete earlier run (the
``earlier_run`` fixture) and checks the exit status, the message, that no
traceback is shown and that the earlier run folder stays byte-identical.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import pytest

from _support import (
    HOSTILE_HEADER,
    hostile_analysis,
    hostile_rows,
    run_panelpipe,
    write_hostile_config,
)

pytestmark = pytest.mark.slow

Checker = Callable[[], Callable[[], None]]


def _setup(cwd: Path, *, top: dict | None = None, **over: object) -> Path:
    """``a.csv`` as the earlier run read it, and a config of the analysis ``t``."""
    (cwd / "a.csv").write_text(HOSTILE_HEADER + hostile_rows(), encoding="utf-8")
    return write_hostile_config(cwd, hostile_analysis(**over), **(top or {}))


def _earlier_id(cwd: Path) -> str:
    return next(p.name for p in (cwd / "out" / "t").iterdir() if p.is_dir())


def _latest(cwd: Path) -> str:
    return (cwd / "out" / "t" / "latest").read_text(encoding="utf-8").strip()


def _lines(result: subprocess.CompletedProcess[str]) -> list[dict]:
    return [json.loads(line) for line in result.stdout.splitlines() if line.startswith("{")]


def _refused(result: subprocess.CompletedProcess[str], *phrases: str) -> None:
    assert result.returncode != 0, result.stdout
    assert "Traceback" not in result.stderr, result.stderr[-3000:]
    for phrase in phrases:
        assert phrase in result.stderr, result.stderr[-3000:]


def test_a_changed_reading_option_of_one_source_is_a_new_run(
    earlier_run: Checker, tmp_path: Path
) -> None:
    check = earlier_run()
    earlier = _earlier_id(tmp_path)
    config = _setup(tmp_path, sources=[{"path": "a.csv", "missing": ["-"]}])
    result = run_panelpipe(tmp_path, "run", "--config", str(config))
    assert result.returncode == 0, result.stderr[-3000:]
    (line,) = _lines(result)
    assert line["status"] == "ok" and line["run_id"] != earlier
    assert _latest(tmp_path) == line["run_id"]
    check()


def test_a_glob_that_matches_a_folder_is_refused(earlier_run: Checker, tmp_path: Path) -> None:
    check = earlier_run()
    config = _setup(tmp_path, sources=["*.csv"])
    (tmp_path / "b.csv").mkdir()
    result = run_panelpipe(tmp_path, "run", "--config", str(config))
    _refused(result, "'b.csv' (matched by '*.csv') is a folder; only regular files")
    assert _latest(tmp_path) == _earlier_id(tmp_path)
    check()


def test_a_dangling_link_is_refused(earlier_run: Checker, tmp_path: Path) -> None:
    check = earlier_run()
    config = _setup(tmp_path, sources=["*.csv"])
    os.symlink("withdrawn.csv", tmp_path / "b.csv")
    result = run_panelpipe(tmp_path, "run", "--config", str(config))
    _refused(result, "'b.csv' (matched by '*.csv') is a link to 'withdrawn.csv', which does not")
    check()


def test_a_named_pipe_is_refused_without_waiting(earlier_run: Checker, tmp_path: Path) -> None:
    check = earlier_run()
    config = _setup(tmp_path, sources=["*.csv"])
    os.mkfifo(tmp_path / "b.csv")
    # Nothing ever writes to the pipe: a run that opened it would block for ever.
    result = subprocess.run(
        [sys.executable, "-m", "panelpipe", "run", "--config", str(config)],
        cwd=tmp_path,
        text=True,
        capture_output=True,
        timeout=120,
    )
    _refused(result, "'b.csv' (matched by '*.csv') is a named pipe")
    check()


def _unreadable(tmp_path: Path) -> Path:
    """A regular file this user cannot read (as root: a write-only kernel file)."""
    if os.geteuid() != 0:
        path = tmp_path / "secret.csv"
        path.write_text(HOSTILE_HEADER, encoding="utf-8")
        path.chmod(0)
        return path
    for candidate in ("/sys/bus/pci/rescan", "/sys/bus/pci/drivers_probe"):
        try:
            open(candidate, "rb").close()
        except PermissionError:
            return Path(candidate)
        except OSError:
            continue
    pytest.skip("no unreadable regular file available to root on this machine")


def test_an_unreadable_source_is_refused(earlier_run: Checker, tmp_path: Path) -> None:
    check = earlier_run()
    config = _setup(tmp_path, sources=["*.csv"])
    os.symlink(_unreadable(tmp_path), tmp_path / "b.csv")
    result = run_panelpipe(tmp_path, "run", "--config", str(config))
    _refused(result, "b.csv: cannot be read (Permission denied)")
    check()


def test_an_output_folder_that_is_a_file_is_refused(earlier_run: Checker, tmp_path: Path) -> None:
    check = earlier_run()
    config = _setup(tmp_path, top={"output_dir": "published"})
    (tmp_path / "published").write_text("not a folder\n", encoding="utf-8")
    result = run_panelpipe(tmp_path, "run", "--config", str(config))
    _refused(result, "the output folder", "published is a file; set output_dir to a folder")
    assert (tmp_path / "published").read_text(encoding="utf-8") == "not a folder\n"
    check()


def test_a_read_only_output_folder_is_refused(earlier_run: Checker, tmp_path: Path) -> None:
    check = earlier_run()
    if os.geteuid() != 0:
        folder = tmp_path / "readonly"
        folder.mkdir()
        folder.chmod(0o555)
    elif Path("/sys/kernel").is_dir():
        folder = Path("/sys/kernel")  # not writable, even by root
    else:
        pytest.skip("no folder this user cannot write to")
    config = _setup(tmp_path, top={"output_dir": str(folder)})
    result = run_panelpipe(tmp_path, "run", "--config", str(config))
    _refused(result, f"cannot write to the output folder {folder}", "choose a writable output_dir")
    check()


def test_dry_run_says_unchanged_or_planned_truthfully(earlier_run: Checker, tmp_path: Path) -> None:
    check = earlier_run()
    config = _setup(tmp_path)
    same = run_panelpipe(tmp_path, "run", "--config", str(config), "--dry-run")
    assert same.returncode == 0, same.stderr[-3000:]
    assert [line["status"] for line in _lines(same)] == ["unchanged"]
    config = _setup(tmp_path, sources=[{"path": "a.csv", "decimal": ","}])
    new = run_panelpipe(tmp_path, "run", "--config", str(config), "--dry-run")
    assert new.returncode == 0, new.stderr[-3000:]
    (line,) = _lines(new)
    assert line["status"] == "planned" and line["report"] is None
    assert not (tmp_path / "out" / "t" / line["run_id"]).exists()
    check()


def test_without_config_it_names_the_one_it_uses_or_refuses(
    earlier_run: Checker, tmp_path: Path
) -> None:
    check = earlier_run()
    result = run_panelpipe(tmp_path, "run")
    _refused(result, "no --config given", "pass --config FILE")
    assert _lines(result) == []
    (tmp_path / "config").mkdir()
    _setup(tmp_path).rename(tmp_path / "config" / "config.yaml")
    local = run_panelpipe(tmp_path, "run")
    assert local.returncode == 0, local.stderr[-3000:]
    assert f"using the configuration {tmp_path / 'config' / 'config.yaml'}" in local.stderr
    assert [line["status"] for line in _lines(local)] == ["unchanged"]
    check()


def test_a_completed_run_with_a_deleted_file_is_not_unchanged(
    earlier_run: Checker, tmp_path: Path
) -> None:
    earlier_run()  # the damage below is the case itself: the rest must stay as it was
    from _support import folder_snapshot

    folder = tmp_path / "out" / "t" / _earlier_id(tmp_path)
    (folder / "results.json").unlink()
    before = folder_snapshot(folder), _latest(tmp_path)
    result = run_panelpipe(tmp_path, "run", "--config", str(_setup(tmp_path)))
    _refused(result, "was changed after it completed", "results.json is missing", "move the folder")
    assert (folder_snapshot(folder), _latest(tmp_path)) == before


def test_a_lost_latest_pointer_is_restored_by_an_unchanged_rerun(
    earlier_run: Checker, tmp_path: Path
) -> None:
    check = earlier_run()
    latest = tmp_path / "out" / "t" / "latest"
    latest.unlink()  # as if the run was killed after its report and before `latest`
    config = _setup(tmp_path)
    result = run_panelpipe(tmp_path, "run", "--config", str(config))
    assert result.returncode == 0, result.stderr[-3000:]
    assert [line["status"] for line in _lines(result)] == ["unchanged"]
    assert _latest(tmp_path) == _earlier_id(tmp_path)
    latest.write_text("0123456789abcdef\n", encoding="utf-8")  # naming some other run
    again = run_panelpipe(tmp_path, "run", "--config", str(config))
    assert again.returncode == 0, again.stderr[-3000:]
    assert _latest(tmp_path) == _earlier_id(tmp_path)
    check()


def test_the_lock_of_a_live_snakemake_is_never_removed(
    earlier_run: Checker, tmp_path: Path
) -> None:
    check = earlier_run()
    config = _setup(tmp_path, sources=[{"path": "a.csv", "encoding": "latin-1"}])
    locks = tmp_path / ".snakemake" / "locks"
    locks.mkdir(parents=True)
    (locks / "0.output.lock").write_text("/elsewhere/out/report.html\n", encoding="utf-8")
    # A Snakemake started by hand in the same folder (for another output folder).
    fake = tmp_path / "bin" / "snakemake"
    fake.parent.mkdir()
    fake.write_text("import sys\nprint('ready', flush=True)\nsys.stdin.read()\n")
    holder = subprocess.Popen(
        [sys.executable, str(fake)],
        cwd=tmp_path,
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "ready"
        result = run_panelpipe(tmp_path, "run", "--config", str(config))
    finally:
        holder.communicate("")
    _refused(result, f"Snakemake (process {holder.pid}) is running in {tmp_path}")
    assert (locks / "0.output.lock").is_file()
    check()


def test_a_second_run_in_the_same_folder_stops_at_once(
    earlier_run: Checker, tmp_path: Path
) -> None:
    check = earlier_run()
    config = _setup(tmp_path, top={"output_dir": "elsewhere"})
    holder = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "import sys; from pathlib import Path; from panelpipe.runs import workdir_lock\n"
            "with workdir_lock(Path.cwd()):\n    print('held', flush=True); sys.stdin.read()",
        ],
        cwd=tmp_path,
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "held"
        result = run_panelpipe(tmp_path, "run", "--config", str(config))
    finally:
        holder.communicate("")
    _refused(result, f"another panelpipe run (process {holder.pid}) is running in {tmp_path}")
    assert not (tmp_path / "elsewhere" / "t").exists()
    check()
