"""Ingest: read one or more CSV or Parquet deliveries and stack them.

Every row keeps the file it came from and its line (CSV: the physical line on
which the row's record starts, header = line 1, counting the extra lines of a
quoted field that spans lines; Parquet: the row number, first row = 1), so that
every later message can point at the place to fix. Inputs are only ever read.

CSV reading is strict, because a row lost without a word is worse than a
refusal. Quoting follows RFC 4180 (a field that starts with ``"`` is quoted, a
quote inside it is doubled, and the quoted field may span lines); a quote inside
an unquoted field is an ordinary character. A quote that never closes, text
after a closing quote, a record with more or fewer fields than the header, a
NUL byte and bytes not valid in the stated encoding are errors naming the file
and line. A blank line is a row without values (validation reports its line).
A header without data rows is an error. The record structure is found by a
vectorised scan of the file's bytes (numpy); pyarrow's multithreaded reader then
parses the values, and the two must agree on the number of rows.
Identifier and period columns are read as text so that nothing is lost (leading
zeros, period formats) before validation types them.
"""

from __future__ import annotations

import codecs
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from .config import DatabaseSpec, SourceSpec
from .database import read_database
from .findings import PanelpipeError

__all__ = ["LINE", "SOURCE", "read_panel", "read_source"]

SOURCE = "_source"
LINE = "_line"

_QUOTE, _LF, _CR = 0x22, 0x0A, 0x0D


def _is_parquet(spec: SourceSpec) -> bool:
    return spec.path.suffix.lower() in {".parquet", ".pq"}


def _delimiter(spec: SourceSpec) -> str:
    return "\t" if spec.path.suffix.lower() == ".tsv" and spec.delimiter == "," else spec.delimiter


def _utf8_bytes(spec: SourceSpec) -> bytes:
    """The file's bytes (decompressed) as UTF-8 without a byte-order mark.

    Raises
    ------
    PanelpipeError
        If the file cannot be read, is empty, or holds bytes not valid in its
        encoding or a NUL byte (naming the line).
    """
    path = spec.path
    try:
        with pa.input_stream(str(path), compression="detect") as stream:
            data: bytes = stream.read()
    except (OSError, pa.ArrowException) as exc:
        raise PanelpipeError(f"{path}: cannot read the file ({exc}).") from exc
    encoding = codecs.lookup(spec.encoding).name
    if not (encoding == "utf-8" and data.isascii()):  # ASCII is valid UTF-8: skip the decode
        try:
            # Decoding checks every byte, also in columns the analysis does not use: a
            # byte that is wrong anywhere is the sign of a damaged delivery.
            text = data.decode(encoding)
        except UnicodeDecodeError as exc:
            line = data[: exc.start].decode(encoding, errors="replace").count("\n") + 1
            raise PanelpipeError(
                f"{path} line {line}: bytes {data[exc.start : exc.end]!r} are not valid "
                f"{spec.encoding}. Set the 'encoding' option (under csv, or on this source) "
                "to the file's encoding, e.g. latin-1 or cp1252, or save the file as UTF-8."
            ) from exc
        if encoding != "utf-8":
            data = text.encode("utf-8")
        del text
    data = data.removeprefix(codecs.BOM_UTF8)
    if not data or data.isspace():
        raise PanelpipeError(
            f"{path}: the file is empty (not even a header line); remove it from sources "
            "or deliver it again."
        )
    nul = data.find(b"\0")
    if nul >= 0:
        line = data.count(b"\n", 0, nul) + 1
        raise PanelpipeError(
            f"{path} line {line}: a NUL byte, which a CSV file does not hold: the file is "
            "damaged or in another encoding (set 'encoding', e.g. utf-16). Deliver it again."
        )
    return data


def _line_ends(buf: npt.NDArray[np.uint8], data: bytes) -> npt.NDArray[np.int64]:
    """Offsets of every line end: a LF, or a CR not followed by LF."""
    ends = np.flatnonzero(buf == _LF)
    if data.find(b"\r") >= 0:
        cr = np.flatnonzero(buf == _CR)
        lone = cr[buf[np.minimum(cr + 1, buf.size - 1)] != _LF]
        ends = np.union1d(ends, lone)
    return ends.astype(np.int64)


def _quote_flips(
    path: object, buf: npt.NDArray[np.uint8], line_ends: npt.NDArray[np.int64], delimiter: int
) -> npt.NDArray[np.int64]:
    """Offsets where a quoted field opens or closes, alternately (RFC 4180 quoting).

    Works on runs of consecutive quotes. A run at the start of a field (after a
    delimiter, a line end or the file start) of odd length opens a quoted field,
    or closes one it is inside; an odd run elsewhere closes the field it is
    inside and is ordinary text outside one; a run of even length is doubled
    quotes (or an empty quoted field) and changes nothing. So the state before
    a run is "inside" exactly when an odd number of field-start odd runs came
    after the last odd run elsewhere: no loop over the runs is needed.

    Raises
    ------
    PanelpipeError
        For a quoted field that never closes, or text after a closing quote,
        naming the line of whichever comes first.
    """
    q = np.flatnonzero(buf == _QUOTE)
    first = np.flatnonzero(np.diff(q, prepend=-2) != 1)
    start = q[first]
    end = start + np.diff(first, append=q.size)  # one past the run's last quote
    before = buf[np.maximum(start - 1, 0)]
    at_field = (start == 0) | (before == delimiter) | (before == _LF) | (before == _CR)
    odd = (end - start) % 2 == 1
    field_odd, other_odd = odd & at_field, odd & ~at_field
    n_field = np.cumsum(field_odd) - field_odd  # field-start odd runs before each run
    last_other = np.maximum.accumulate(np.where(other_odd, np.arange(start.size), -1))
    reset = np.concatenate(([-1], last_other[:-1]))  # the last other odd run before
    since = n_field - np.where(reset >= 0, n_field[np.maximum(reset, 0)], 0)
    inside = since % 2 == 1
    flip = field_odd | (other_odd & inside)
    closes = (flip & inside) | (~odd & at_field & ~inside)
    after = end[closes]
    follow = buf[np.minimum(after, buf.size - 1)]
    stray = after[(after < buf.size) & (follow != delimiter) & (follow != _LF) & (follow != _CR)]
    flips = start[flip].astype(np.int64)
    problems = []
    if stray.size:
        problems.append(
            (
                int(stray[0]),
                "text follows a closing quote; a quote inside a quoted field must be "
                'doubled ("") and a quoted field must end at a delimiter or the line end. '
                "Fix the quoting of this row.",
            )
        )
    if flips.size % 2:
        problems.append(
            (
                int(flips[-1]),
                "a quoted field opens here and its quote never closes, so every line after "
                "it would be read as one cell. Close the quote or remove the stray quote.",
            )
        )
    if problems:
        offset, what = min(problems)
        line = int(np.searchsorted(line_ends, offset)) + 1
        raise PanelpipeError(f"{path} line {line}: {what}")
    return flips


@dataclass(frozen=True)
class _Records:
    """Where each record (the header first) starts and ends, and its first line."""

    starts: npt.NDArray[np.int64]
    ends: npt.NDArray[np.int64]
    lines: npt.NDArray[np.int64]
    flips: npt.NDArray[np.int64]
    multiline: bool


def _field_error(
    spec: SourceSpec,
    buf: npt.NDArray[np.uint8],
    records: _Records,
    fields: int,
) -> PanelpipeError | None:
    """The first record whose field count differs from the header's, if any."""
    at = np.flatnonzero(buf == ord(_delimiter(spec)))
    at = at[np.searchsorted(records.flips, at) % 2 == 0]  # outside quoted fields
    counts = np.bincount(np.searchsorted(records.ends, at), minlength=records.ends.size) + 1
    size = records.ends - records.starts
    blank = (size == 0) | ((size == 1) & (buf[np.minimum(records.starts, buf.size - 1)] == _CR))
    wrong = np.flatnonzero((counts != fields) & ~blank)
    if not wrong.size:
        return None
    i = int(wrong[0])
    return PanelpipeError(
        f"{spec.path} line {int(records.lines[i])}: {int(counts[i])} fields where the header "
        f"has {fields} (delimiter {_delimiter(spec)!r}). Quote values that contain the "
        "delimiter, or fix the row."
    )


def _records(spec: SourceSpec, data: bytes, buf: npt.NDArray[np.uint8]) -> _Records:
    delimiter = ord(_delimiter(spec))
    line_ends = _line_ends(buf, data)
    if data.find(b'"') < 0:  # no quoted field: every line end ends a record
        flips = np.zeros(0, dtype=np.int64)
        ends = line_ends
    else:
        flips = _quote_flips(spec.path, buf, line_ends, delimiter)
        ends = line_ends[np.searchsorted(flips, line_ends) % 2 == 0]
    starts = np.concatenate(([0], ends + 1))
    ends = np.append(ends, buf.size)
    if starts[-1] >= buf.size:  # the last line end closes the last record
        starts, ends = starts[:-1], ends[:-1]
    if flips.size:
        lines = np.searchsorted(line_ends, starts) + 1
    else:
        lines = np.arange(1, starts.size + 1, dtype=np.int64)
    return _Records(starts, ends, lines, flips, ends.size < line_ends.size)


@dataclass(frozen=True)
class _CsvFile:
    """A CSV file's UTF-8 bytes, its record layout and its header."""

    spec: SourceSpec
    data: bytes
    buf: npt.NDArray[np.uint8]
    records: _Records
    header: list[str]

    @classmethod
    def open(cls, spec: SourceSpec) -> _CsvFile:
        data = _utf8_bytes(spec)
        buf = np.frombuffer(data, dtype=np.uint8)
        records = _records(spec, data, buf)
        if records.starts.size < 2:
            raise PanelpipeError(
                f"{spec.path}: has a header but no data rows; remove it from sources or "
                "deliver its rows."
            )
        first = data[: records.ends[0]] + b"\n"
        header = pacsv.read_csv(
            pa.BufferReader(first), read_options=cls.read_options(), parse_options=cls.parse(spec)
        ).column_names
        return cls(spec, data, buf, records, header)

    @staticmethod
    def read_options() -> pacsv.ReadOptions:
        return pacsv.ReadOptions(encoding="utf8")  # the bytes are UTF-8 by now

    @staticmethod
    def parse(spec: SourceSpec, *, multiline: bool = False) -> pacsv.ParseOptions:
        return pacsv.ParseOptions(
            delimiter=_delimiter(spec), ignore_empty_lines=False, newlines_in_values=multiline
        )

    def read(
        self, wanted: Sequence[str], text: Sequence[str]
    ) -> tuple[pa.Table, npt.NDArray[np.int64]]:
        """The wanted columns (``text`` ones as text) and the first line of each row."""
        spec, records = self.spec, self.records
        convert = pacsv.ConvertOptions(
            include_columns=list(wanted),
            column_types={c: pa.string() for c in text},
            null_values=list(spec.missing),
            strings_can_be_null=True,
            decimal_point=spec.decimal,
        )
        try:
            table = pacsv.read_csv(
                pa.BufferReader(self.data),
                read_options=self.read_options(),
                parse_options=self.parse(spec, multiline=records.multiline),
                convert_options=convert,
            )
        except pa.ArrowInvalid as exc:
            found = _field_error(spec, self.buf, records, len(self.header))
            raise found or PanelpipeError(
                f"{spec.path}: cannot read the file ({exc}). Check its delimiter and quoting "
                "('csv' options in the config)."
            ) from exc
        rows = records.lines[1:]
        if table.num_rows != rows.size:
            raise PanelpipeError(
                f"{spec.path} lines {int(rows[0])}-{int(rows[-1])}: {rows.size} records were "
                f"found but {table.num_rows} rows were read, so the quoting is not one "
                "panelpipe can read with certainty. Save the file again with standard quoting."
            )
        return table, rows


def read_source(
    spec: SourceSpec | DatabaseSpec, columns: Sequence[str], *, text: Sequence[str]
) -> pd.DataFrame:
    """Read the named columns of one file or query; ``text`` columns are kept as text.

    Raises
    ------
    PanelpipeError
        If the file cannot be read, breaks the CSV rules above, has no data rows or
        lacks a column, naming the file and, where there is one, the line.
    """
    if isinstance(spec, DatabaseSpec):
        return read_database(spec, columns, text=text)
    path = spec.path
    csv_file = None
    if _is_parquet(spec):
        try:
            available = list(pq.read_schema(path).names)
        except (OSError, pa.ArrowException) as exc:
            raise PanelpipeError(
                f"{path}: cannot read the file as Parquet ({exc}). Deliver it again."
            ) from exc
    else:
        csv_file = _CsvFile.open(spec)
        available = csv_file.header
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
    if csv_file is None:
        try:
            table = pq.read_table(path, columns=wanted)
        except (OSError, pa.ArrowException) as exc:
            raise PanelpipeError(f"{path}: cannot read the file ({exc}).") from exc
        if table.num_rows == 0:
            raise PanelpipeError(
                f"{path}: has no data rows; remove it from sources or deliver its rows."
            )
        lines = np.arange(1, table.num_rows + 1, dtype=np.int64)
    else:
        table, lines = csv_file.read(wanted, [back[c] for c in text])
    frame = table.rename_columns([renamed.get(c, c) for c in table.column_names]).to_pandas()
    frame = frame[list(columns)]
    for col in text:
        frame[col] = frame[col].astype("string")
    frame[SOURCE] = str(path)
    frame[LINE] = lines
    return frame


def read_panel(
    specs: Sequence[SourceSpec | DatabaseSpec], columns: Sequence[str], *, text: Sequence[str]
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
