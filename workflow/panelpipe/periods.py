"""Periods: recognise how time is written and turn it into consecutive integers.

Accepted forms: whole numbers (years or any integer index), ISO dates
(``2021-03-31``), year-quarter text (``2021Q1``, ``2021-Q1``, ``2021 q1``) and
year-month text (``2021-03``). Every period becomes an integer *ordinal* on its
detected frequency (a year is itself; a quarter is 4·year + quarter − 1; a month
is 12·year + month − 1; dates on the first day of months or quarters or years
take that frequency, other dates count days), so gaps are differences of
ordinals, and the period after ordinal ``p`` is ``p + 1`` whether or not anybody
is observed in it. All work is vectorised string matching.

Accepted range of each form (anything else is unreadable, a ``bad_period``):
whole numbers of at most 15 digits (``|p| < 10**15``: exact in float64, and no
sum or difference of two of them can overflow int64); years, quarters and months
with a four-digit year; dates that numpy's day arithmetic represents (pandas'
1677-09-22 to 2262-04-11). A column of whole numbers reads as years when every
value lies in 1000-2999 (`YEARS`); validation treats a column whose rows are mostly
such years as years, and refuses the rest as typos (``20199`` among 2015-2020).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

__all__ = ["MAX_DIGITS", "YEARS", "ParsedPeriods", "label_of", "parse_periods"]

#: Whole-number periods may have at most this many digits (see the module docstring).
MAX_DIGITS = 15

#: Whole numbers in this closed range read as calendar years.
YEARS = (1000, 2999)

_FORMS = {
    "integer": r"[+-]?\d+(?:\.0+)?",
    "quarter": r"(\d{4})[-\s]?[Qq]([1-4])",
    "month": r"(\d{4})-(0[1-9]|1[0-2])",
    "date": r"\d{4}-\d{2}-\d{2}(?:[T ]00:00(?::00)?)?",
}


@dataclass(frozen=True)
class ParsedPeriods:
    """The result of reading a period column."""

    ordinal: pd.Series  # Int64, <NA> where unreadable or missing
    frequency: str  # integer | year | quarter | month | day | mixed | empty
    form: pd.Series  # the recognised form of each row ("" where none)
    bad: pd.Series  # rows whose period is missing or unreadable

    @property
    def mixed(self) -> bool:
        return self.frequency == "mixed"


def _text(values: pd.Series) -> pd.Series:
    if pd.api.types.is_datetime64_any_dtype(values):
        return values.dt.strftime("%Y-%m-%d").astype("string")
    if pd.api.types.is_float_dtype(values):
        whole = values.notna() & (values % 1 == 0)
        out = values.astype("string")
        out[whole] = values[whole].astype("Int64").astype("string")
        return out
    return values.astype("string").str.strip()


def parse_periods(values: pd.Series) -> ParsedPeriods:
    """Read a period column of any dtype (numbers, dates or text).

    The distinct values are parsed once and the results spread back to the rows,
    so the cost is one factorisation of the column whatever its length.
    """
    codes, uniques = pd.factorize(values, use_na_sentinel=True)
    distinct = _parse_distinct(pd.Series(uniques, dtype=values.dtype))
    take = np.where(codes < 0, len(uniques), codes)

    def spread(column: pd.Series, fill: object) -> pd.Series:
        extended = pd.concat(
            [column.reset_index(drop=True), pd.Series([fill], dtype=column.dtype)],
            ignore_index=True,
        )
        return pd.Series(extended.to_numpy()[take], index=values.index, dtype=column.dtype)

    return ParsedPeriods(
        spread(distinct.ordinal, pd.NA),
        distinct.frequency,
        spread(distinct.form, ""),
        spread(distinct.bad, True).astype(bool),
    )


def _parse_distinct(values: pd.Series) -> ParsedPeriods:
    text = _text(values)
    form = pd.Series("", index=values.index, dtype="object")
    for name, pattern in _FORMS.items():
        hit = text.str.fullmatch(pattern).fillna(False).astype(bool) & (form == "")
        form[hit] = name
    present = form[form != ""]
    kinds = set(present.unique())
    ordinal = pd.Series(pd.NA, index=values.index, dtype="Int64")
    if len(kinds) > 1:
        return ParsedPeriods(ordinal, "mixed", form, form == "")
    frequency = next(iter(kinds)) if kinds else "empty"
    rows = form != ""
    t = text[rows]
    if frequency == "integer":
        digits = t.str.replace(r"^[+-]?0*|\.0+$", "", regex=True).str.len()
        rows = rows & (digits <= MAX_DIGITS).reindex(values.index, fill_value=False)
        whole = t[digits <= MAX_DIGITS].str.replace(r"\.0+$", "", regex=True)
        ordinal[rows] = whole.astype("int64")
        numbers = ordinal[rows].astype("int64")
        if len(numbers) and numbers.between(*YEARS).all():
            frequency = "year"
    elif frequency == "quarter":
        parts = t.str.extract(_FORMS["quarter"]).astype("int64")
        ordinal[rows] = parts[0] * 4 + parts[1] - 1
    elif frequency == "month":
        parts = t.str.extract(_FORMS["month"]).astype("int64")
        ordinal[rows] = parts[0] * 12 + parts[1] - 1
    elif frequency == "date":
        dates = pd.to_datetime(t.str.slice(0, 10), format="%Y-%m-%d", errors="coerce")
        rows = rows & dates.reindex(values.index).notna()
        dates = dates.dropna()
        months, days = dates.dt.month, dates.dt.day
        if (days == 1).all() and (months == 1).all():
            frequency, ordinal[rows] = "year", dates.dt.year
        elif (days == 1).all() and months.isin([1, 4, 7, 10]).all():
            frequency, ordinal[rows] = "quarter", dates.dt.year * 4 + (months - 1) // 3
        elif (days == 1).all():
            frequency, ordinal[rows] = "month", dates.dt.year * 12 + months - 1
        else:
            epoch = np.datetime64("1970-01-01")
            frequency = "day"
            ordinal[rows] = (dates.to_numpy() - epoch).astype("timedelta64[D]").astype("int64")
    return ParsedPeriods(ordinal, frequency, form, ~rows)


def label_of(ordinal: int, frequency: str) -> str:
    """How a period ordinal is shown: 2021, 2021Q1, 2021-03, 2021-03-31."""
    if frequency == "quarter":
        return f"{ordinal // 4}Q{ordinal % 4 + 1}"
    if frequency == "month":
        return f"{ordinal // 12}-{ordinal % 12 + 1:02d}"
    if frequency == "day":
        return str(np.datetime64("1970-01-01") + np.timedelta64(int(ordinal), "D"))
    return str(ordinal)
