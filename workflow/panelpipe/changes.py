"""Changes: what differs between two runs of the same analysis.

Periods and units added or gone, historical cells revised, and estimates that
moved, with the move measured against its sampling noise.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import pandas as pd

from .findings import PanelpipeError

__all__ = ["compare_runs", "render_changes"]

_SHOWN = 10


def _load(run_dir: Path) -> tuple[dict[str, Any], dict[str, Any], pd.DataFrame]:
    results = run_dir / "results.json"
    if not results.is_file():
        raise PanelpipeError(f"{run_dir}: not a completed run folder (no results.json).")
    doc = json.loads(results.read_text(encoding="utf-8"))
    manifest = json.loads((run_dir / "manifest.json").read_text(encoding="utf-8"))
    panel = pd.read_parquet(run_dir / "work" / "panel.parquet")
    return doc, manifest, panel


def compare_runs(run_a: Path, run_b: Path) -> dict[str, Any]:
    """Changes from run A (earlier) to run B (later).

    A coefficient's move is compared with sqrt(se_A² + se_B²) under each run's
    headline inference; this treats the two estimates as independent, which
    overstates the noise when the samples overlap, so a move flagged as larger
    than noise is a conservative signal (common practice, no source).
    """
    doc_a, _, panel_a = _load(Path(run_a))
    doc_b, man_b, panel_b = _load(Path(run_b))
    s = man_b["settings"]
    unit, period = s["unit"], s["period"]
    value_cols = [
        c
        for c in dict.fromkeys([s["outcome"], *s["regressors"]])
        if c in panel_a.columns and c in panel_b.columns
    ]
    units_a, units_b = set(panel_a[unit]), set(panel_b[unit])
    periods_a, periods_b = set(panel_a[period]), set(panel_b[period])
    merged = panel_a[[unit, period, *value_cols]].merge(
        panel_b[[unit, period, *value_cols]], on=[unit, period], suffixes=("_a", "_b")
    )
    revisions = []
    for col in value_cols:
        a, b = merged[f"{col}_a"], merged[f"{col}_b"]
        changed = ~((a == b) | (a.isna() & b.isna()))
        for _, row in merged.loc[changed].iterrows():
            old, new = row[f"{col}_a"], row[f"{col}_b"]
            revisions.append(
                {
                    "unit": str(row[unit]),
                    "period": str(row[period]),
                    "column": col,
                    "old": None if pd.isna(old) else float(old),
                    "new": None if pd.isna(new) else float(new),
                }
            )
    revisions.sort(key=lambda r: -abs((r["new"] or 0.0) - (r["old"] or 0.0)))
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
            noise = math.sqrt(se_a**2 + se_b**2) if se_a is not None and se_b is not None else None
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
        "revised_cells": len(revisions),
        "revisions": revisions[:_SHOWN],
        "estimates": moved,
        "tests": tests,
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
