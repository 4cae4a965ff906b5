"""Validate: check identifiers, periods, types and balance before estimating.

Every problem becomes a `Finding` with a stable code. Errors stop the run before
any estimation; warnings and information travel into the report. All checks are
vectorised: no Python loop runs over rows.

Finding codes (stable): ``unit_whitespace``, ``missing_unit``, ``missing_period``,
``bad_period``, ``mixed_period_formats``, ``duplicate_keys``, ``redelivered``,
``revised``, ``missing_cluster``, ``non_numeric``, ``non_finite``, ``balance``,
``gaps``, ``entry_exit``, ``singleton_units``, ``too_few_units``,
``too_few_periods``, ``missing_values``, ``rows_dropped``, ``rows_per_estimator``,
``constant_regressor``, ``time_invariant_regressor``, ``low_within_variation``,
``too_few_clusters``, ``few_clusters``, ``period_outlier``, ``unit_spelling``,
``value_too_large``, ``value_too_small``, ``constant_outcome``.

Every value quoted from the data (unit ids, periods, cells, file names) is shown
with control characters escaped (`shown`), so that a terminal escape sequence in
a delivery reaches the terminal as text.
"""

from __future__ import annotations

import re
import unicodedata
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from .config import AnalysisSettings, SourceSpec, source_spec_of
from .findings import Finding, Severity, worst_status
from .ingest import LINE, SOURCE, place, source_path
from .periods import MAX_DIGITS, YEARS, label_of, parse_periods

__all__ = [
    "FEW_CLUSTERS",
    "LOW_WITHIN_SHARE",
    "MAGNITUDE",
    "ValidationResult",
    "shown",
    "validate_panel",
]

#: Common practice, no single source: below roughly 30-50 clusters the
#: cluster-robust standard error is unreliable.
FEW_CLUSTERS = 30

#: Below this share of within-unit variance a regressor gives fixed effects
#: little to work with and measurement error weighs more (Griliches & Hausman 1986).
LOW_WITHIN_SHARE = 0.05

#: Largest (and smallest non-zero) magnitude a model column may reach. Sandwich
#: covariances sum squares of scores (a regressor times a residual); with both
#: below 1e75 those fourth-order sums stay below float64's 1.8e308 for up to 1e8
#: rows, and a column whose largest value is below 1e-75 has a coefficient
#: variance beyond 1e150 that squares of it can no longer represent.
MAGNITUDE = 1e75

#: A period more than this many spans of the bulk of periods (10th to 90th
#: percentile of the rows) beyond that bulk is reported as an outlier.
OUTLIER_SPANS = 10

_LISTED = 10  # how many offending rows or keys a message quotes


def shown(value: object) -> str:
    """``value`` as text with control characters escaped (``\\x1b``, ``\\n``).

    Messages quote values from deliveries and go to terminals and logs: a raw
    escape sequence there could recolour or rewrite what the reader sees.
    """
    text = str(value)
    if text.isprintable():
        return text
    return "".join(
        c if c.isprintable() else c.encode("unicode_escape").decode("ascii") for c in text
    )


@dataclass(frozen=True)
class ValidationResult:
    """The checked panel, what was found, and a summary of its shape."""

    panel: pd.DataFrame
    findings: tuple[Finding, ...]
    summary: dict[str, Any] = field(default_factory=dict)

    @property
    def status(self) -> str:
        return worst_status(self.findings)

    def to_dict(self) -> dict[str, Any]:
        return {
            "status": self.status,
            "findings": [f.to_dict() for f in self.findings],
            "summary": self.summary,
        }


def _places(panel: pd.DataFrame, mask: pd.Series) -> tuple[str, list[dict[str, Any]]]:
    """Quote the first offending rows as 'file line N' (or 'database, row N') and records."""
    rows = panel.loc[mask, [SOURCE, LINE]].head(_LISTED)
    records = [
        {"file": str(s), "line": int(n)} for s, n in zip(rows[SOURCE], rows[LINE], strict=True)
    ]
    text = "; ".join(shown(place(r["file"], r["line"])) for r in records)
    extra = int(mask.sum()) - len(records)
    if extra > 0:
        text += f"; and {extra} more"
    return text, records


def _error(
    out: list[Finding],
    panel: pd.DataFrame,
    mask: pd.Series,
    code: str,
    what: str,
    todo: str,
    column: str,
) -> None:
    text, records = _places(panel, mask)
    out.append(
        Finding(
            code,
            "error",
            f"{int(mask.sum())} row(s) {what}: {text}. {todo}",
            {"column": column, "rows": records},
        )
    )


def _check_units(panel: pd.DataFrame, s: AnalysisSettings, out: list[Finding]) -> pd.DataFrame:
    changes: dict[str, pd.Series] = {}
    for col in dict.fromkeys((s.unit, *s.cluster_by)):
        # Work on the distinct values only, and keep the result categorical so that
        # later grouping, sorting and duplicate checks use integer codes.
        raw = panel[col].astype("string")
        codes, uniques = pd.factorize(raw, use_na_sentinel=True)
        original = pd.Series(uniques, dtype="string")
        cleaned = original.str.strip()
        categories = pd.Index(cleaned.dropna().unique()).sort_values()
        remap = np.append(categories.get_indexer(cleaned), -1)
        stripped = pd.Series(
            pd.Categorical.from_codes(remap[codes], categories=categories), index=raw.index
        )
        differs = np.append((cleaned != original).fillna(False).to_numpy(dtype=bool), False)
        changed = pd.Series(differs[codes], index=raw.index)
        if changed.any() and col == s.unit:
            text, records = _places(panel, changed)
            out.append(
                Finding(
                    "unit_whitespace",
                    "warning",
                    f"{int(changed.sum())} value(s) of unit column {col!r} had leading or "
                    f"trailing spaces, removed before matching units: {text}.",
                    {"column": col, "rows": records},
                )
            )
        empty = (stripped.isna() | (stripped == "")).fillna(True).astype(bool)
        if empty.any():
            code = "missing_unit" if col == s.unit else "missing_cluster"
            _error(
                out,
                panel,
                empty,
                code,
                f"have no value in column {col!r}",
                "Fill in the value or remove the rows.",
                col,
            )
        _check_spellings(panel, stripped, col, out)
        changes[col] = stripped
    return panel.assign(**changes)


def _spelling_key(values: pd.Index) -> pd.Series:
    """What an id means: Unicode NFC form; a number without leading zeros or ``.0``."""
    nfc = pd.Series([unicodedata.normalize("NFC", str(v)) for v in values], dtype="string")
    return nfc.str.replace(r"^([+-]?)0*(\d+?)(?:\.0+)?$", r"\1\2", regex=True)


def _check_spellings(panel: pd.DataFrame, ids: pd.Series, col: str, out: list[Finding]) -> None:
    """Refuse one id written in two ways: ``007`` and ``7``, ``7`` and ``7.0``, NFC and NFD.

    A spreadsheet or a typed column drops leading zeros, and text can arrive in
    either Unicode normal form; either would silently split a unit in two, and the
    estimators would then see two short units instead of one. Both spellings are
    refused even within one file: ids that differ only so are ambiguous to every
    reader and tool downstream, so genuinely distinct units need distinct ids.
    """
    categories = pd.Index(ids.cat.categories)
    key = _spelling_key(categories)
    clash = key.duplicated(keep=False).to_numpy()
    if not clash.any():
        return
    codes = ids.cat.codes.to_numpy()
    first_row = pd.Series(np.arange(len(codes))).groupby(codes).first()
    groups = pd.Series(np.flatnonzero(clash)).groupby(key[clash].to_numpy(), sort=False)
    parts, records = [], []
    for _, members in list(groups)[:_LISTED]:
        spelled = []
        for c in members:
            row = panel.iloc[int(first_row[c])]
            record = {
                "value": shown(categories[c]),
                "file": str(row[SOURCE]),
                "line": int(row[LINE]),
            }
            records.append(record)
            spelled.append(f"{record['value']!r} ({shown(place(record['file'], record['line']))})")
        parts.append(" and ".join(spelled))
    out.append(
        Finding(
            "unit_spelling",
            "error",
            f"column {col!r} writes the same id in more than one way, which would count "
            f"one unit as several: {'; '.join(parts)}. Write the ids the same way in every "
            "delivery (same leading zeros, same Unicode form); a source's 'rename' changes "
            "column names, not values.",
            {"column": col, "spellings": records},
        )
    )


def _check_periods(
    panel: pd.DataFrame, s: AnalysisSettings, out: list[Finding]
) -> tuple[pd.DataFrame, str]:
    parsed = parse_periods(panel[s.period])
    if parsed.mixed:
        counts = parsed.form[parsed.form != ""].value_counts()
        minority = parsed.form != counts.index[0]
        _error(
            out,
            panel,
            minority,
            "mixed_period_formats",
            f"write column {s.period!r} differently from the majority "
            f"({', '.join(f'{k}: {v}' for k, v in counts.items())})",
            "Write every period the same way (e.g. all 2021, or all 2021Q1).",
            s.period,
        )
        return panel, "mixed"
    missing = panel[s.period].isna()
    if missing.any():
        _error(
            out,
            panel,
            missing,
            "missing_period",
            f"have no value in period column {s.period!r}",
            "Fill in the period or remove the rows.",
            s.period,
        )
    bad = parsed.bad & ~missing
    if bad.any():
        _error(
            out,
            panel,
            bad,
            "bad_period",
            f"have a period in column {s.period!r} that is not a whole number of at most "
            f"{MAX_DIGITS} digits, a date (2021-03-31, from 1677-09-22 to 2262-04-11), a "
            "year-quarter (2021Q1) or a year-month (2021-03) "
            f"(e.g. {_sample(panel.loc[bad, s.period])})",
            "Correct the periods.",
            s.period,
        )
    if missing.any() or bad.any():
        return panel, parsed.frequency
    ordinal = parsed.ordinal.astype("int64")
    frequency = parsed.frequency
    far = _far_periods(ordinal)
    in_years = ordinal.between(*YEARS)
    if frequency == "integer" and in_years.mean() > 0.5:
        # Mostly years: a whole number far from them and outside 1000-2999 is a typo.
        typo = far & ~in_years
        if typo.any():
            _error(
                out,
                panel,
                typo,
                "bad_period",
                f"have a period in column {s.period!r} that is no year from {YEARS[0]} to "
                f"{YEARS[1]}, far from the other periods, which are years "
                f"(e.g. {_sample(panel.loc[typo, s.period])}; a mistyped year?)",
                "Correct the periods.",
                s.period,
            )
            return panel, frequency
        frequency = "year"
    if far.any():
        text, records = _places(panel, far)
        labels = ", ".join(repr(label_of(int(p), frequency)) for p in pd.unique(ordinal[far])[:3])
        out.append(
            Finding(
                "period_outlier",
                "warning",
                f"{int(far.sum())} row(s) have a period in column {s.period!r} far outside "
                f"the span of the others (e.g. {labels}): {text}. Check that it is not a "
                "typo; it counts as a period of its own in every estimator.",
                {"column": s.period, "rows": records},
            )
        )
    return panel.assign(**{s.period: ordinal}), frequency


def _sample(values: pd.Series) -> str:
    return ", ".join(repr(shown(v)) for v in values.head(3))


def _far_periods(ordinal: pd.Series) -> pd.Series:
    """Rows whose period lies more than `OUTLIER_SPANS` spans beyond the bulk of the rows."""
    if ordinal.empty:
        return pd.Series(False, index=ordinal.index)
    values = ordinal.to_numpy()
    low = np.quantile(values, 0.1, method="lower")
    high = np.quantile(values, 0.9, method="higher")
    reach = OUTLIER_SPANS * (int(high) - int(low) + 1)
    return (ordinal < int(low) - reach) | (ordinal > int(high) + reach)


def _check_keys(panel: pd.DataFrame, s: AnalysisSettings, out: list[Finding]) -> pd.DataFrame:
    """Duplicates within a file are errors; a later file re-delivering a key replaces it."""
    keys = [s.unit, s.period]
    # One int64 key per row (unit code, period rank, file code): hashing integers is
    # far cheaper than hashing a text column once per check.
    unit_code = pd.Series(panel[s.unit]).cat.codes.to_numpy(dtype=np.int64)
    period_rank = pd.factorize(panel[s.period])[0].astype(np.int64)
    file_code = pd.Series(panel[SOURCE]).astype("category").cat.codes.to_numpy(dtype=np.int64)
    key = unit_code * (int(period_rank.max(initial=0)) + 1) + period_rank
    n_files = int(file_code.max(initial=0)) + 1
    within = pd.Series(key * n_files + file_code, index=panel.index).duplicated(keep=False)
    if within.any():
        rows = panel.loc[within, [*keys, SOURCE, LINE]].head(2 * _LISTED)
        records = [
            {"unit": str(u), "period": str(p), "file": str(f), "line": int(n)}
            for u, p, f, n in zip(
                rows[s.unit], rows[s.period], rows[SOURCE], rows[LINE], strict=True
            )
        ]
        text = "; ".join(
            f"({shown(r['unit'])}, {shown(r['period'])}) at {shown(place(r['file'], r['line']))}"
            for r in records
        )
        n_keys = int(panel.loc[within].drop_duplicates([*keys, SOURCE]).shape[0])
        out.append(
            Finding(
                "duplicate_keys",
                "error",
                f"{n_keys} unit-period key(s) appear more than once in the same file: {text}. "
                "Each unit may have one row per period; remove the repeats or fix the keys.",
                {"keys": records},
            )
        )
        return panel
    again = pd.Series(key, index=panel.index).duplicated(keep=False)
    if not again.any():
        return panel
    values = [c for c in dict.fromkeys((s.outcome, *s.regressors, *s.cluster_by)) if c not in keys]
    group = panel.loc[again, [*keys, *values, SOURCE, LINE]]
    last = group.groupby(keys, sort=False)[values].transform("last")
    differs = ~((group[values] == last) | (group[values].isna() & last.isna()))
    revised_rows = differs.any(axis=1)
    n_keys = int(group.drop_duplicates(keys).shape[0])
    if revised_rows.any():
        stacked = differs.loc[revised_rows].stack()
        cells = stacked[stacked.to_numpy(dtype=bool)]
        records = []
        for row, col in cells.index[:_LISTED]:
            records.append(
                {
                    "unit": str(group.at[row, s.unit]),
                    "period": str(group.at[row, s.period]),
                    "column": str(col),
                    "old": str(group.at[row, col]),
                    "new": str(last.at[row, col]),
                    "file": str(group.at[row, SOURCE]),
                    "line": int(str(group.at[row, LINE])),
                }
            )
        text = "; ".join(
            f"({shown(r['unit'])}, {shown(r['period'])}) {shown(r['column'])}: "
            f"{shown(r['old'])} → {shown(r['new'])} "
            f"(earlier value at {shown(place(r['file'], r['line']))})"
            for r in records
        )
        out.append(
            Finding(
                "revised",
                "warning",
                f"{len(cells)} value(s) delivered earlier were revised by a later file and "
                f"the later value is used: {text}.",
                {"cells": records, "count": len(cells)},
            )
        )
    else:
        out.append(
            Finding(
                "redelivered",
                "info",
                f"{n_keys} unit-period key(s) were delivered again in a later file with the "
                "same values; each is used once.",
            )
        )
    return panel.drop_duplicates(keys, keep="last")


def _number_pattern(decimal: str, thousands: str) -> str:
    """A number written with this decimal mark and, if given, thousands separator."""
    d, t = re.escape(decimal), re.escape(thousands)
    whole = rf"(?:\d{{1,3}}(?:{t}\d{{3}})+|\d+)" if thousands else r"\d+"
    return (
        rf"[+-]?(?:{whole}(?:{d}\d*)?|{d}\d+)(?:[eE][+-]?\d+)?"
        r"|[+-]?(?:inf|infinity)"  # read, then refused as non_finite
    )


def _numbers_of_source(text: pd.Series, spec: SourceSpec) -> pd.Series:
    """Numbers from text written with the source's marks; NaN where it is not one."""
    decimal, thousands = (
        ("." if spec.path.suffix.lower() in {".parquet", ".pq"} else spec.decimal),
        (spec.thousands),
    )
    ok = text.str.fullmatch(_number_pattern(decimal, thousands), case=False).fillna(False)
    plain = text.where(ok)
    if thousands:
        plain = plain.str.replace(thousands, "", regex=False)
    plain = plain.str.replace(decimal, ".", regex=False)
    return pd.to_numeric(plain, errors="coerce").astype("float64")


def _to_numbers(raw: pd.Series, panel: pd.DataFrame, s: AnalysisSettings) -> pd.Series:
    """Numbers of one column; text is read with the marks of the source it came from.

    A cell that is not a number written with its own file's decimal mark (and
    thousands separator, where one is set) becomes NaN: ``20.849`` under a decimal
    comma is never taken for 20.849.
    """
    if pd.api.types.is_numeric_dtype(raw.dtype) and not pd.api.types.is_bool_dtype(raw.dtype):
        return raw.astype("float64")
    is_text = raw.map(lambda v: isinstance(v, str), na_action="ignore").fillna(False).astype(bool)
    values = pd.to_numeric(raw.where(~is_text), errors="coerce").astype("float64")
    sources = panel[SOURCE].astype("string")
    for source in sources[is_text].unique():
        rows = is_text & (sources == source)
        spec = source_spec_of(source_path(str(source)), s.sources, s.csv)
        values[rows] = _numbers_of_source(raw[rows].astype("string"), spec)
    return values


def _check_numeric(panel: pd.DataFrame, s: AnalysisSettings, out: list[Finding]) -> pd.DataFrame:
    converted: dict[str, pd.Series] = {}
    for col in dict.fromkeys((s.outcome, *s.regressors)):
        raw = panel[col]
        values = _to_numbers(raw, panel, s)
        not_number = values.isna() & raw.notna()
        if not_number.any():
            sample = ", ".join(repr(str(v)) for v in raw[not_number].head(3))
            _error(
                out,
                panel,
                not_number,
                "non_numeric",
                f"hold text where column {col!r} needs a number written with the file's "
                f"decimal mark (e.g. {sample})",
                "Correct the values, leave them empty for missing, list the marker "
                "under csv.missing, or set csv.decimal (and csv.thousands) to the file's "
                "marks.",
                col,
            )
        infinite = pd.Series(np.isinf(values.to_numpy()), index=values.index)
        if infinite.any():
            _error(
                out,
                panel,
                infinite,
                "non_finite",
                f"hold an infinite value in column {col!r}",
                "Correct the values.",
                col,
            )
        converted[col] = values
    return panel.assign(**converted)


def _summarise(
    panel: pd.DataFrame, s: AnalysisSettings, frequency: str, out: list[Finding]
) -> dict[str, Any]:
    units = int(panel[s.unit].nunique())
    periods = np.sort(panel[s.period].unique())
    n_periods = len(periods)
    per_unit = panel.groupby(s.unit, observed=True)[s.period].agg(["count", "min", "max"])
    complete = int((per_unit["count"] == n_periods).sum())
    balanced = complete == units
    span = per_unit["max"] - per_unit["min"] + 1
    gaps = int((span - per_unit["count"]).clip(lower=0).sum())
    first, last = (int(periods[0]), int(periods[-1])) if n_periods else (None, None)
    summary: dict[str, Any] = {
        "rows": len(panel),
        "units": units,
        "periods": int(n_periods),
        "frequency": frequency,
        "first_period": label_of(first, frequency) if first is not None else None,
        "last_period": label_of(last, frequency) if last is not None else None,
        "balanced": bool(balanced),
        "complete_units": complete,
        "complete_share": complete / units if units else 0.0,
        "gaps": gaps,
        "period_labels": {str(int(p)): label_of(int(p), frequency) for p in periods},
    }
    if balanced:
        msg = f"The panel is balanced: {units} units × {n_periods} periods ({frequency})."
    else:
        msg = (
            f"The panel is unbalanced: {complete} of {units} units are observed in all "
            f"{n_periods} periods ({frequency})."
        )
    out.append(Finding("balance", "info", msg, {"complete_share": summary["complete_share"]}))
    if gaps:
        holes = int(((span - per_unit["count"]) > 0).sum())
        out.append(
            Finding(
                "gaps",
                "info",
                f"{gaps} unit-period(s) are missing inside the observed span of "
                f"{holes} unit(s); first differences are not formed across them.",
                {"gaps": gaps, "units": holes},
            )
        )
    if first is not None:
        entered = int((per_unit["min"] > first).sum())
        left = int((per_unit["max"] < last).sum())
        if entered or left:
            out.append(
                Finding(
                    "entry_exit",
                    "info",
                    f"{entered} unit(s) enter after the first period and {left} "
                    "leave before the last; see the attrition check of the audit.",
                    {"entered": entered, "left": left},
                )
            )
    singletons = int((per_unit["count"] == 1).sum())
    if singletons:
        out.append(
            Finding(
                "singleton_units",
                "warning",
                f"{singletons} unit(s) are observed in one period only; they carry "
                "no information for fixed effects or first differences.",
            )
        )
    for code, n, key, col in (
        ("too_few_units", units, "min_units", s.unit),
        ("too_few_periods", int(n_periods), "min_periods", s.period),
    ):
        least = getattr(s.gates, key)
        if n < least:
            out.append(
                Finding(
                    code,
                    "error",
                    f"the panel has {n} distinct value(s) in column {col!r}; at least "
                    f"{least} are needed (gate {key}).",
                    {"column": col},
                )
            )
    return summary


def _check_missing(panel: pd.DataFrame, s: AnalysisSettings, out: list[Finding]) -> None:
    model_cols = list(dict.fromkeys((s.outcome, *s.regressors)))
    missing = panel[model_cols].isna()
    for col, n in missing.sum().items():
        if n:
            out.append(
                Finding(
                    "missing_values",
                    "warning",
                    f"column {col!r} is empty in {int(n)} of {len(panel)} rows.",
                    {"column": str(col), "count": int(n)},
                )
            )
    complete = ~missing.any(axis=1)
    dropped = int((~complete).sum())
    share = dropped / len(panel) if len(panel) else 0.0
    limit = s.gates.max_dropped_share
    if dropped:
        severity: Severity = "error" if share > limit else "info"
        tail = f", more than the gate max_dropped_share={limit}." if severity == "error" else "."
        out.append(
            Finding(
                "rows_dropped",
                severity,
                f"{dropped} row(s) ({share:.1%}) have a missing outcome or regressor "
                f"and are left out of every estimator{tail}",
                {"count": dropped, "share": share},
            )
        )
    kept = panel.loc[complete, [s.unit, s.period]]
    unit_codes = pd.factorize(kept[s.unit])[0]
    order = np.lexsort((kept[s.period].to_numpy(), unit_codes))
    u, t = unit_codes[order], kept[s.period].to_numpy()[order]
    # Calendar arithmetic: the period before ordinal p is p - 1, observed or not.
    fd = int(((u[1:] == u[:-1]) & (t[1:] == t[:-1] + 1)).sum())
    counts = {
        "pooled_ols": len(kept),
        "fixed_effects": len(kept),
        "random_effects": len(kept),
        "correlated_random_effects": len(kept),
        "first_difference": fd,
        "between": int(kept[s.unit].nunique()),
    }
    wanted = {k: v for k, v in counts.items() if k in s.estimators}
    out.append(
        Finding(
            "rows_per_estimator",
            "info",
            "rows each estimator will use: "
            + ", ".join(f"{k} {v}" for k, v in wanted.items())
            + " (first differences lose each unit's first period and the periods "
            "after a gap; between uses one row per unit).",
            {"rows": wanted},
        )
    )


def _check_magnitude(panel: pd.DataFrame, s: AnalysisSettings, out: list[Finding]) -> None:
    """Refuse values whose squares or products overflow, and columns too tiny to invert."""
    for col in dict.fromkeys((s.outcome, *s.regressors)):
        size = panel[col].abs()
        huge = size > MAGNITUDE
        if huge.any():
            _error(
                out,
                panel,
                huge,
                "value_too_large",
                f"hold a value in column {col!r} beyond ±{MAGNITUDE:.0e}, where sums of "
                "squares overflow",
                "Correct the values, or express the column in larger units (thousands, "
                "millions) so that its values stay within that bound.",
                col,
            )
        elif 0.0 < size.max() < 1.0 / MAGNITUDE:
            _error(
                out,
                panel,
                size > 0.0,
                "value_too_small",
                f"hold the non-zero values of column {col!r}, all below {1 / MAGNITUDE:.0e} "
                "in size, where squares underflow and the coefficient's variance overflows",
                "Express the column in smaller units (e.g. multiply it by a power of ten) so "
                "that its values are of ordinary size.",
                col,
            )


def _check_regressors(panel: pd.DataFrame, s: AnalysisSettings, out: list[Finding]) -> None:
    groups = panel[s.unit]
    outcome = panel.loc[panel[[s.outcome, *s.regressors]].notna().all(axis=1), s.outcome]
    if outcome.nunique() < 2:
        out.append(
            Finding(
                "constant_outcome",
                "error",
                f"the outcome {s.outcome!r} takes one value in every usable row; there is "
                "nothing to explain. Check the column and the delivery.",
                {"column": s.outcome},
            )
        )
    for col in s.regressors:
        # Scaled to its largest value first, so that a regressor in tiny units is not
        # mistaken for a constant when its variance underflows.
        top = float(panel[col].abs().max())
        x = panel[col] / top if np.isfinite(top) and top > 0 else panel[col]
        total = float(x.var(ddof=0)) if x.notna().sum() > 1 else 0.0
        within = float((x - x.groupby(groups).transform("mean")).var(ddof=0))
        if total == 0.0 or not np.isfinite(total):
            out.append(
                Finding(
                    "constant_regressor",
                    "error",
                    f"regressor {col!r} takes one value in every row; no estimator "
                    "can use it. Remove it from the regressors.",
                    {"column": col},
                )
            )
        elif within <= 1e-12 * total:
            out.append(
                Finding(
                    "time_invariant_regressor",
                    "info",
                    f"regressor {col!r} does not change within units; fixed effects "
                    "and first differences cannot estimate it and leave it out.",
                    {"column": col},
                )
            )
        elif within / total < LOW_WITHIN_SHARE:
            out.append(
                Finding(
                    "low_within_variation",
                    "warning",
                    f"only {within / total:.1%} of the variance of {col!r} is within "
                    "units; fixed effects rest on little variation and any "
                    "measurement error in it weighs heavily.",
                    {"column": col, "within_share": within / total},
                )
            )


def _check_clusters(panel: pd.DataFrame, s: AnalysisSettings, out: list[Finding]) -> None:
    for col in s.cluster_by:
        sizes = panel.groupby(col, observed=True).size()
        g = len(sizes)
        least = s.gates.min_clusters
        if g < least:
            out.append(
                Finding(
                    "too_few_clusters",
                    "error",
                    f"cluster column {col!r} has {g} distinct value(s); at least "
                    f"{least} are needed (gate min_clusters; 2 at the very least, "
                    "about 30 to be reliable). Choose another column in 'cluster_by' "
                    "or lower the gate.",
                    {"column": col, "clusters": g},
                )
            )
        elif g < FEW_CLUSTERS and {"cluster", "wild_bootstrap"} & set(s.inference):
            out.append(
                Finding(
                    "few_clusters",
                    "warning",
                    f"only {g} clusters in {col!r} (smallest {int(sizes.min())} rows, "
                    f"largest {int(sizes.max())}); cluster-robust standard errors "
                    f"are unreliable below about {FEW_CLUSTERS} clusters, so the "
                    "wild cluster bootstrap is reported.",
                    {"column": col, "clusters": g},
                )
            )


def validate_panel(raw: pd.DataFrame, settings: AnalysisSettings) -> ValidationResult:
    """Check a stacked panel (as returned by `ingest.read_panel`).

    Returns
    -------
    ValidationResult
        The panel with typed columns (unit and cluster columns as stripped text,
        period as an integer ordinal on its detected frequency, outcome and
        regressors as float64, NaN where missing), one row per unit-period (a
        later delivery replaces an earlier one), sorted by unit and period, plus
        the findings and a summary. The input is not modified.
    """
    findings: list[Finding] = []
    panel = _check_units(raw, settings, findings)
    panel, frequency = _check_periods(panel, settings, findings)
    panel = _check_numeric(panel, settings, findings)
    if not any(f.severity == "error" for f in findings):
        _check_magnitude(panel, settings, findings)
    if any(f.severity == "error" for f in findings):
        return ValidationResult(panel, tuple(findings), {"rows": len(panel)})
    panel = _check_keys(panel, settings, findings)
    if any(f.severity == "error" for f in findings):
        return ValidationResult(panel, tuple(findings), {"rows": len(panel)})
    summary = _summarise(panel, settings, frequency, findings)
    _check_missing(panel, settings, findings)
    _check_regressors(panel, settings, findings)
    _check_clusters(panel, settings, findings)
    panel = panel.sort_values([settings.unit, settings.period], kind="stable", ignore_index=True)
    return ValidationResult(panel, tuple(findings), summary)
