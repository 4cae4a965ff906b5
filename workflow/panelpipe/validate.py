"""Validate: check identifiers, periods, types and balance before estimating.

Every problem becomes a `Finding` with a stable code. Errors stop the run before
any estimation; warnings and information travel into the report. All checks are
vectorised: no Python loop runs over rows.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from .config import AnalysisSettings
from .findings import Finding, Severity, worst_status
from .ingest import LINE, SOURCE

__all__ = ["FEW_CLUSTERS", "ValidationResult", "validate_panel"]

#: Common practice, no single source: below roughly 30-50 clusters the
#: cluster-robust standard error is unreliable.
FEW_CLUSTERS = 30

_LISTED = 10  # how many offending rows or keys a message quotes


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
    """Quote the first offending rows as 'file line N' and structured records."""
    rows = panel.loc[mask, [SOURCE, LINE]].head(_LISTED)
    records = [
        {"file": str(s), "line": int(n)} for s, n in zip(rows[SOURCE], rows[LINE], strict=True)
    ]
    text = "; ".join(f"{r['file']} line {r['line']}" for r in records)
    extra = int(mask.sum()) - len(records)
    if extra > 0:
        text += f"; and {extra} more"
    return text, records


def _check_keys(panel: pd.DataFrame, s: AnalysisSettings, out: list[Finding]) -> pd.DataFrame:
    unit = panel[s.unit].str.strip()
    changed = (unit != panel[s.unit]).fillna(False)
    if changed.any():
        text, records = _places(panel, changed)
        out.append(
            Finding(
                "unit_whitespace",
                "warning",
                f"{int(changed.sum())} value(s) of unit column {s.unit!r} had leading or trailing "
                f"spaces, removed before matching units: {text}.",
                {"column": s.unit, "rows": records},
            )
        )
        panel = panel.assign(**{s.unit: unit})
    missing_unit = panel[s.unit].isna() | (panel[s.unit] == "")
    if missing_unit.any():
        text, records = _places(panel, missing_unit)
        out.append(
            Finding(
                "missing_unit",
                "error",
                f"{int(missing_unit.sum())} row(s) have no value in unit column {s.unit!r}: "
                f"{text}. Fill in the unit or remove the rows.",
                {"column": s.unit, "rows": records},
            )
        )
    raw_period = panel[s.period]
    period = pd.to_numeric(raw_period, errors="coerce")
    bad_period = period.isna() | ~np.isfinite(period.astype("float64").fillna(0.0))
    if not bad_period.any():
        bad_period = period.astype("float64") != np.floor(period.astype("float64"))
    if bad_period.any():
        text, records = _places(panel, bad_period)
        out.append(
            Finding(
                "bad_period",
                "error",
                f"{int(bad_period.sum())} row(s) have a missing or non-integer period in column "
                f"{s.period!r}: {text}. Periods must be whole numbers such as years.",
                {"column": s.period, "rows": records},
            )
        )
    else:
        panel = panel.assign(**{s.period: period.astype("int64")})
    if not (missing_unit.any() or bad_period.any()):
        dup = panel.duplicated([s.unit, s.period], keep=False)
        if dup.any():
            keys = panel.loc[dup, [s.unit, s.period, SOURCE, LINE]].head(2 * _LISTED)
            records = [
                {"unit": str(u), "period": int(p), "file": str(f), "line": int(n)}
                for u, p, f, n in zip(
                    keys[s.unit], keys[s.period], keys[SOURCE], keys[LINE], strict=True
                )
            ]
            text = "; ".join(
                f"({r['unit']}, {r['period']}) at {r['file']} line {r['line']}" for r in records
            )
            n_keys = int(panel.loc[dup].drop_duplicates([s.unit, s.period]).shape[0])
            out.append(
                Finding(
                    "duplicate_keys",
                    "error",
                    f"{n_keys} unit-period key(s) appear more than once: {text}. "
                    "Each unit may have one row per period; remove the repeats or fix the keys.",
                    {"keys": records},
                )
            )
    return panel


def _check_numeric(panel: pd.DataFrame, s: AnalysisSettings, out: list[Finding]) -> pd.DataFrame:
    numeric = dict.fromkeys((s.outcome, *s.regressors))
    converted: dict[str, pd.Series] = {}
    for col in numeric:
        raw = panel[col]
        values = pd.to_numeric(raw, errors="coerce").astype("float64")
        not_number = values.isna() & raw.notna()
        if not_number.any():
            text, records = _places(panel, not_number)
            sample = ", ".join(repr(str(v)) for v in raw[not_number].head(3))
            out.append(
                Finding(
                    "non_numeric",
                    "error",
                    f"column {col!r} must be numeric but {int(not_number.sum())} value(s) are not "
                    f"(e.g. {sample}): {text}. Correct the values or leave them empty for missing.",
                    {"column": col, "rows": records},
                )
            )
        infinite = pd.Series(np.isinf(values.to_numpy()), index=values.index)
        if infinite.any():
            text, records = _places(panel, infinite)
            out.append(
                Finding(
                    "non_finite",
                    "error",
                    f"column {col!r} holds {int(infinite.sum())} infinite value(s): {text}.",
                    {"column": col, "rows": records},
                )
            )
        converted[col] = values
    return panel.assign(**converted)


def _summarise(panel: pd.DataFrame, s: AnalysisSettings, out: list[Finding]) -> dict[str, Any]:
    units = panel[s.unit].nunique()
    periods = np.sort(panel[s.period].unique())
    n_periods = len(periods)
    per_unit = panel.groupby(s.unit, observed=True)[s.period].agg(["count", "min", "max"])
    complete = int((per_unit["count"] == n_periods).sum())
    balanced = complete == units
    span = per_unit["max"] - per_unit["min"] + 1
    gaps = int((span - per_unit["count"]).clip(lower=0).sum())
    summary: dict[str, Any] = {
        "rows": len(panel),
        "units": int(units),
        "periods": int(n_periods),
        "first_period": str(periods[0]) if n_periods else None,
        "last_period": str(periods[-1]) if n_periods else None,
        "balanced": bool(balanced),
        "complete_units": complete,
        "complete_share": complete / units if units else 0.0,
        "gaps": gaps,
    }
    if balanced:
        out.append(
            Finding(
                "balance", "info", f"The panel is balanced: {units} units × {n_periods} periods."
            )
        )
    else:
        out.append(
            Finding(
                "balance",
                "info",
                f"The panel is unbalanced: {complete} of {units} units are observed in all "
                f"{n_periods} periods; {gaps} unit-period(s) are missing inside units' spans.",
            )
        )
    singletons = int((per_unit["count"] == 1).sum())
    if singletons:
        out.append(
            Finding(
                "singleton_units",
                "warning",
                f"{singletons} unit(s) are observed in one period only; they carry no information "
                "for fixed effects or first differences.",
            )
        )
    if units < int(s.gates.get("min_units", 2)):
        out.append(
            Finding(
                "too_few_units",
                "error",
                f"the panel has {units} unit(s) in column {s.unit!r}; at least "
                f"{s.gates.get('min_units', 2)} are needed (gate min_units).",
            )
        )
    if n_periods < int(s.gates.get("min_periods", 2)):
        out.append(
            Finding(
                "too_few_periods",
                "error",
                f"the panel has {n_periods} period(s) in column {s.period!r}; at least "
                f"{s.gates.get('min_periods', 2)} are needed (gate min_periods).",
            )
        )
    return summary


def _check_missing(panel: pd.DataFrame, s: AnalysisSettings, out: list[Finding]) -> None:
    model_cols = [s.outcome, *s.regressors]
    missing = panel[model_cols].isna()
    counts = missing.sum()
    for col, n in counts.items():
        if n:
            out.append(
                Finding(
                    "missing_values",
                    "warning",
                    f"column {col!r} is empty in {int(n)} of {len(panel)} rows.",
                    {"column": str(col), "count": int(n)},
                )
            )
    dropped = int(missing.any(axis=1).sum())
    share = dropped / len(panel) if len(panel) else 0.0
    limit = float(s.gates.get("max_dropped_share", 0.5))
    if dropped:
        severity: Severity = "error" if share > limit else "info"
        out.append(
            Finding(
                "rows_dropped",
                severity,
                f"{dropped} row(s) ({share:.1%}) have a missing outcome or regressor and are left "
                f"out of every estimator"
                + (
                    f", more than the gate max_dropped_share={limit}."
                    if severity == "error"
                    else "."
                ),
                {"count": dropped, "share": share},
            )
        )


def _check_regressors(panel: pd.DataFrame, s: AnalysisSettings, out: list[Finding]) -> None:
    for col in s.regressors:
        x = panel[col]
        total = float(x.var(ddof=0)) if x.notna().sum() > 1 else 0.0
        within = float((x - x.groupby(panel[s.unit]).transform("mean")).var(ddof=0))
        if total == 0.0:
            out.append(
                Finding(
                    "constant_regressor",
                    "error",
                    f"regressor {col!r} takes one value in every row; no estimator can use it. "
                    "Remove it from the regressors.",
                    {"column": col},
                )
            )
        elif within <= 1e-12 * total:
            out.append(
                Finding(
                    "time_invariant_regressor",
                    "info",
                    f"regressor {col!r} does not change within units; fixed effects and first "
                    "differences cannot estimate it and leave it out.",
                    {"column": col},
                )
            )


def _check_clusters(panel: pd.DataFrame, s: AnalysisSettings, out: list[Finding]) -> None:
    for col in s.cluster_by:
        sizes = panel.groupby(col, observed=True).size()
        g = len(sizes)
        least = int(s.gates.get("min_clusters", 2))
        if g < least:
            out.append(
                Finding(
                    "too_few_clusters",
                    "error",
                    f"cluster column {col!r} has {g} distinct value(s); at least {least} are "
                    "needed (gate min_clusters; 2 at the very least, about 30 to be reliable). "
                    "Choose another column in 'cluster_by' or lower the gate.",
                    {"column": col, "clusters": g},
                )
            )
        elif g < FEW_CLUSTERS and {"cluster", "wild_bootstrap"} & set(s.inference):
            out.append(
                Finding(
                    "few_clusters",
                    "warning",
                    f"only {g} clusters in {col!r} (smallest {int(sizes.min())} rows, largest "
                    f"{int(sizes.max())}); cluster-robust standard errors are unreliable below "
                    f"about {FEW_CLUSTERS} clusters, so the wild cluster bootstrap is reported.",
                    {"column": col, "clusters": g},
                )
            )


def validate_panel(raw: pd.DataFrame, settings: AnalysisSettings) -> ValidationResult:
    """Check a stacked panel (as returned by `ingest.read_panel`).

    Returns
    -------
    ValidationResult
        The panel with typed columns (unit as stripped text, period as integer,
        outcome and regressors as float64, NaN where missing), sorted by unit and
        period, plus the findings and a summary. The input is not modified.
    """
    findings: list[Finding] = []
    panel = _check_keys(raw, settings, findings)
    panel = _check_numeric(panel, settings, findings)
    if any(f.severity == "error" for f in findings):
        return ValidationResult(panel, tuple(findings), {"rows": len(panel)})
    summary = _summarise(panel, settings, findings)
    _check_missing(panel, settings, findings)
    _check_regressors(panel, settings, findings)
    _check_clusters(panel, settings, findings)
    panel = panel.sort_values([settings.unit, settings.period], kind="stable", ignore_index=True)
    return ValidationResult(panel, tuple(findings), summary)
