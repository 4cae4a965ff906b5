"""Hostile CSV deliveries: each is refused with the file and line, nothing is damaged.

Every case writes invented region-by-year files next to a copy of an earlier
complete run (the ``earlier_run`` fixture) and runs ``panelpipe check`` in-process,
or the whole workflow (``panelpipe run``) for the cases marked so, then asserts
the exit status, the message, that no traceback was printed, that the inputs
are unchanged and that the earlier run folder is byte-identical.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

from _support import (
    HOSTILE_HEADER,
    hostile_analysis,
    hostile_rows,
    refusal_message,
    write_hostile_config,
)

pytestmark = pytest.mark.slow  # the earlier run is a real workflow run

GOOD = hostile_rows().splitlines()  # 36 rows: lines 2..37 under the header


def lines_with(index: int, row: str, rows: list[str] | None = None) -> str:
    """The panel with row ``index`` (0 = line 2) replaced."""
    body = list(GOOD if rows is None else rows)
    body[index] = row
    return HOSTILE_HEADER + "\n".join(body) + "\n"


@dataclass
class Case:
    files: dict[str, bytes]
    expect: list[str]
    exit_status: int = 2
    analysis: dict[str, Any] = field(default_factory=dict)
    whole_run: bool = False


CASES: dict[str, Case] = {
    "unterminated-quote-in-an-unused-column": Case(
        {"a.csv": lines_with(19, '004,2019,15,4.5,"1').encode()},
        ["a.csv line 21:", "never closes"],
        whole_run=True,
    ),
    "too-many-fields": Case(
        {"a.csv": lines_with(7, "002,2019,15,4.5,0,9").encode()},
        ["a.csv line 9: 6 fields where the header has 5"],
    ),
    "too-few-fields": Case(
        {"a.csv": lines_with(30, "006,2018,15,4.5").encode()},
        ["a.csv line 32: 4 fields where the header has 5"],
    ),
    "text-after-a-closing-quote": Case(
        {"a.csv": lines_with(3, '001,2021,"15"x,4.5,1').encode()},
        ["a.csv line 5: text follows a closing quote"],
    ),
    "duplicate-after-a-quoted-multi-line-field": Case(
        {
            "a.csv": (
                lines_with(1, '001,2019,15,4.5,"1\n2"')  # the record spans lines 3-4
                + "003,2020,5,1.5,1\n"  # a repeat of (003, 2020), on line 39
            ).encode()
        },
        ["duplicate_keys", "(003, 2020) at", "a.csv line 17", "a.csv line 39"],
        exit_status=1,
    ),
    "thousands-separator-under-a-decimal-comma": Case(
        {
            "a.csv": (
                HOSTILE_HEADER.replace(",", ";")
                + "".join(
                    f"{u:03d};{y};{20 + u}.{849 + y % 7};{u % 3},5;{u % 2}\n"
                    for u in range(1, 7)
                    for y in range(2018, 2024)
                )
            ).encode()
        },
        ["non_numeric", "'21.851'", "a.csv line 2"],
        exit_status=1,
        analysis={"csv": {"delimiter": ";", "decimal": ","}},
        whole_run=True,
    ),
    "non-ascii-delimiter": Case(
        {"a.csv": (HOSTILE_HEADER + hostile_rows()).replace(",", "\u00a7").encode()},
        ["a.csv: the 'delimiter' option '\u00a7' must be one ASCII character"],
        analysis={"csv": {"delimiter": "\u00a7"}},
    ),
    "unknown-encoding": Case(
        {"a.csv": (HOSTILE_HEADER + hostile_rows()).encode()},
        ["a.csv: the encoding 'utf-9' is not one Python knows"],
        analysis={"csv": {"encoding": "utf-9"}},
    ),
    "bytes-invalid-in-the-encoding": Case(
        {"a.csv": (HOSTILE_HEADER + hostile_rows()).encode() + b"002,2030,\xe9,1,0\n"},
        ["a.csv line 38: bytes b'\\xe9' are not valid utf-8", "latin-1"],
        whole_run=True,
    ),
    "header-only-file": Case(
        {"a.csv": HOSTILE_HEADER.encode()},
        ["a.csv: has a header but no data rows; remove it from sources or deliver its rows"],
    ),
    "header-only-file-among-two-deliveries": Case(
        {
            "a.csv": (HOSTILE_HEADER + hostile_rows()).encode(),
            "b.csv": HOSTILE_HEADER.encode(),
        },
        ["b.csv: has a header but no data rows"],
        analysis={"sources": ["a.csv", "b.csv"]},
    ),
    "empty-file": Case({"a.csv": b""}, ["a.csv: the file is empty"]),
}


@pytest.mark.parametrize("name", list(CASES))
def test_hostile_csv_is_refused(
    name: str,
    tmp_path: Path,
    earlier_run: Callable[[], Callable[[], None]],
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    case = CASES[name]
    check = earlier_run()
    for file, data in case.files.items():
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
    for file, data in case.files.items():
        assert (tmp_path / file).read_bytes() == data  # inputs are only read
    check()
