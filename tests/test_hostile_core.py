"""Hostile deliveries for the core (periods, units, values) through the real command line.

Each case runs ``panelpipe check`` or ``panelpipe run`` next to a copy of an earlier
complete run (the ``earlier_run`` fixture) and asserts the exit status, the message,
that no traceback is printed and that the earlier run folder is byte-identical.
All data are invented (the small region-by-year panel of ``_support.hostile_rows``).
"""

from __future__ import annotations

import unicodedata
from collections.abc import Callable
from pathlib import Path

import pandas as pd
import pytest

from _support import (
    HOSTILE_HEADER,
    hostile_analysis,
    hostile_rows,
    run_panelpipe,
    write_hostile_config,
)

pytestmark = pytest.mark.slow

GOOD = HOSTILE_HEADER + hostile_rows()  # 6 regions x 2018-2023, lines 2-37


def _case(
    tmp_path: Path,
    earlier_run: Callable[[], Callable[[], None]],
    files: dict[str, str],
    command: str = "check",
    *extra: str,
    **analysis: object,
) -> tuple[int, str, str]:
    check = earlier_run()
    for name, text in files.items():
        (tmp_path / name).write_text(text, encoding="utf-8")
    config = write_hostile_config(tmp_path, hostile_analysis(**analysis))
    done = run_panelpipe(tmp_path, command, "--config", str(config), *extra)
    assert "Traceback" not in done.stderr + done.stdout
    check()
    return done.returncode, done.stdout, done.stderr


def test_a_five_digit_year_is_refused(tmp_path: Path, earlier_run: Callable) -> None:
    code, _, err = _case(tmp_path, earlier_run, {"a.csv": GOOD + "007,20199,5,1.5,1\n"})
    assert code == 1
    assert "bad_period" in err and "'20199'" in err and "a.csv line 38" in err


@pytest.mark.parametrize(
    "period", ["9223372036854775808", "123456789012345678901"], ids=["int64-wrap", "21-digits"]
)
def test_a_period_beyond_the_integer_range_is_refused(
    tmp_path: Path, earlier_run: Callable, period: str
) -> None:
    code, _, err = _case(tmp_path, earlier_run, {"a.csv": GOOD + f"007,{period},5,1.5,1\n"})
    assert code == 1
    assert "bad_period" in err and f"'{period}'" in err and "a.csv line 38" in err
    assert "at most 15 digits" in err


def test_a_year_far_before_the_others_is_a_warning(tmp_path: Path, earlier_run: Callable) -> None:
    code, out, _ = _case(tmp_path, earlier_run, {"a.csv": GOOD + "007,1203,5,1.5,1\n"})
    assert code == 0
    assert "period_outlier" in out and "'1203'" in out and "a.csv line 38" in out


def test_one_region_as_007_in_csv_and_7_in_parquet_is_refused(
    tmp_path: Path, earlier_run: Callable
) -> None:
    later = pd.DataFrame({"region": [7], "year": [2024], "jobs": [9.0], "grant": [2.5]})
    later["coastal"] = 1
    later.to_parquet(tmp_path / "b.parquet", index=False)
    files = {"a.csv": GOOD + "007,2023,5,1.5,1\n"}
    code, _, err = _case(tmp_path, earlier_run, files, "run", sources=["a.csv", "b.parquet"])
    assert code != 0
    assert "unit_spelling" in err and "'007' (" in err and "'7' (" in err
    assert "a.csv line 38" in err and "b.parquet line 1" in err
    assert "same way in every delivery" in err
    assert not list((tmp_path / "out" / "t").glob("*/report.html"))[1:]


def test_one_region_in_two_unicode_forms_is_refused(tmp_path: Path, earlier_run: Callable) -> None:
    nfc, nfd = unicodedata.normalize("NFC", "Öland"), unicodedata.normalize("NFD", "Öland")
    text = GOOD + f"{nfc},2018,5,1.5,1\n{nfd},2019,6,2.5,1\n"
    code, _, err = _case(tmp_path, earlier_run, {"a.csv": text})
    assert code == 1
    assert "unit_spelling" in err and "a.csv line 38" in err and "a.csv line 39" in err


@pytest.mark.parametrize("value", ["1e308", "-1e200"], ids=["1e308", "minus-1e200"])
def test_an_overflowing_outcome_is_refused(
    tmp_path: Path, earlier_run: Callable, value: str
) -> None:
    code, _, err = _case(
        tmp_path, earlier_run, {"a.csv": GOOD + f"007,2019,{value},1.5,1\n"}, "run"
    )
    assert code != 0
    assert "value_too_large" in err and "'jobs'" in err and "a.csv line 38" in err


def test_a_constant_outcome_is_refused(tmp_path: Path, earlier_run: Callable) -> None:
    lines = GOOD.splitlines()
    flat = [lines[0]] + [",".join([*r.split(",")[:2], "12", *r.split(",")[3:]]) for r in lines[1:]]
    code, _, err = _case(tmp_path, earlier_run, {"a.csv": "\n".join(flat) + "\n"}, "run")
    assert code != 0
    assert "constant_outcome" in err and "'jobs'" in err and "nothing to explain" in err


def test_a_tiny_regressor_is_refused_not_called_constant(
    tmp_path: Path, earlier_run: Callable
) -> None:
    lines = GOOD.splitlines()
    tiny = [lines[0]] + [
        ",".join([*r.split(",")[:3], f"{float(r.split(',')[3])}e-170", r.split(",")[4]])
        for r in lines[1:]
    ]
    code, _, err = _case(tmp_path, earlier_run, {"a.csv": "\n".join(tiny) + "\n"})
    assert code == 1
    assert "value_too_small" in err and "'grant'" in err
    assert "constant_regressor" not in err


def test_an_escape_sequence_in_a_unit_id_is_shown_escaped(
    tmp_path: Path, earlier_run: Callable
) -> None:
    hostile = "\x1b[31mred"
    text = GOOD + f"{hostile},2019,5,1.5,1\n{hostile},2019,6,1.5,1\n"
    code, out, err = _case(tmp_path, earlier_run, {"a.csv": text})
    assert code == 1
    assert "\x1b" not in out + err
    assert "duplicate_keys" in err and "(\\x1b[31mred, 2019)" in err


def test_a_year_missing_for_everybody_is_not_bridged(tmp_path: Path, earlier_run: Callable) -> None:
    years = hostile_rows(years=range(2015, 2019)) + hostile_rows(years=range(2020, 2024))
    files = {"a.csv": HOSTILE_HEADER + years}
    code, out, _ = _case(
        tmp_path, earlier_run, files, "check", "-v", estimators=["first_difference"]
    )
    assert code == 0
    # 6 regions x (3 + 3) consecutive pairs, 2015-18 and 2020-23: none across 2019.
    assert "first_difference 36 " in out
