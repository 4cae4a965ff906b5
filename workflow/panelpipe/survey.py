"""Survey: profile a source file before writing a configuration.

Used by ``panelpipe inspect`` and ``panelpipe init``: columns and types,
candidate unit and period columns, balance, gaps, duplicates and missing values.
The file is read by the same readers, with the same options, as ``panelpipe run``
reads it, and a period candidate is a column that the run's period parser reads
(`panelpipe.periods.parse_periods`): years, whole-number indices, quarters,
months or dates.
"""

from __future__ import annotations

import re
import unicodedata
from typing import Any

import pandas as pd

from .config import SourceSpec, file_kind
from .findings import PanelpipeError
from .ingest import read_as_text, source_label
from .periods import parse_periods

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


def _read(spec: SourceSpec) -> pd.DataFrame:
    path = spec.path
    if not path.is_file():
        raise PanelpipeError(f"{path}: no such file.")
    kind = file_kind(path)
    if kind is None:
        raise PanelpipeError(
            f"{path}: not a kind of file panelpipe reads (see 'sources' in config/README.md)."
        )
    if kind != "workbook" and (spec.sheet is not None or spec.header_row is not None):
        raise PanelpipeError(
            f"{path}: --sheet and --header-row apply to workbooks (.xlsx, .ods) only."
        )
    return read_as_text(spec)


def _numbers(values: pd.Series, spec: SourceSpec) -> pd.Series:
    """The column's numbers as the run reads them (the source's decimal mark); NaN if not."""
    text = values.astype("string").str.strip()
    if spec.thousands:
        text = text.str.replace(spec.thousands, "", regex=False)
    if spec.decimal != ".":
        text = text.where(~text.str.contains(".", regex=False)).str.replace(
            spec.decimal, ".", regex=False
        )
    return pd.to_numeric(text, errors="coerce")


_CALENDAR = ("year", "quarter", "month", "day")
"""Period frequencies proposed first; whole-number indices only when none of these is found."""

_MAX_PERIODS = 400
"""More distinct values than this, and a column is not proposed as the period."""


def _period_frequency(values: pd.Series) -> str | None:
    """The frequency the run would read a column as, if it could be the period column."""
    present = values.dropna()
    if len(present) < 0.99 * len(values) or not 1 < present.nunique() <= _MAX_PERIODS:
        return None
    parsed = parse_periods(present)
    if parsed.mixed or parsed.frequency == "empty" or parsed.bad.mean() > 0.01:
        return None
    return parsed.frequency


def inspect_file(
    spec: SourceSpec, *, unit: str | None = None, period: str | None = None
) -> dict[str, Any]:
    """Profile a file as a panel; guess unit and period columns unless given."""
    path = spec.path
    frame = _read(spec)
    n = len(frame)
    numbers = {col: _numbers(frame[col], spec) for col in frame.columns}
    columns = []
    for col in frame.columns:
        values = frame[col]
        numeric = numbers[col]
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
    if period:
        periods = [period]
    else:
        found = {str(c): _period_frequency(frame[c]) for c in frame.columns}
        periods = [c for c, f in found.items() if f in _CALENDAR]
        periods = periods or [c for c, f in found.items() if f == "integer"]
    units: list[str] = []
    if unit:
        units = [unit]
    elif periods:
        p = periods[0]
        for col in frame.columns:
            if col == p or frame[col].nunique() < 2 or frame[col].nunique() == n:
                continue
            values = numbers[col]
            if values.notna().all() and not (values % 1 == 0).all():
                continue  # measurements, not identifiers
            if not frame.duplicated([col, p]).any():
                units.append(str(col))
    profile: dict[str, Any] = {
        "file": str(path) if spec.sheet is None else source_label(path, spec.sheet),
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
        span = parse_periods(keys[p]).ordinal.astype("Float64")
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
