"""Hostile deliveries in the newer source kinds: workbooks, compressed CSV, Arrow.

Each case writes an invented region-by-year delivery next to a copy of an earlier
complete run (the ``earlier_run`` fixture) and runs ``panelpipe check`` in-process,
or the whole workflow for the cases marked so; it asserts the exit status, the
message (naming the file and the sheet and cell, or the line), that no traceback
was printed, that the inputs are unchanged, that no report was written and that
the earlier run folder is byte-identical.
"""

from __future__ import annotations

import gzip
import io
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pyarrow as pa
import pytest

from _support import (
    HOSTILE_HEADER,
    hostile_analysis,
    hostile_rows,
    hostile_table,
    patched_member,
    refusal_message,
    write_hostile_config,
)
from _support import workbook_bytes as book

pytestmark = pytest.mark.slow  # the earlier run is a real workflow run

CSV = (HOSTILE_HEADER + hostile_rows()).encode()
TABLE = hostile_table()  # header, then 36 rows: sheet rows 2..37


def compressed(codec: str) -> bytes:
    sink = pa.BufferOutputStream()
    with pa.CompressedOutputStream(sink, codec) as stream:
        stream.write(CSV)
    return bytes(sink.getvalue())


def with_cell(row: int, column: int, value: Any) -> list[list[Any]]:
    """The table with one cell replaced (row 0 = the header, sheet row 1)."""
    rows = [list(r) for r in TABLE]
    rows[row][column] = value
    return rows


_ODS_GRANT = (
    '<table:table-cell office:value-type="float" office:value="5.5">'
    "<text:p>5.5</text:p></table:table-cell>"
)
_CALCEXT = 'xmlns:calcext="urn:org:documentfoundation:names:experimental:calc:xmlns:calcext:1.0" '


def ods_with_error() -> bytes:
    """An .ods whose first 'grant' cell (D2) is a formula error stored with the value 0."""
    error = (
        '<table:table-cell table:formula="of:=1/0" office:value-type="float" office:value="0" '
        'calcext:value-type="error"><text:p>#DIV/0!</text:p></table:table-cell>'
    )
    return patched_member(
        book(TABLE, kind="ods"),
        "content.xml",
        ("<office:document-content ", "<office:document-content " + _CALCEXT),
        (_ODS_GRANT, error),
    )


def xlsx_with_error() -> bytes:
    """An .xlsx whose cell D3 holds a cached #VALUE! error of a formula."""
    rows = with_cell(2, 3, "=A3+1")
    return patched_member(
        book(rows),
        "xl/worksheets/sheet1.xml",
        ('<c r="D3"><f>A3+1</f><v /></c>', '<c r="D3" t="e"><f>A3+1</f><v>#VALUE!</v></c>'),
    )


def xlsx_merged_header() -> bytes:
    import openpyxl

    source = openpyxl.load_workbook(io.BytesIO(book(TABLE)))
    sheet = source["2024"]
    sheet.merge_cells("D1:E1")
    out = io.BytesIO()
    source.save(out)
    return out.getvalue()


def ods_merged_header() -> bytes:
    """An .ods whose header 'grant' spans two columns, covering 'coastal' (E1)."""
    head = (
        '<table:table-cell office:value-type="string" office:string-value="{0}">'
        "<text:p>{0}</text:p></table:table-cell>"
    )
    return patched_member(
        book(TABLE, kind="ods"),
        "content.xml",
        (
            head.format("grant") + head.format("coastal"),
            head.format("grant").replace(
                "<table:table-cell ", '<table:table-cell table:number-columns-spanned="2" '
            )
            + "<table:covered-table-cell/>",
        ),
    )


@dataclass
class Case:
    files: dict[str, Callable[[], bytes]]
    expect: list[str]
    exit_status: int = 2
    analysis: dict[str, Any] = field(default_factory=dict)
    whole_run: bool = False


def xlsx(**entry: Any) -> dict[str, Any]:
    return {"sources": [{"path": "a.xlsx", **entry}]}


CASES: dict[str, Case] = {
    "wrong-sheet-name": Case(
        {"a.xlsx": lambda: book(TABLE)},
        ["a.xlsx: the workbook has no sheet '2025'; its sheets are '2024'"],
        analysis=xlsx(sheet="2025"),
        whole_run=True,
    ),
    "truncated-workbook": Case(
        {"a.xlsx": lambda: book(TABLE)[:2000]},
        ["a.xlsx: cannot read the file as a workbook", "Deliver it again"],
        analysis=xlsx(),
    ),
    "merged-header-cells": Case(
        {"a.xlsx": xlsx_merged_header},
        ["a.xlsx, sheet 2024, cells D1:E1: merged cells"],
        analysis=xlsx(),
    ),
    "merged-header-cells-ods": Case(
        {"a.ods": ods_merged_header},
        ["a.ods, sheet 2024, cell E1: the column has data but no name"],
        analysis={"sources": ["a.ods"]},
    ),
    "gzip-cut-short": Case(
        {"a.csv.gz": lambda: gzip.compress(CSV)[:-40]},
        ["a.csv.gz: cannot decompress the file", "cut short or damaged"],
        analysis={"sources": ["a.csv.gz"]},
        whole_run=True,
    ),
    "zstd-cut-short": Case(
        {"a.csv.zst": lambda: compressed("zstd")[:-25]},
        ["a.csv.zst: cannot decompress the file"],
        analysis={"sources": ["a.csv.zst"]},
    ),
    "bz2-that-is-plain-text": Case(
        {"a.csv.bz2": lambda: CSV},
        ["a.csv.bz2: cannot decompress the file", "not compressed as its ending '.bz2' says"],
        analysis={"sources": ["a.csv.bz2"]},
    ),
    "text-cell-in-numeric-column": Case(
        {"a.xlsx": lambda: book(with_cell(16, 2, "n/a (see note)"))},
        [
            "a.xlsx, sheet 2024, cell C17 ('n/a (see note)'): text where the column 'jobs' "
            "holds numbers (1 cell(s))"
        ],
        analysis=xlsx(sheet="2024"),
        whole_run=True,
    ),
    "empty-sheet": Case(
        {"a.xlsx": lambda: book([])},
        ["a.xlsx, sheet 2024: the sheet is empty"],
        analysis=xlsx(),
    ),
    "header-only-sheet": Case(
        {"a.ods": lambda: book(TABLE[:1], kind="ods")},
        ["a.ods, sheet 2024: has column names in row 1 but no data rows below them"],
        analysis={"sources": ["a.ods"]},
    ),
    "arrow-file-that-is-not-arrow": Case(
        {"a.arrow": lambda: CSV},
        ["a.arrow: cannot read the file as an Arrow IPC file"],
        analysis={"sources": ["a.arrow"]},
    ),
    "ods-formula-error-cell": Case(
        {"a.ods": ods_with_error},
        ["a.ods, sheet 2024, cell D2 (#DIV/0!): a formula error instead of a value"],
        analysis={"sources": ["a.ods"]},
        whole_run=True,
    ),
    "xlsx-formula-error-cell": Case(
        {"a.xlsx": xlsx_with_error},
        ["a.xlsx, sheet 2024, cell D3 (#VALUE!): a formula error instead of a value"],
        analysis=xlsx(),
    ),
    "header-row-that-is-empty": Case(
        {"a.xlsx": lambda: book(TABLE)},
        ["a.xlsx, sheet 2024, row 40: the header row is empty"],
        analysis=xlsx(header_row=40),
    ),
    "repeated-column-name": Case(
        {"a.xlsx": lambda: book(with_cell(0, 4, "jobs"))},
        ["a.xlsx, sheet 2024, cell E1: the column name 'jobs' is also in cell C1"],
        analysis=xlsx(),
    ),
    "sheet-on-a-csv-source": Case(
        {"a.csv": lambda: CSV},
        ["'sheet' and 'header_row' apply to workbooks only"],
        analysis={"sources": [{"path": "a.csv", "sheet": "2024"}]},
    ),
    "duplicate-key-named-by-sheet-and-row": Case(
        {"a.xlsx": lambda: book(with_cell(3, 1, 2019))},
        ["(001, 2019) at a.xlsx, sheet 2024, row 3", "(001, 2019) at a.xlsx, sheet 2024, row 4"],
        analysis=xlsx(),
        exit_status=1,
    ),
}


@pytest.mark.parametrize("name", sorted(CASES))
def test_hostile_source_is_refused(
    name: str,
    tmp_path: Path,
    earlier_run: Callable[[], Callable[[], None]],
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    case = CASES[name]
    check = earlier_run()
    written = {file: make() for file, make in case.files.items()}
    for file, data in written.items():
        (tmp_path / file).write_bytes(data)
    config = write_hostile_config(tmp_path, hostile_analysis(**case.analysis))
    message = refusal_message(
        tmp_path,
        config,
        whole_run=case.whole_run,
        exit_status=case.exit_status,
        monkeypatch=monkeypatch,
        capsys=capsys,
    )
    for text in case.expect:
        assert text in message, message
    for file, data in written.items():
        assert (tmp_path / file).read_bytes() == data  # inputs are only read
    assert len(list((tmp_path / "out").rglob("report.html"))) == 1  # the earlier run's only
    check()
