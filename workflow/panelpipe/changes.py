"""Changes: what differs between two runs of the same analysis.

Periods and units added or gone, historical cells revised, and estimates that
moved, with the move measured against its sampling noise.

Earlier run folders are read, never written, and may have been damaged since
they were made (a deleted ``work/`` folder, a truncated results.json, a changed
configuration). Reading one checks every file it needs and raises
`DamagedRunError`, which names the folder, the file and the problem: ``panelpipe
compare`` refuses with it, and the report step turns it into a note so that a
damaged earlier run never stops the current one.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .distributions import norm_ppf
from .findings import PanelpipeError
from .periods import label_of
from .report import _fmt, _pvalue

__all__ = [
    "DamagedRunError",
    "RunData",
    "compare_runs",
    "diff_runs",
    "incompatibility",
    "load_run",
    "look_back",
    "render_changes",
]

_SHOWN = 10
_RUN_ID = re.compile(r"[0-9a-f]{16}")


class DamagedRunError(PanelpipeError):
    """A run folder whose file ``leaf`` is missing, unreadable or not what a run writes."""

    def __init__(self, folder: Path, leaf: str, problem: str) -> None:
        super().__init__(f"{folder}: {leaf} {problem}")
        self.folder, self.leaf, self.problem = Path(folder), leaf, problem


@dataclass(frozen=True)
class RunData:
    """What a comparison needs of one run.

    Parameters
    ----------
    run_id
        The run's id (its folder's name).
    results
        Its results.json document.
    settings
        The analysis settings it ran with (manifest.json's ``settings``).
    created
        When it was made (ISO 8601, UTC).
    frequency
        The frequency of its periods (``year``, ``quarter`` ...); empty when not read.
    panel
        Its validated panel (periods as ordinals on ``frequency``); None when not read.
    """

    run_id: str
    results: Mapping[str, Any]
    settings: Mapping[str, Any]
    created: str
    frequency: str = ""
    panel: pd.DataFrame | None = None


def _read_object(folder: Path, leaf: str) -> dict[str, Any]:
    """A JSON object from ``folder/leaf``, or `DamagedRunError` saying what is wrong."""
    try:
        raw = (folder / leaf).read_bytes()
    except FileNotFoundError:
        raise DamagedRunError(folder, leaf, "is missing") from None
    except OSError as err:
        raise DamagedRunError(folder, leaf, f"cannot be read ({err.strerror})") from None
    try:
        doc = json.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise DamagedRunError(folder, leaf, "is not valid JSON (not UTF-8 text)") from None
    except json.JSONDecodeError as err:
        problem = f"is not valid JSON (line {err.lineno}, column {err.colno}: {err.msg})"
        raise DamagedRunError(folder, leaf, problem) from None
    except (ValueError, RecursionError):
        raise DamagedRunError(folder, leaf, "is not valid JSON") from None
    if not isinstance(doc, dict):
        raise DamagedRunError(folder, leaf, "does not have the expected shape (not a JSON object)")
    return doc


def _is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


def _results_problem(doc: Mapping[str, Any]) -> str | None:
    """What makes ``doc`` unlike a results.json, or None."""
    for key, kind in (("run_id", str), ("analysis", str), ("data", dict), ("models", dict)):
        if not isinstance(doc.get(key), kind):
            return f"has no {key!r} {'text' if kind is str else 'object'}"
    if not isinstance(doc.get("tests", {}), dict):
        return "has a 'tests' entry that is not an object"
    for key, model in doc["models"].items():
        where = f"models.{key}"
        if not isinstance(model, dict) or not isinstance(model.get("headline_inference"), str):
            return f"has no 'headline_inference' text in {where}"
        params, errors = model.get("params"), model.get("std_errors")
        if not isinstance(params, dict) or not all(map(_is_number, params.values())):
            return f"has no numeric 'params' in {where}"
        if not isinstance(errors, dict) or not all(
            isinstance(t, dict) and all(v is None or _is_number(v) for v in t.values())
            for t in errors.values()
        ):
            return f"has no numeric 'std_errors' in {where}"
    return None


def _manifest_problem(doc: Mapping[str, Any]) -> str | None:
    """What makes ``doc`` unlike a manifest.json, or None."""
    settings = doc.get("settings")
    if not isinstance(settings, dict):
        return "has no 'settings' object"
    for key in ("unit", "period"):
        if not isinstance(settings.get(key), str):
            return f"has no {key!r} column in its settings"
    level = settings.get("level")
    if not isinstance(level, (int, float)) or isinstance(level, bool) or not 0 < level < 1:
        return "has no confidence 'level' between 0 and 1 in its settings"
    if _created(doc.get("created")) is None:
        return "has no 'created' time"
    return None


def _created(value: Any) -> dt.datetime | None:
    """A manifest's creation time, or None when it is not an ISO 8601 time."""
    if not isinstance(value, str):
        return None
    try:
        when = dt.datetime.fromisoformat(value)
    except ValueError:
        return None
    return when if when.tzinfo else when.replace(tzinfo=dt.timezone.utc)


def load_run(folder: Path, *, panel: bool = True) -> RunData:
    """Read a completed run folder, checking every file a comparison uses.

    Parameters
    ----------
    folder
        ``<output_dir>/<analysis>/<run_id>``.
    panel
        Also read the validated panel and its period frequency (``work/``).

    Raises
    ------
    DamagedRunError
        Naming the folder, the file and what is wrong with it.
    """
    folder = Path(folder)
    results = _read_object(folder, "results.json")
    problem = _results_problem(results)
    if problem:
        raise DamagedRunError(
            folder, "results.json", f"does not have the expected shape ({problem})"
        )
    manifest = _read_object(folder, "manifest.json")
    problem = _manifest_problem(manifest)
    if problem:
        raise DamagedRunError(
            folder, "manifest.json", f"does not have the expected shape ({problem})"
        )
    settings = manifest["settings"]
    run = RunData(results["run_id"], results, settings, manifest["created"])
    if not panel:
        return run
    leaf = "work/panel.parquet"
    try:
        table = pd.read_parquet(folder / leaf)
    except FileNotFoundError:
        raise DamagedRunError(folder, leaf, "is missing") from None
    except (OSError, ValueError) as err:
        raise DamagedRunError(folder, leaf, f"is not readable as a table ({err})") from None
    summary = _read_object(folder, "work/validation.json").get("summary")
    frequency = summary.get("frequency") if isinstance(summary, dict) else None
    if not isinstance(frequency, str):
        raise DamagedRunError(folder, "work/validation.json", "does not say the periods' frequency")
    for key in ("unit", "period"):
        if settings[key] not in table.columns:
            raise DamagedRunError(folder, leaf, f"has no {key} column {settings[key]!r}")
    if not pd.api.types.is_integer_dtype(table[settings["period"]]):
        raise DamagedRunError(
            folder, leaf, f"has no whole-number periods in {settings['period']!r}"
        )
    return RunData(results["run_id"], results, settings, manifest["created"], frequency, table)


def incompatibility(a: RunData, b: RunData, names: tuple[str, str]) -> str | None:
    """Why runs ``a`` and ``b`` (called ``names`` in the message) cannot be compared, or None."""
    if a.results["analysis"] != b.results["analysis"]:
        return (
            f"{names[0]} is analysis {a.results['analysis']!r}, {names[1]} is "
            f"{b.results['analysis']!r}"
        )
    for key in ("unit", "period"):
        if a.settings[key] != b.settings[key]:
            return (
                f"{names[0]} used {key} column {a.settings[key]!r}, {names[1]} uses "
                f"{b.settings[key]!r}"
            )
    if a.frequency != b.frequency:
        return (
            f"the periods of {names[0]} are on a {a.frequency} frequency, those of {names[1]} "
            f"on a {b.frequency} frequency"
        )
    return None


def diff_runs(a: RunData, b: RunData) -> dict[str, Any]:
    """Changes from run A (earlier) to run B (later), from their results and panels.

    Both runs must carry their panels and be comparable (`incompatibility` is None).
    A coefficient's move is compared with sqrt(se_A² + se_B²) under run B's
    headline inference; this treats the two estimates as independent, which
    overstates the noise when the samples overlap, so a move flagged as larger
    than noise is a conservative signal (common practice, no source). The
    threshold (``noise_threshold``) is the two-sided normal quantile of run B's
    confidence level, the scale of a difference of two estimates over its
    combined standard error.
    """
    if a.panel is None or b.panel is None:
        raise ValueError("diff_runs needs both runs' panels (load_run(..., panel=True))")
    panel_a, panel_b, settings = a.panel, b.panel, b.settings
    unit, period = settings["unit"], settings["period"]
    value_cols = [
        c
        for c in dict.fromkeys([settings.get("outcome"), *settings.get("regressors", ())])
        if isinstance(c, str) and c in panel_a.columns and c in panel_b.columns
    ]
    units_a, units_b = set(panel_a[unit]), set(panel_b[unit])
    periods_a, periods_b = set(panel_a[period]), set(panel_b[period])
    keys = [unit, period]
    old = panel_a[[*keys, *value_cols]].melt(keys, var_name="column", value_name="old")
    new = panel_b[[*keys, *value_cols]].melt(keys, var_name="column", value_name="new")
    both = old.merge(new, on=[*keys, "column"])
    same = (both["old"] == both["new"]) | (both["old"].isna() & both["new"].isna())
    revised = both.loc[~same].copy()
    revised["size"] = (revised["new"] - revised["old"]).abs().fillna(np.inf)
    revised = revised.sort_values("size", ascending=False, kind="stable")
    revisions = [
        {
            "unit": str(u),
            "period": label_of(int(t), b.frequency),
            "column": str(c),
            "old": None if pd.isna(o) else float(o),
            "new": None if pd.isna(n) else float(n),
        }
        for u, t, c, o, n in zip(
            revised[unit].head(_SHOWN),
            revised[period].head(_SHOWN),
            revised["column"].head(_SHOWN),
            revised["old"].head(_SHOWN),
            revised["new"].head(_SHOWN),
            strict=True,
        )
    ]
    threshold = float(norm_ppf(0.5 + float(settings["level"]) / 2))
    moved = []
    for key, mb in b.results["models"].items():
        ma = a.results["models"].get(key)
        if not ma:
            continue
        inf = mb["headline_inference"]
        for term, vb in mb["params"].items():
            va = ma["params"].get(term)
            if va is None:
                continue
            se_a = ma["std_errors"].get(inf, {}).get(term)
            se_b = mb["std_errors"].get(inf, {}).get(term)
            noise = math.hypot(se_a, se_b) if se_a is not None and se_b is not None else None
            z = (vb - va) / noise if noise else None
            moved.append(
                {
                    "model": key,
                    "term": term,
                    "old": va,
                    "new": vb,
                    "change": vb - va,
                    "z": z,
                    "beyond_noise": bool(z is not None and abs(z) > threshold),
                }
            )
    tests = {}
    tests_a = a.results.get("tests", {})
    for key, tb in b.results.get("tests", {}).items():
        ta = tests_a.get(key)
        ta = ta if isinstance(ta, dict) else {}
        tests[key] = {
            "name": tb.get("name", key),
            "old_p": ta.get("p_value"),
            "new_p": tb.get("p_value"),
            "old_statistic": ta.get("statistic"),
            "new_statistic": tb.get("statistic"),
        }
    return {
        "analysis": b.results["analysis"],
        "run_a": a.run_id,
        "run_b": b.run_id,
        "periods_added": [label_of(int(p), b.frequency) for p in sorted(periods_b - periods_a)],
        "periods_gone": [label_of(int(p), b.frequency) for p in sorted(periods_a - periods_b)],
        "units_added": sorted(map(str, units_b - units_a)),
        "units_gone": sorted(map(str, units_a - units_b)),
        "revised_cells": len(revised),
        "revisions": revisions,
        "noise_threshold": threshold,
        "estimates": moved,
        "tests": tests,
    }


def _is_complete(folder: Path) -> bool:
    """A run folder whose report step finished (report.html is written last)."""
    return (folder / "results.json").is_file() and (folder / "report.html").is_file()


def compare_runs(run_a: Path, run_b: Path) -> dict[str, Any]:
    """Changes between two completed run folders (see `diff_runs`).

    Raises
    ------
    PanelpipeError
        When either is not a completed run folder, a file of it is missing or
        damaged (naming the folder and the file), or the runs cannot be compared.
    """
    runs = []
    for folder in (Path(run_a), Path(run_b)):
        if not folder.is_dir():
            raise PanelpipeError(
                f"{folder} is not a folder; give two run folders, <output_dir>/<analysis>/<run_id>."
            )
        if not _is_complete(folder):
            raise PanelpipeError(
                f"{folder}: not a completed run folder (no results.json and report.html); give "
                "two run folders, <output_dir>/<analysis>/<run_id>, of runs that finished."
            )
        try:
            runs.append(load_run(folder))
        except DamagedRunError as err:
            raise PanelpipeError(
                f"{err}; that run folder is damaged, so it cannot be compared. Rerun its "
                "analysis with the same data and settings into a fresh output folder to "
                "rebuild it."
            ) from None
    problem = incompatibility(runs[0], runs[1], names=(str(run_a), str(run_b)))
    if problem:
        raise PanelpipeError(
            f"cannot compare {run_a} with {run_b}: {problem}. Compare two runs of the same "
            "analysis with the same unit and period columns."
        )
    return diff_runs(runs[0], runs[1])


def _when(folder: Path) -> dt.datetime:
    """When a run was made: its manifest's time, else the time results.json was written."""
    try:
        manifest = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
        when = _created(manifest.get("created")) if isinstance(manifest, dict) else None
    except (OSError, ValueError, RecursionError):
        when = None
    if when is None:
        stamp = (folder / "results.json").stat().st_mtime
        when = dt.datetime.fromtimestamp(stamp, dt.timezone.utc)
    return when


def look_back(
    analysis_dir: Path, current: RunData
) -> tuple[dict[str, Any] | None, list[dict[str, Any]]]:
    """The changes since the previous run and the history of the runs before ``current``.

    The previous run is the newest completed run folder of the analysis (a folder
    left without report.html by a stopped run never is). When it cannot be read
    or compared, the changes say so (``compared`` false) instead of comparing
    with an older run; earlier runs that cannot be read are left out of the
    history. Either way ``notes`` says which run and why.

    Returns
    -------
    changes
        None for the first completed run; otherwise `diff_runs` against the
        previous run with ``compared`` and ``notes``, or, when the previous run
        could not be compared, only ``analysis``, ``run_a``, ``run_b``,
        ``compared`` and ``notes``.
    history
        Every readable earlier run, oldest first: ``run_id``, ``created``,
        ``last_period`` and ``models``.
    """
    analysis_dir = Path(analysis_dir)
    folders = sorted(
        (
            f
            for f in (analysis_dir.iterdir() if analysis_dir.is_dir() else ())
            if _RUN_ID.fullmatch(f.name)
            and f.name != current.run_id
            and f.is_dir()
            and not f.is_symlink()
            and _is_complete(f)
        ),
        key=_when,
    )
    if not folders:
        return None, []
    notes: list[dict[str, Any]] = []
    runs: list[dict[str, Any]] = []
    previous = folders[-1]
    for folder in folders:
        try:
            meta = load_run(folder, panel=False)
        except DamagedRunError as err:
            if folder != previous:
                notes.append(_note(err, "is left out of the history of estimates"))
            continue
        runs.append(
            {
                "run_id": meta.run_id,
                "created": meta.created,
                "last_period": meta.results["data"].get("last_period"),
                "models": meta.results["models"],
            }
        )
    changes: dict[str, Any] = {
        "analysis": current.results["analysis"],
        "run_a": previous.name,
        "run_b": current.run_id,
        "compared": False,
    }
    try:
        earlier = load_run(previous)
    except DamagedRunError as err:
        notes.insert(0, _note(err, "could not be compared with this run"))
        return {**changes, "notes": notes}, runs
    problem = incompatibility(earlier, current, names=("that run", "this run"))
    if problem:
        note = {
            "run_id": previous.name,
            "file": "",
            "message": f"The previous run {previous.name} could not be compared with this run: "
            f"{problem}.",
        }
        return {**changes, "notes": [note, *notes]}, runs
    return {**diff_runs(earlier, current), "compared": True, "notes": notes}, runs


def _note(err: DamagedRunError, what: str) -> dict[str, Any]:
    return {
        "run_id": err.folder.name,
        "file": err.leaf,
        "message": f"The earlier run {err.folder.name} {what}: its {err.leaf} {err.problem}.",
    }


def render_changes(ch: dict[str, Any]) -> str:
    """The changes as text for the terminal."""

    def listing(items: list[str]) -> str:
        return (
            ", ".join(items[:_SHOWN])
            + (f" and {len(items) - _SHOWN} more" if len(items) > _SHOWN else "")
            if items
            else "none"
        )

    lines = [
        f"{ch['analysis']}: run {ch['run_a']} → run {ch['run_b']}",
        f"  periods added: {listing(ch['periods_added'])}",
        f"  periods gone:  {listing(ch['periods_gone'])}",
        f"  units added:   {listing(ch['units_added'])}",
        f"  units gone:    {listing(ch['units_gone'])}",
        f"  historical cells revised: {ch['revised_cells']}",
    ]
    for r in ch["revisions"]:
        lines.append(
            f"    {r['unit']} {r['period']} {r['column']}: {_fmt(r['old'])} → {_fmt(r['new'])}"
        )
    lines.append(
        f"  estimates (change; |z| > {ch['noise_threshold']:.2f} marked as beyond sampling noise):"
    )
    for e in ch["estimates"]:
        mark = "  ◆ beyond noise" if e["beyond_noise"] else ""
        z = f"z {e['z']:+.2f}" if e["z"] is not None else "z –"
        lines.append(
            f"    {e['model']:<28} {e['term']:<20} {_fmt(e['old']):>11} → {_fmt(e['new']):>11}"
            f"  ({z}){mark}"
        )
    for key, t in ch["tests"].items():
        name = t.get("name", key)
        lines.append(f"  {name}: p {_pvalue(t['old_p'])} → {_pvalue(t['new_p'])}")
    return "\n".join(lines)
