"""Ingest: read one or more CSV or Parquet deliveries and stack them.

Every row keeps the file it came from and its line (CSV: the line number in the
file, header = line 1; Parquet: the row number, first row = 1), so that every
later message can point at the place to fix. Inputs are only ever read.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq

from .findings import PanelpipeError

__all__ = ["LINE", "SOURCE", "read_panel", "read_source"]

SOURCE = "_source"
LINE = "_line"


def _is_parquet(path: Path) -> bool:
    return path.suffix.lower() in {".parquet", ".pq"}


def _available_columns(path: Path) -> list[str]:
    if _is_parquet(path):
        return list(pq.read_schema(path).names)
    header = pd.read_csv(path, nrows=0, encoding="utf-8-sig")
    return [str(c) for c in header.columns]


def read_source(path: Path, columns: Sequence[str], *, unit: str) -> pd.DataFrame:
    """Read the named columns of one file, the unit column as text.

    Raises
    ------
    PanelpipeError
        If the file cannot be read or lacks a column, naming both.
    """
    try:
        available = _available_columns(path)
    except Exception as exc:  # any parser failure is the user's file to fix
        raise PanelpipeError(f"{path}: cannot read the file as a table ({exc}).") from exc
    missing = [c for c in columns if c not in available]
    if missing:
        raise PanelpipeError(
            f"{path}: column(s) {', '.join(map(repr, missing))} not found; the file has "
            f"{', '.join(map(repr, available))}. Fix the column names in the config or the file."
        )
    if _is_parquet(path):
        frame = pd.read_parquet(path, columns=list(columns))
        first_line = 1
    else:
        frame = pd.read_csv(
            path,
            usecols=list(columns),
            dtype={unit: str},
            encoding="utf-8-sig",
        )
        first_line = 2
    frame = frame[list(columns)]
    frame[unit] = frame[unit].astype("string")
    frame[SOURCE] = str(path)
    frame[LINE] = pd.RangeIndex(first_line, first_line + len(frame))
    return frame


def read_panel(paths: Sequence[Path], columns: Sequence[str], *, unit: str) -> pd.DataFrame:
    """Read every source and stack them in the order given.

    Returns
    -------
    DataFrame
        The requested columns plus ``_source`` (file path, categorical) and
        ``_line`` (line in that file), with a fresh RangeIndex.
    """
    if not paths:
        raise PanelpipeError("no source files to read.")
    frames = [read_source(Path(p), columns, unit=unit) for p in paths]
    panel = pd.concat(frames, ignore_index=True)
    panel[SOURCE] = panel[SOURCE].astype("category")
    return panel
