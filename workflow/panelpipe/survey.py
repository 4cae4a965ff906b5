"""Survey: profile a CSV or Parquet file before writing a configuration.

Used by ``panelpipe inspect`` and ``panelpipe init``: columns and types,
candidate unit and period columns, balance, gaps, duplicates and missing values.
"""

from __future__ import annotations

import re
import unicodedata
from pathlib import Path
from typing import Any

import pandas as pd

from .findings import PanelpipeError

__all__ = ["analysis_name", "inspect_file", "render_profile"]

_NAME_LENGTH = 64
"""Longest analysis name the configuration schema accepts."""


def analysis_name(stem: str) -> str:
    """A safe analysis name derived from a file name (``panelpipe init``).

    The result matches the schema's name rule (``[a-z0-9][a-z0-9_-]*``, at most
    64 characters): letters are folded to ASCII where they have an ASCII form
    (``é`` -> ``e``, ``ß`` -> ``ss``), every other character becomes ``_``, and a
    name with nothing left is ``panel``.
    """
    folded = unicodedata.normalize("NFKD", stem.casefold()).encode("ascii", "ignore").decode()
    name = re.sub(r"[^a-z0-9_-]+", "_", folded)
    name = re.sub(r"_{2,}", "_", name).strip("_-")[:_NAME_LENGTH].rstrip("_-")
    return name or "panel"


def _read(path: Path) -> pd.DataFrame:
    if not path.is_file():
        raise PanelpipeError(f"{path}: no such file.")
    try:
        if path.suffix.lower() in {".parquet", ".pq"}:
            return pd.read_parquet(path)
        return pd.read_csv(path, encoding="utf-8-sig", dtype=str, keep_default_na=True)
    except Exception as exc:  # any parser failure is the user's file to fix
        raise PanelpipeError(f"{path}: cannot read the file as a table ({exc}).") from exc


def _period_like(values: pd.Series) -> bool:
    numbers = pd.to_numeric(values, errors="coerce")
    if numbers.notna().mean() < 0.99:
        return False
    whole = (numbers.dropna() % 1 == 0).all()
    return bool(whole and numbers.between(1800, 2200).all() and 1 < numbers.nunique() <= 400)


def inspect_file(
    path: Path, *, unit: str | None = None, period: str | None = None
) -> dict[str, Any]:
    """Profile a file as a panel; guess unit and period columns unless given."""
    frame = _read(Path(path))
    n = len(frame)
    columns = []
    for col in frame.columns:
        values = frame[col]
        numeric = pd.to_numeric(values, errors="coerce")
        columns.append(
            {
                "name": str(col),
                "numeric": bool(
                    values.notna().sum() and numeric.notna().sum() == values.notna().sum()
                ),
                "missing": int(values.isna().sum()),
                "distinct": int(values.nunique()),
            }
        )
    for given, what in ((unit, "unit"), (period, "period")):
        if given is not None and given not in frame.columns:
            raise PanelpipeError(
                f"{path}: {what} column {given!r} not found; the file has "
                f"{', '.join(map(repr, map(str, frame.columns)))}."
            )
    periods = [period] if period else [str(c) for c in frame.columns if _period_like(frame[c])]
    units: list[str] = []
    if unit:
        units = [unit]
    elif periods:
        p = periods[0]
        for col in frame.columns:
            if col == p or frame[col].nunique() < 2 or frame[col].nunique() == n:
                continue
            numbers = pd.to_numeric(frame[col], errors="coerce")
            if numbers.notna().all() and not (numbers % 1 == 0).all():
                continue  # measurements, not identifiers
            if not frame.duplicated([col, p]).any():
                units.append(str(col))
    profile: dict[str, Any] = {
        "file": str(path),
        "rows": n,
        "columns": columns,
        "unit_candidates": units,
        "period_candidates": periods,
    }
    if units and periods:
        u, p = units[0], periods[0]
        keys = frame[[u, p]]
        per_unit = keys.groupby(u)[p].nunique()
        all_periods = keys[p].nunique()
        span = pd.to_numeric(keys[p], errors="coerce")
        by_unit = span.groupby(keys[u]).agg(["min", "max", "count"])
        gaps = int(((by_unit["max"] - by_unit["min"] + 1) - by_unit["count"]).clip(lower=0).sum())
        profile["panel"] = {
            "unit": u,
            "period": p,
            "units": int(keys[u].nunique()),
            "periods": int(all_periods),
            "balanced": bool((per_unit == all_periods).all()),
            "complete_units": int((per_unit == all_periods).sum()),
            "duplicate_keys": int(keys.duplicated().sum()),
            "missing_keys": int(keys.isna().any(axis=1).sum()),
            "gaps": gaps,
        }
    return profile


def render_profile(profile: dict[str, Any]) -> str:
    """The profile as text for the terminal."""
    lines = [f"{profile['file']}: {profile['rows']} rows, {len(profile['columns'])} columns", ""]
    width = max(len(c["name"]) for c in profile["columns"]) if profile["columns"] else 4
    lines.append(f"  {'column'.ljust(width)}  kind     distinct  missing")
    for c in profile["columns"]:
        kind = "number" if c["numeric"] else "text"
        lines.append(
            f"  {c['name'].ljust(width)}  {kind:<7}  {c['distinct']:>8}  {c['missing']:>7}"
        )
    lines.append("")
    lines.append(
        "unit column candidates:   " + (", ".join(profile["unit_candidates"]) or "none found")
    )
    lines.append(
        "period column candidates: " + (", ".join(profile["period_candidates"]) or "none found")
    )
    panel = profile.get("panel")
    if panel:
        shape = (
            "balanced"
            if panel["balanced"]
            else (
                f"unbalanced: {panel['complete_units']} of {panel['units']} units in every period"
            )
        )
        lines += [
            "",
            f"as a panel of {panel['unit']} × {panel['period']}: {panel['units']} units, "
            f"{panel['periods']} periods, {shape}",
            f"  gaps inside units' spans: {panel['gaps']}; duplicate unit-period keys: "
            f"{panel['duplicate_keys']}; rows without a key: {panel['missing_keys']}",
        ]
    return "\n".join(lines)
