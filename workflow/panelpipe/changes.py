"""Changes: what differs between two runs of the same analysis.

Periods and units added or gone, historical cells revised, and estimates that
moved, with the move measured against its sampling noise.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .findings import PanelpipeError

__all__ = ["compare_runs", "diff_runs", "history", "previous_run", "render_changes"]

_SHOWN = 10


def _load(run_dir: Path) -> tuple[dict[str, Any], dict[str, Any], pd.DataFrame]:
    results = run_dir / "results.json"
    if not results.is_file():
        raise PanelpipeError(f"{run_dir}: not a completed run folder (no results.json).")
    doc = json.loads(results.read_text(encoding="utf-8"))
    manifest = json.loads((run_dir / "manifest.json").read_text(encoding="utf-8"))
    panel = pd.read_parquet(run_dir / "work" / "panel.parquet")
    return doc, manifest, panel


def diff_runs(
    doc_a: Mapping[str, Any],
    panel_a: pd.DataFrame,
    doc_b: Mapping[str, Any],
    panel_b: pd.DataFrame,
    settings: Mapping[str, Any],
) -> dict[str, Any]:
    """Changes from run A (earlier) to run B (later), from their results and panels.

    A coefficient's move is compared with sqrt(se_A² + se_B²) under run B's
    headline inference; this treats the two estimates as independent, which
    overstates the noise when the samples overlap, so a move flagged as larger
    than noise is a conservative signal (common practice, no source).
    """
    unit, period = settings["unit"], settings["period"]
    value_cols = [
        c
        for c in dict.fromkeys([settings["outcome"], *settings["regressors"]])
        if c in panel_a.columns and c in panel_b.columns
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
            "period": str(t),
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
    moved = []
    for key, mb in doc_b["models"].items():
        ma = doc_a["models"].get(key)
        if not ma:
            continue
        inf = mb["headline_inference"]
        for term, vb in mb["params"].items():
            if term not in ma["params"]:
                continue
            va = ma["params"][term]
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
                    "beyond_noise": bool(z is not None and abs(z) > 1.96),
                }
            )
    tests = {}
    for key, tb in doc_b.get("tests", {}).items():
        ta = doc_a.get("tests", {}).get(key, {})
        tests[key] = {
            "old_p": ta.get("p_value"),
            "new_p": tb.get("p_value"),
            "old_statistic": ta.get("statistic"),
            "new_statistic": tb.get("statistic"),
        }
    return {
        "analysis": doc_b["analysis"],
        "run_a": doc_a["run_id"],
        "run_b": doc_b["run_id"],
        "periods_added": sorted(map(str, periods_b - periods_a)),
        "periods_gone": sorted(map(str, periods_a - periods_b)),
        "units_added": sorted(map(str, units_b - units_a)),
        "units_gone": sorted(map(str, units_a - units_b)),
        "revised_cells": len(revised),
        "revisions": revisions,
        "estimates": moved,
        "tests": tests,
    }


def compare_runs(run_a: Path, run_b: Path) -> dict[str, Any]:
    """Changes between two completed run folders (see `diff_runs`)."""
    doc_a, _, panel_a = _load(Path(run_a))
    doc_b, man_b, panel_b = _load(Path(run_b))
    if doc_a["analysis"] != doc_b["analysis"]:
        raise PanelpipeError(
            f"{run_a} is analysis {doc_a['analysis']!r} but {run_b} is {doc_b['analysis']!r}; "
            "compare two runs of the same analysis."
        )
    return diff_runs(doc_a, panel_a, doc_b, panel_b, man_b["settings"])


def previous_run(analysis_dir: Path, current: str) -> Path | None:
    """The newest completed run of an analysis other than ``current``, if any.

    Runs are ordered by the creation time their manifest records.
    """
    best: tuple[str, Path] | None = None
    for folder in Path(analysis_dir).iterdir() if Path(analysis_dir).is_dir() else ():
        manifest = folder / "manifest.json"
        if folder.name == current or not (folder / "results.json").is_file():
            continue
        try:
            created = json.loads(manifest.read_text(encoding="utf-8"))["created"]
        except (OSError, KeyError, ValueError):
            continue
        if best is None or created > best[0]:
            best = (created, folder)
    return best[1] if best else None


def history(analysis_dir: Path) -> list[dict[str, Any]]:
    """Every completed run of an analysis, oldest first: id, time, last period, params."""
    runs = []
    for folder in Path(analysis_dir).iterdir() if Path(analysis_dir).is_dir() else ():
        try:
            doc = json.loads((folder / "results.json").read_text(encoding="utf-8"))
            created = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))["created"]
        except (OSError, KeyError, ValueError):
            continue
        runs.append(
            {
                "run_id": doc["run_id"],
                "created": created,
                "last_period": doc["data"].get("last_period"),
                "models": doc["models"],
            }
        )
    return sorted(runs, key=lambda r: r["created"])


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
        lines.append(f"    {r['unit']} {r['period']} {r['column']}: {r['old']} → {r['new']}")
    lines.append("  estimates (change; |z| > 1.96 marked as beyond sampling noise):")
    for e in ch["estimates"]:
        mark = "  ◆ beyond noise" if e["beyond_noise"] else ""
        z = f"z {e['z']:+.2f}" if e["z"] is not None else "z –"
        lines.append(
            f"    {e['model']:<28} {e['term']:<20} {e['old']:>11.4f} → {e['new']:>11.4f}"
            f"  ({z}){mark}"
        )
    for key, t in ch["tests"].items():
        lines.append(f"  test {key}: p {t['old_p']} → {t['new_p']}")
    return "\n".join(lines)
