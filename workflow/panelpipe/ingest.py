"""Ingest: read one or more CSV or Parquet deliveries and stack them.

Every row keeps the file it came from and its line (CSV: the line number in the
file, header = line 1, assuming no quoted field spans lines; Parquet: the row
number, first row = 1), so that every later message can point at the place to
fix. Inputs are only ever read. CSV files are parsed by pyarrow (multithreaded);
identifier and period columns are read as text so that nothing is lost
(leading zeros, period formats) before validation types them.
"""

from __future__ import annotations

from collections.abc import Sequence

import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from .config import SourceSpec
from .findings import PanelpipeError

__all__ = ["LINE", "SOURCE", "read_panel", "read_source"]

SOURCE = "_source"
LINE = "_line"


def _is_parquet(spec: SourceSpec) -> bool:
    return spec.path.suffix.lower() in {".parquet", ".pq"}


def _csv_options(spec: SourceSpec) -> tuple[pacsv.ReadOptions, pacsv.ParseOptions]:
    delimiter = "\t" if spec.path.suffix.lower() == ".tsv" and spec.delimiter == "," else None
    read = pacsv.ReadOptions(encoding=spec.encoding)
    parse = pacsv.ParseOptions(delimiter=delimiter or spec.delimiter, ignore_empty_lines=False)
    return read, parse


def _header(spec: SourceSpec) -> list[str]:
    if _is_parquet(spec):
        return list(pq.read_schema(spec.path).names)
    read, parse = _csv_options(spec)
    with pacsv.open_csv(spec.path, read_options=read, parse_options=parse) as reader:
        return list(reader.schema.names)


def read_source(spec: SourceSpec, columns: Sequence[str], *, text: Sequence[str]) -> pd.DataFrame:
    """Read the named columns of one file; ``text`` columns are kept as text.

    Raises
    ------
    PanelpipeError
        If the file cannot be read or lacks a column, naming both.
    """
    path = spec.path
    try:
        available = _header(spec)
    except (OSError, pa.ArrowException, UnicodeDecodeError, LookupError) as exc:
        raise PanelpipeError(
            f"{path}: cannot read the file as a table ({exc}). Check the delimiter, "
            "encoding and format ('csv' options in the config)."
        ) from exc
    renamed = {old: new for old, new in spec.rename.items() if old in available}
    unknown = sorted(set(spec.rename) - set(available))
    if unknown:
        raise PanelpipeError(
            f"{path}: 'rename' names column(s) {', '.join(map(repr, unknown))} that the file "
            f"does not have; the file has {', '.join(map(repr, available))}."
        )
    seen = [renamed.get(c, c) for c in available]
    missing = [c for c in columns if c not in seen]
    if missing:
        raise PanelpipeError(
            f"{path}: column(s) {', '.join(map(repr, missing))} not found; the file has "
            f"{', '.join(map(repr, available))}. Fix the column names in the config, or map "
            "a renamed column with 'rename' on this source."
        )
    back = {renamed.get(c, c): c for c in available}
    wanted = [back[c] for c in columns]
    try:
        if _is_parquet(spec):
            table = pq.read_table(path, columns=wanted)
            first_line = 1
        else:
            read, parse = _csv_options(spec)
            convert = pacsv.ConvertOptions(
                include_columns=wanted,
                column_types={back[c]: pa.string() for c in text},
                null_values=list(spec.missing),
                strings_can_be_null=True,
                decimal_point=spec.decimal,
            )
            table = pacsv.read_csv(
                path, read_options=read, parse_options=parse, convert_options=convert
            )
            first_line = 2
    except (OSError, pa.ArrowException, UnicodeDecodeError) as exc:
        raise PanelpipeError(
            f"{path}: cannot read the file ({exc}). Check its delimiter, encoding and "
            "quoting ('csv' options in the config)."
        ) from exc
    frame = table.rename_columns([renamed.get(c, c) for c in table.column_names]).to_pandas()
    frame = frame[list(columns)]
    for col in text:
        frame[col] = frame[col].astype("string")
    frame[SOURCE] = str(path)
    frame[LINE] = pd.RangeIndex(first_line, first_line + len(frame))
    return frame


def read_panel(
    specs: Sequence[SourceSpec], columns: Sequence[str], *, text: Sequence[str]
) -> pd.DataFrame:
    """Read every source and stack them in the order given.

    Returns
    -------
    DataFrame
        The requested columns plus ``_source`` (file path, categorical) and
        ``_line`` (line in that file), with a fresh RangeIndex.
    """
    if not specs:
        raise PanelpipeError("no source files to read.")
    frames = [read_source(spec, columns, text=text) for spec in specs]
    mixed = {c for c in columns if c not in text and len({str(f[c].dtype) for f in frames}) > 1}
    for col in mixed:  # e.g. numbers in one delivery, text in another: validation decides
        for f in frames:
            f[col] = f[col].astype("object")
    panel = pd.concat(frames, ignore_index=True)
    panel[SOURCE] = panel[SOURCE].astype("category")
    return panel
