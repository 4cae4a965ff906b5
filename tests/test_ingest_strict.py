"""Strict CSV reading: no row is lost or shifted without an error naming file and line.

The reference for what a CSV file holds is Python's ``csv`` module in strict mode
(``csv.reader(..., strict=True)``, RFC 4180 quoting): the property test at the end
reads random damaged files with both and requires that panelpipe either refuses
with a file and line or reads exactly the rows the reference reads.
"""

from __future__ import annotations

import csv
import gzip
import io
from pathlib import Path

import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from panelpipe.config import AnalysisSettings, SourceSpec
from panelpipe.findings import PanelpipeError
from panelpipe.ingest import read_panel
from panelpipe.validate import validate_panel

HEADER = "region,year,jobs,grant,note\n"
COLUMNS = ["region", "year", "jobs", "grant"]  # 'note' is never used by the analysis


def rows(units: int = 6, years: range = range(2018, 2058)) -> list[str]:
    """Invented region-by-year rows, 40 years per region."""
    return [
        f"{u:03d},{y},{10 + u + (y * u) % 7},{(u * 3 + y * 7) % 11 + 0.5},plain"
        for u in range(1, units + 1)
        for y in years
    ]


def read(path: Path, **options: object) -> object:
    spec = SourceSpec(path, **options)  # type: ignore[arg-type]
    return read_panel([spec], COLUMNS, text=["region", "year"])


def write(tmp_path: Path, text: str, name: str = "a.csv", encoding: str = "utf-8") -> Path:
    path = tmp_path / name
    path.write_bytes(text.encode(encoding))
    return path


def settings_for(path: Path, **csv: object) -> AnalysisSettings:
    return AnalysisSettings(
        name="t",
        sources=(str(path),),
        unit="region",
        period="year",
        outcome="jobs",
        regressors=("grant",),
        period_effects=True,
        cluster_by=("region",),
        estimators=("pooled_ols",),
        inference=("classical",),
        level=0.95,
        csv=dict(csv),
    )


def test_unterminated_quote_in_an_unused_column_is_refused_with_its_line(tmp_path: Path) -> None:
    body = rows()  # 240 rows: lines 2..241
    body[119] = body[119].replace(",plain", ',"plain')  # line 121
    path = write(tmp_path, HEADER + "\n".join(body) + "\n")
    before = path.read_bytes()
    with pytest.raises(PanelpipeError, match=r"a\.csv line 121: .*quote.* never closes"):
        read(path)
    assert path.read_bytes() == before


@pytest.mark.parametrize(
    ("row", "fields"), [("001,2100,5,1.5,plain,extra", 6), ("001,2100,5,1.5", 4)]
)
def test_wrong_field_count_names_file_and_line(tmp_path: Path, row: str, fields: int) -> None:
    body = rows()
    body.insert(30, row)  # line 32
    path = write(tmp_path, HEADER + "\n".join(body) + "\n")
    with pytest.raises(PanelpipeError, match=rf"a\.csv line 32: {fields} fields.*header has 5"):
        read(path)


def test_quoted_field_spanning_lines_keeps_later_line_numbers(tmp_path: Path) -> None:
    body = rows(units=1, years=range(2018, 2024))
    body[1] = body[1].replace(",plain", ',"two\nlines, and a ""quote"""')  # lines 3-4
    body[3] = body[3].replace(",plain", ',"three\r\nphysical\nlines"')  # lines 6-8
    path = write(tmp_path, HEADER + "\n".join(body) + "\n")
    raw = read(path)
    assert list(raw["year"]) == [str(y) for y in range(2018, 2024)]  # type: ignore[index]
    # Physical line of each record's first line, as a text editor numbers them.
    assert list(raw["_line"]) == [2, 3, 5, 6, 9, 10]  # type: ignore[index]


def test_blank_lines_stay_rows_without_a_unit_at_their_line(tmp_path: Path) -> None:
    body = rows(units=1, years=range(2018, 2022))
    body[0] = body[0].replace(",plain", ',"a\nb"')  # lines 2-3
    text = HEADER + body[0] + "\n\n" + "\n".join(body[1:]) + "\n"  # blank line 4
    path = write(tmp_path, text)
    result = validate_panel(read(path), settings_for(path))  # type: ignore[arg-type]
    missing = next(f for f in result.findings if f.code == "missing_unit")
    assert "a.csv line 4" in missing.message


def test_text_after_a_closing_quote_is_refused(tmp_path: Path) -> None:
    body = rows()
    body[9] = body[9].replace(",plain", ',"plain"x')  # line 11
    path = write(tmp_path, HEADER + "\n".join(body) + "\n")
    with pytest.raises(PanelpipeError, match=r"a\.csv line 11: text follows a closing quote"):
        read(path)


def test_a_quote_inside_an_unquoted_field_is_an_ordinary_character(tmp_path: Path) -> None:
    body = rows(units=1, years=range(2018, 2022))
    body[1] = body[1].replace(",plain", ',O"Neill 5" pipe')
    path = write(tmp_path, HEADER + "\n".join(body) + "\n")
    raw = read(path)
    assert list(raw["_line"]) == [2, 3, 4, 5]  # type: ignore[index]


def test_crlf_and_gzip_keep_lines(tmp_path: Path) -> None:
    body = rows(units=1, years=range(2018, 2022))
    body[0] = body[0].replace(",plain", ',"x\r\ny"')
    path = tmp_path / "a.csv.gz"
    path.write_bytes(gzip.compress((HEADER + "\r\n".join(body) + "\r\n").encode()))
    raw = read(path)
    assert list(raw["_line"]) == [2, 4, 5, 6]  # type: ignore[index]


@pytest.mark.parametrize("text", [HEADER, HEADER.rstrip("\n")])
def test_header_only_file_is_refused(tmp_path: Path, text: str) -> None:
    path = write(tmp_path, text)
    with pytest.raises(PanelpipeError, match=r"a\.csv: has a header but no data rows; remove it"):
        read(path)


def test_empty_file_is_refused(tmp_path: Path) -> None:
    path = write(tmp_path, "")
    with pytest.raises(PanelpipeError, match=r"a\.csv: the file is empty"):
        read(path)


def test_bytes_invalid_in_the_encoding_name_the_line(tmp_path: Path) -> None:
    body = rows()
    body[5] = body[5].replace("plain", "Citt\u00e0")  # line 7, written in latin-1 below
    path = write(tmp_path, HEADER + "\n".join(body) + "\n", encoding="latin-1")
    with pytest.raises(PanelpipeError, match=r"a\.csv line 7: .*not valid utf-8.*encoding"):
        read(path)
    raw = read(path, encoding="latin-1")  # the right encoding reads it
    assert len(raw) == 240  # type: ignore[arg-type]


def test_utf16_file_reads_when_its_encoding_is_given(tmp_path: Path) -> None:
    body = rows(units=1, years=range(2018, 2021))
    body[0] = body[0].replace(",plain", ',"a\nb"')
    path = write(tmp_path, HEADER + "\n".join(body) + "\n", encoding="utf-16")
    raw = read(path, encoding="utf-16")
    assert list(raw["_line"]) == [2, 4, 5]  # type: ignore[index]


@pytest.mark.parametrize(
    ("options", "expected"),
    [
        ({"delimiter": "\u00a7"}, r"'delimiter' option '\u00a7' must be one ASCII character"),
        ({"delimiter": '"'}, r"'delimiter' option '\"' cannot be a quote"),
        ({"delimiter": ";", "decimal": ";"}, r"one character for two purposes"),
        ({"encoding": "utf-9"}, r"encoding 'utf-9' is not one Python knows"),
    ],
)
def test_bad_reading_options_are_refused(tmp_path: Path, options: dict, expected: str) -> None:
    path = write(tmp_path, HEADER + "\n".join(rows()) + "\n")
    with pytest.raises(PanelpipeError, match=rf"a\.csv: .*{expected}"):
        read(path, **options)


# ------------------------------------------------------------------ decimal marks


def numeric(tmp_path: Path, cells: list[str], **csv: object) -> object:
    sep = str(csv.get("delimiter", ","))
    lines = [sep.join(("region", "year", "jobs", "grant"))]
    lines += [sep.join((f"{i:03d}", "2020", c, "1")) for i, c in enumerate(cells, 1)]
    path = write(tmp_path, "\n".join(lines) + "\n")
    spec_options = {k: v for k, v in csv.items()}
    raw = read_panel(
        [SourceSpec(path, **spec_options)],  # type: ignore[arg-type]
        ["region", "year", "jobs", "grant"],
        text=["region", "year"],
    )
    return validate_panel(raw, settings_for(path, **csv))


def test_thousands_separator_under_decimal_comma_is_refused(tmp_path: Path) -> None:
    result = numeric(tmp_path, ["20.849", "21.003", "19.5"], delimiter=";", decimal=",")
    f = next(f for f in result.findings if f.code == "non_numeric")  # type: ignore[attr-defined]
    assert f.severity == "error"
    assert "'20.849'" in f.message and "a.csv line 2" in f.message and "line 4" in f.message


def test_decimal_comma_values_convert_when_some_cell_is_text(tmp_path: Path) -> None:
    result = numeric(tmp_path, ["1,5", "2,25", "-3e2", "n.a."], delimiter=";", decimal=",")
    f = next(f for f in result.findings if f.code == "non_numeric")  # type: ignore[attr-defined]
    assert "'n.a.'" in f.message and "a.csv line 5" in f.message
    assert "'1,5'" not in f.message and "'-3e2'" not in f.message


def test_explicit_thousands_separator_is_read(tmp_path: Path) -> None:
    result = numeric(
        tmp_path, ["20.849", "1.020.849,5", "849,25"], delimiter=";", decimal=",", thousands="."
    )
    assert "non_numeric" not in {f.code for f in result.findings}  # type: ignore[attr-defined]
    # Common practice, no source: "1.020.849,5" with "." grouping and "," decimals.
    assert list(result.panel["jobs"]) == [20849.0, 1020849.5, 849.25]  # type: ignore[attr-defined]


def test_misplaced_thousands_separator_is_refused(tmp_path: Path) -> None:
    result = numeric(tmp_path, ["20.84", "1.000"], delimiter=";", decimal=",", thousands=".")
    f = next(f for f in result.findings if f.code == "non_numeric")  # type: ignore[attr-defined]
    assert "'20.84'" in f.message and "a.csv line 2" in f.message


# ------------------------------------------------------------------ property


def reference_rows(data: bytes) -> list[tuple[int, list[str]]] | None:
    """(first line, fields) of each record by Python's csv module in strict mode.

    None where the reference refuses the file (or it is not UTF-8).
    """
    try:
        reader = csv.reader(io.StringIO(data.decode("utf-8"), newline=""), strict=True)
        out, line = [], 1
        for record in reader:
            out.append((line, record))
            line = reader.line_num + 1
        return out
    except (csv.Error, UnicodeDecodeError):
        return None


damage = st.sampled_from(["truncate", "quote", "delete", "insert_delim", "flip", "newline"])
MISSING = set(SourceSpec(Path("x")).missing)


@settings(
    max_examples=150,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(
    n_rows=st.integers(1, 8),
    quoted=st.booleans(),
    edits=st.lists(st.tuples(damage, st.integers(0, 10_000), st.integers(0, 255)), max_size=3),
)
def test_random_damage_is_refused_or_read_exactly(
    tmp_path: Path, n_rows: int, quoted: bool, edits: list[tuple[str, int, int]]
) -> None:
    lines = ["region,year,jobs,grant,note"]
    for i in range(n_rows):
        note = f'"n, {i}\nmore ""x"""' if quoted and i % 2 else f"n{i}"
        lines.append(f"{i:03d},{2000 + i},{i + 1},{i / 2},{note}")
    data = bytearray(("\n".join(lines) + "\n").encode())
    for kind, where, byte in edits:
        at = where % (len(data) + 1)
        if kind == "truncate":
            del data[at:]
        elif kind == "quote":
            data[at:at] = b'"'
        elif kind == "delete" and at < len(data):
            del data[at]
        elif kind == "insert_delim":
            data[at:at] = b","
        elif kind == "flip" and at < len(data):
            data[at] = byte
        elif kind == "newline":
            data[at:at] = b"\n"
    path = tmp_path / "damaged.csv"
    path.write_bytes(bytes(data))
    expected = reference_rows(bytes(data))
    try:
        raw = read(path)
    except PanelpipeError as err:
        assert "damaged.csv" in str(err) and "Traceback" not in str(err)
        return
    assert expected is not None, f"accepted a file the strict reference refuses: {bytes(data)!r}"
    header = expected[0][1]
    body = expected[1:]
    assert len(raw) == len(body), bytes(data)  # type: ignore[arg-type]
    assert list(raw["_line"]) == [line for line, _ in body], bytes(data)  # type: ignore[index]
    for column in ("region", "year"):
        got = list(raw[column])  # type: ignore[index]
        for value, (_, ref) in zip(got, body, strict=True):
            want = ref[header.index(column)] if ref else ""
            assert want in MISSING if pd.isna(value) else str(value) == want


def test_each_source_keeps_its_own_decimal_mark(tmp_path: Path) -> None:
    from panelpipe.config import validate_config

    old = write(tmp_path, "region;year;jobs;grant\n001;2020;1,5;1\n002;2020;x;1\n", "old.csv")
    new = write(tmp_path, "region,year,jobs,grant\n001,2021,2.5,1\n002,2021,3,1\n", "new.csv")
    entries = [{"path": str(old), "delimiter": ";", "decimal": ",", "thousands": "."}, str(new)]
    config = validate_config(
        {"analyses": {"t": {**settings_for(old).to_dict(), "sources": entries}}}
    )
    s = settings_for(old)
    s = AnalysisSettings(**{**s.__dict__, "sources": tuple(config["analyses"]["t"]["sources"])})
    specs = [SourceSpec(old, delimiter=";", decimal=",", thousands="."), SourceSpec(new)]
    result = validate_panel(read_panel(specs, COLUMNS, text=["region", "year"]), s)
    f = next(f for f in result.findings if f.code == "non_numeric")
    assert "old.csv line 3" in f.message and "'x'" in f.message  # only the text cell
    assert "'2.5'" not in f.message and "'1,5'" not in f.message


@pytest.mark.parametrize(
    "body",
    [
        '"a""b",1\n"c",2\n',
        '"""",1\n"",2\n',
        '"a""",1\n"""b",2\n',
        '"two\nlines",1\n"x",2\n',
        '"",""\n"",""\n',
        'a,"q,r"\r\n"s",t\r\n',
        'a,5" screen\n"b",2\n',
        '"x,1\n',
        '"x"y,1\n',
    ],
    ids=["doubled", "only-quotes", "edges", "multiline", "empty", "crlf", "stray", "open", "after"],
)
def test_the_fast_quote_pairing_agrees_with_the_general_scan(body: str) -> None:
    # The fast path either declines (None) or finds exactly what the general scan
    # finds for every byte that is not itself a quote (inside a quoted field or not).
    import numpy as np

    from panelpipe.ingest import _line_ends, _paired_flips, _quote_flips

    data = ("h1,h2\n" + body).encode()
    buf = np.frombuffer(data, dtype=np.uint8)
    paired = _paired_flips(buf, ord(","))
    if paired is None:
        return
    general = _quote_flips("t.csv", buf, _line_ends(buf, data), ord(","))
    others = np.flatnonzero(buf != ord('"'))
    inside = np.searchsorted(paired, others, side="right") % 2
    assert (inside == np.searchsorted(general, others, side="right") % 2).all()


def test_the_fast_quote_pairing_serves_a_fully_quoted_file() -> None:
    import numpy as np

    from panelpipe.ingest import _paired_flips

    data = b'"h1","h2"\n"a""b","1"\n"c","2"\n'
    assert _paired_flips(np.frombuffer(data, dtype=np.uint8), ord(",")) is not None
