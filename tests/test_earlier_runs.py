"""A damaged earlier run never blocks the next one: the comparison degrades to a note.

Each case copies a complete earlier run (the ``earlier_run`` fixture), damages it
the way a colleague or a full disk might (a deleted work folder, a truncated
results.json, a missing manifest ...), or changes the analysis so that the runs
cannot be compared (a renamed unit column, quarters instead of years), then runs
the real workflow on one more year of data. The new run must succeed and say in
results.json and report.html which earlier run could not be compared and why,
and the earlier folder must stay exactly as the damage left it.
"""

from __future__ import annotations

import json
import os
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

from _support import (
    HOSTILE_HEADER,
    folder_snapshot,
    hostile_analysis,
    hostile_rows,
    run_panelpipe,
    write_hostile_config,
)

pytestmark = pytest.mark.slow


def _writable(folder: Path) -> None:
    """Give the owner write permission below ``folder`` (run files are write-protected)."""
    folder.chmod(folder.stat().st_mode | 0o200)
    for path in folder.rglob("*"):
        if not path.is_symlink():
            path.chmod(path.stat().st_mode | 0o200)


def _rmtree(folder: Path) -> None:
    for path in sorted(folder.rglob("*"), reverse=True):
        path.rmdir() if path.is_dir() and not path.is_symlink() else path.unlink()
    folder.rmdir()


def _quarterly_rows(units: int = 6) -> str:
    out = []
    for u in range(1, units + 1):
        for y in (2023, 2024):
            for q in (1, 2, 3, 4):
                out.append(
                    f"{u:03d},{y}Q{q},{10 + u + (y * q * u) % 7},{(u * 3 + q * 7) % 11 + 0.5},0"
                )
    return "\n".join(out) + "\n"


NEXT_YEAR = HOSTILE_HEADER + hostile_rows(years=range(2018, 2025))


def _run_again(
    tmp_path: Path, csv: str = NEXT_YEAR, **analysis: Any
) -> tuple[Path, dict[str, Any]]:
    """Run analysis ``t`` on new data beside the earlier run; it must succeed.

    Returns the new run folder and its results.json.
    """
    (tmp_path / "a.csv").write_text(csv, encoding="utf-8")
    config = write_hostile_config(tmp_path, hostile_analysis(**analysis))
    done = run_panelpipe(tmp_path, "run", "--config", str(config))
    assert done.returncode == 0, done.stderr[-3000:]
    assert "Traceback" not in done.stderr
    line = json.loads(done.stdout.strip().splitlines()[-1])
    assert line["status"] == "ok"
    new = tmp_path / "out" / "t" / line["run_id"]
    return new, json.loads((new / "results.json").read_text(encoding="utf-8"))


@dataclass
class Damage:
    """How the earlier run is damaged or the analysis changed, and the note expected."""

    damage: Callable[[Path], None]
    note: list[str]
    csv: str = NEXT_YEAR
    analysis: dict[str, Any] = field(default_factory=dict)
    previous_is_named: bool = True


def _write(leaf: str, data: bytes) -> Callable[[Path], None]:
    def damage(run: Path) -> None:
        (run / leaf).write_bytes(data)

    return damage


def _delete(leaf: str) -> Callable[[Path], None]:
    def damage(run: Path) -> None:
        target = run / leaf
        _rmtree(target) if target.is_dir() else target.unlink()

    return damage


def _truncate(run: Path) -> None:
    text = (run / "results.json").read_bytes()
    (run / "results.json").write_bytes(text[: len(text) // 2])


def _nothing(run: Path) -> None:
    return None


CASES: dict[str, Damage] = {
    "work-folder-deleted": Damage(_delete("work"), ["work/panel.parquet", "missing"]),
    "panel-deleted": Damage(_delete("work/panel.parquet"), ["work/panel.parquet", "missing"]),
    "panel-garbage": Damage(
        _write("work/panel.parquet", b"PAR1 not a table"), ["work/panel.parquet", "not readable"]
    ),
    "results-truncated": Damage(_truncate, ["results.json", "not valid JSON"]),
    "results-not-json": Damage(
        _write("results.json", b"\xff\xfe<html>moved</html>"), ["results.json", "not valid JSON"]
    ),
    "results-wrong-shape": Damage(
        _write("results.json", b'{"models": [1, 2], "data": "none"}'),
        ["results.json", "shape"],
    ),
    "results-a-list": Damage(_write("results.json", b"[]"), ["results.json", "shape"]),
    "manifest-missing": Damage(_delete("manifest.json"), ["manifest.json", "missing"]),
    "unit-column-renamed": Damage(
        _nothing,
        ["unit column", "'region'", "'area'"],
        csv=NEXT_YEAR.replace("region", "area", 1),
        analysis={"unit": "area"},
    ),
    "years-then-quarters": Damage(
        _nothing, ["periods", "year", "quarter"], csv=HOSTILE_HEADER + _quarterly_rows()
    ),
}


@pytest.mark.parametrize("case", list(CASES), ids=list(CASES))
def test_a_damaged_earlier_run_becomes_a_note(
    case: str, earlier_run: Callable[[], Callable[[], None]], tmp_path: Path
) -> None:
    spec = CASES[case]
    earlier_run()
    earlier = next(p for p in (tmp_path / "out" / "t").iterdir() if p.is_dir())
    _writable(earlier)
    spec.damage(earlier)
    damaged = folder_snapshot(earlier)

    new, results = _run_again(tmp_path, spec.csv, **spec.analysis)

    changes = results["changes"]
    assert changes["compared"] is False
    assert changes["run_a"] == earlier.name
    notes = " ".join(n["message"] for n in changes["notes"])
    for text in [earlier.name, *spec.note]:
        assert text in notes
    html = (new / "report.html").read_text(encoding="utf-8")
    section = html.split('<section id="changes">')[1].split("</section>")[0]
    assert earlier.name in section
    assert "could not be compared" in section
    assert "first completed run" not in section
    assert folder_snapshot(earlier) == damaged  # read, never written
    assert (tmp_path / "out" / "t" / "latest").read_text(encoding="utf-8").strip() == new.name


def test_a_garbage_latest_file_is_replaced_and_the_comparison_made(
    earlier_run: Callable[[], Callable[[], None]], tmp_path: Path
) -> None:
    check = earlier_run()
    earlier = next(p for p in (tmp_path / "out" / "t").iterdir() if p.is_dir())
    latest = tmp_path / "out" / "t" / "latest"
    os.chmod(latest, 0o644)
    latest.write_bytes(b"\x00\x01../../etc\n" * 3)

    new, results = _run_again(tmp_path)

    changes = results["changes"]
    assert changes["compared"] is True
    assert changes["run_a"] == earlier.name
    assert changes["periods_added"] == ["2024"]
    assert latest.read_text(encoding="utf-8") == new.name + "\n"
    check()


def test_an_incomplete_earlier_folder_is_never_the_previous_run(
    earlier_run: Callable[[], Callable[[], None]], tmp_path: Path
) -> None:
    """A folder without results.json or report.html (a run stopped midway) is passed over."""
    check = earlier_run()
    earlier = next(p for p in (tmp_path / "out" / "t").iterdir() if p.is_dir())
    # A newer run folder that stopped after results.json, before report.html.
    stopped = tmp_path / "out" / "t" / "0123456789abcdef"
    stopped.mkdir()
    (stopped / "results.json").write_bytes((earlier / "results.json").read_bytes())
    manifest = json.loads((earlier / "manifest.json").read_text(encoding="utf-8"))
    manifest["created"] = "2999-01-01T00:00:00+00:00"
    (stopped / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")

    _, results = _run_again(tmp_path)

    changes = results["changes"]
    assert changes["compared"] is True
    assert changes["run_a"] == earlier.name
    check()


# ---------------------------------------------------------------- panelpipe compare


@pytest.fixture(scope="module")
def three_runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Runs of analysis ``t``: 2018-2023 (``a``), 2018-2024 (``b``), and with the unit
    column renamed (``renamed``); and ``other``, a run of another analysis ``u``."""
    base = tmp_path_factory.mktemp("compare")
    analysis = hostile_analysis()
    csv = base / "a.csv"

    def run(text: str, **analyses: dict[str, Any]) -> dict[str, str]:
        csv.write_text(text, encoding="utf-8")
        config = base / "c.yaml"
        config.write_text(json.dumps({"output_dir": "out", "analyses": analyses}), encoding="utf-8")
        done = run_panelpipe(base, "run", "--config", str(config))
        assert done.returncode == 0, done.stderr[-3000:]
        lines = [json.loads(x) for x in done.stdout.strip().splitlines()]
        return {x["analysis"]: x["run_id"] for x in lines}

    first = run(HOSTILE_HEADER + hostile_rows(), t=analysis, u=analysis)
    second = run(HOSTILE_HEADER + hostile_rows(years=range(2018, 2025)), t=analysis)
    third = run(
        HOSTILE_HEADER.replace("region", "area") + hostile_rows(years=range(2018, 2025)),
        t={**analysis, "unit": "area"},
    )
    return {
        "out": base / "out",
        "a": Path("out/t") / first["t"],
        "b": Path("out/t") / second["t"],
        "renamed": Path("out/t") / third["t"],
        "other": Path("out/u") / first["u"],
    }


def _copy_runs(three_runs: dict[str, Path], tmp_path: Path) -> None:
    import shutil

    shutil.copytree(three_runs["out"], tmp_path / "out", symlinks=True)
    for folder in (tmp_path / "out").glob("*/*"):
        if folder.is_dir():
            _writable(folder)


def test_compare_reports_the_changes_of_two_sound_runs(
    three_runs: dict[str, Path], tmp_path: Path
) -> None:
    _copy_runs(three_runs, tmp_path)
    done = run_panelpipe(tmp_path, "compare", str(three_runs["a"]), str(three_runs["b"]))
    assert done.returncode == 0, done.stderr
    assert "periods added: 2024" in done.stdout


COMPARE_CASES: dict[str, tuple[Callable[[Path], None], str, list[str]]] = {
    # name: (damage to run a, which argument is at fault, texts of the message)
    "manifest-missing": (_delete("manifest.json"), "a", ["manifest.json", "is missing"]),
    "results-truncated": (_truncate, "a", ["results.json", "not valid JSON"]),
    "results-wrong-shape": (_write("results.json", b"[]"), "a", ["results.json", "shape"]),
    "panel-missing": (_delete("work/panel.parquet"), "a", ["work/panel.parquet", "missing"]),
    "not-a-run-folder": (_delete("report.html"), "a", ["not a completed run folder"]),
}


@pytest.mark.parametrize("case", list(COMPARE_CASES), ids=list(COMPARE_CASES))
def test_compare_refuses_a_damaged_run_folder_naming_it(
    case: str, three_runs: dict[str, Path], tmp_path: Path
) -> None:
    damage, _, texts = COMPARE_CASES[case]
    _copy_runs(three_runs, tmp_path)
    damage(tmp_path / three_runs["a"])
    before = folder_snapshot(tmp_path / "out")

    done = run_panelpipe(tmp_path, "compare", str(three_runs["a"]), str(three_runs["b"]))

    assert done.returncode == 2
    assert "Traceback" not in done.stderr
    assert str(three_runs["a"]) in done.stderr
    for text in texts:
        assert text in done.stderr
    assert folder_snapshot(tmp_path / "out") == before


@pytest.mark.parametrize(
    ("first", "second", "texts"),
    [
        ("a", "missing", ["is not a folder"]),
        ("a.csv", "b", ["is not a folder"]),
        ("a", "other", ["analysis 't'", "'u'"]),
        ("a", "renamed", ["unit column 'region'", "'area'"]),
    ],
    ids=["no-such-folder", "a-file", "two-analyses", "unit-column-renamed"],
)
def test_compare_refuses_runs_it_cannot_compare(
    first: str, second: str, texts: list[str], three_runs: dict[str, Path], tmp_path: Path
) -> None:
    _copy_runs(three_runs, tmp_path)
    (tmp_path / "a.csv").write_text("region,year\n", encoding="utf-8")
    paths = [str(three_runs.get(x, x)) for x in (first, second)]

    done = run_panelpipe(tmp_path, "compare", *paths)

    assert done.returncode == 2
    assert "Traceback" not in done.stderr
    for text in texts:
        assert text in done.stderr


def test_an_unreadable_older_run_is_left_out_of_the_history_with_a_note(
    earlier_run: Callable[[], Callable[[], None]], tmp_path: Path
) -> None:
    """The previous run is sound, an older one is damaged: compared, and the older one noted."""
    import dataclasses
    import shutil

    from panelpipe.changes import load_run, look_back

    check = earlier_run()
    analysis = tmp_path / "out" / "t"
    sound = next(p for p in analysis.iterdir() if p.is_dir())
    older = analysis / "00000000000000aa"
    shutil.copytree(sound, older)
    _writable(older)
    manifest = json.loads((older / "manifest.json").read_text(encoding="utf-8"))
    manifest["created"] = "2001-01-01T00:00:00+00:00"
    (older / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    _truncate(older)
    damaged = folder_snapshot(older)
    current = dataclasses.replace(load_run(sound), run_id="ffffffffffffffff")

    changes, history = look_back(analysis, current)

    assert changes is not None and changes["compared"] is True
    assert changes["run_a"] == sound.name
    assert [r["run_id"] for r in history] == [sound.name]
    (note,) = changes["notes"]
    assert note["run_id"] == older.name and note["file"] == "results.json"
    assert "left out of the history" in note["message"]
    assert folder_snapshot(older) == damaged
    check()
