"""Estimate: fit every configured estimator with every configured inference.

This module prepares one common estimation sample, decides per estimator which
regressors it can identify, fits each estimator once through the numerical
core in ``fit.py`` (checked against linearmodels in
tests/test_fit_linearmodels.py) and collects coefficients, covariances,
intervals and p-values under every inference in plain typed objects.

Periods are calendar ordinals (see periods.py): the period before ``p`` is
``p - 1`` whether or not anybody is observed in it, so first differences and
Driscoll-Kraay lags never bridge a period missing for everybody. With more than
`ABSORB_PERIODS` periods the period effects are absorbed (partialled out, with
their degrees of freedom counted) instead of built as dense dummies; random
effects and correlated random effects cannot take them that way and are left out
with a finding.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from .bootstrap import wild_cluster_bootstrap
from .config import AnalysisSettings
from .distributions import f_sf, t_ppf, t_sf
from .findings import Finding, PanelpipeError
from .fit import (
    Regression,
    constant_within,
    covariance,
    demean,
    demean_two_way,
    group_means,
    least_squares,
    random_effects_components,
    triangular_factor,
)
from .validate import FEW_CLUSTERS

__all__ = [
    "ABSORB_PERIODS",
    "ESTIMATOR_LABELS",
    "INFERENCE_LABELS",
    "INTERCEPT",
    "MEAN_PREFIX",
    "PERIOD_PREFIX",
    "Design",
    "InferenceResult",
    "ModelResult",
    "estimate_all",
    "estimate_one",
    "make_design",
    "planned_inference",
    "usable_rows",
]

INTERCEPT = "_intercept"

ESTIMATOR_LABELS = {
    "pooled_ols": "Pooled OLS",
    "fixed_effects": "Fixed effects (within)",
    "random_effects": "Random effects (Swamy–Arora)",
    "first_difference": "First differences",
    "between": "Between (unit means)",
    "correlated_random_effects": "Correlated random effects (Mundlak)",
}

INFERENCE_LABELS = {
    "classical": "classical",
    "robust": "heteroskedasticity-robust",
    "cluster": "clustered",
    "driscoll_kraay": "Driscoll–Kraay",
    "wild_bootstrap": "wild cluster bootstrap",
}

PERIOD_PREFIX = "_period_"
MEAN_PREFIX = "_unit_mean_"

#: Above this many periods, period effects are absorbed rather than built as dummies:
#: a dense dummy matrix costs N x T x 8 bytes (60,000 rows x 1,500 days: 720 MB per
#: copy), while absorbing costs O(N K + T^2). Below it the dummies are kept, so that
#: their coefficients appear in the results.
ABSORB_PERIODS = 60

_CANNOT_ABSORB = {"random_effects", "correlated_random_effects"}


@dataclass(frozen=True)
class Design:
    """The common estimation sample, indexed by (unit, period)."""

    y: pd.Series
    x: pd.DataFrame
    period_dummies: pd.DataFrame
    clusters: pd.DataFrame
    settings: AnalysisSettings
    unit_names: np.ndarray
    """The unit's name (text) for each integer unit code."""
    cluster_names: Mapping[str, np.ndarray]
    """Per cluster column, the cluster's value (text) for each integer code."""
    absorb_periods: bool = False
    """Period effects are partialled out instead of ``period_dummies`` (many periods)."""

    @property
    def nobs(self) -> int:
        return len(self.y)

    @property
    def unit_codes(self) -> np.ndarray:
        """Integer unit codes 0..G-1 in the order of the sorted unit names."""
        index = self.y.index
        assert isinstance(index, pd.MultiIndex)
        return np.asarray(index.codes[0])

    @property
    def units(self) -> pd.Index:
        """The unit of each row, by name (plain Python strings)."""
        return pd.Index(self.unit_names[self.unit_codes], dtype=object)

    @property
    def periods(self) -> pd.Index:
        return self.y.index.get_level_values(1)


@dataclass(frozen=True)
class InferenceResult:
    """Standard errors, covariance, intervals and p-values under one inference."""

    key: str
    std_errors: pd.Series
    cov: pd.DataFrame
    p_values: pd.Series
    ci_low: pd.Series
    ci_high: pd.Series
    reference: str
    note: str

    def to_dict(self) -> dict[str, Any]:
        return {
            "std_errors": _floats(self.std_errors),
            "p_values": _floats(self.p_values),
            "ci_low": _floats(self.ci_low),
            "ci_high": _floats(self.ci_high),
            "cov": {r: _floats(self.cov.loc[r]) for r in self.cov.index},
            "reference": self.reference,
            "note": self.note,
        }

    @classmethod
    def from_dict(cls, key: str, d: Mapping[str, Any]) -> InferenceResult:
        cov = pd.DataFrame(d["cov"]).T
        return cls(
            key,
            pd.Series(d["std_errors"]),
            cov.loc[cov.index, cov.index],
            pd.Series(d["p_values"]),
            pd.Series(d["ci_low"]),
            pd.Series(d["ci_high"]),
            d["reference"],
            d["note"],
        )


@dataclass(frozen=True)
class ModelResult:
    """One fitted estimator: coefficients and every inference computed for it."""

    key: str
    nobs: int
    units: int
    periods: int
    params: pd.Series
    terms: tuple[str, ...]
    omitted: Mapping[str, str]
    inference: Mapping[str, InferenceResult]
    headline_inference: str
    statistics: Mapping[str, float] = field(default_factory=dict)

    @property
    def label(self) -> str:
        return ESTIMATOR_LABELS[self.key]

    def to_dict(self) -> dict[str, Any]:
        """The ``models.<key>`` entry of results.json (plus extra detail)."""
        shown = [t for t in self.params.index if not t.startswith(("_period_", MEAN_PREFIX))]
        return {
            "label": self.label,
            "nobs": self.nobs,
            "units": self.units,
            "periods": self.periods,
            "params": _floats(self.params[shown]),
            "std_errors": {
                k: _floats(v.std_errors.reindex(shown).dropna()) for k, v in self.inference.items()
            },
            "headline_inference": self.headline_inference,
            "terms": list(self.terms),
            "omitted": dict(self.omitted),
            "inference": {k: v.to_dict() for k, v in self.inference.items()},
            "statistics": dict(self.statistics),
            "all_params": _floats(self.params),
        }

    @classmethod
    def from_dict(cls, key: str, d: Mapping[str, Any]) -> ModelResult:
        """Rebuild a result written by `to_dict` (the run's models.json)."""
        return cls(
            key=key,
            nobs=d["nobs"],
            units=d["units"],
            periods=d["periods"],
            params=pd.Series(d["all_params"], dtype=float),
            terms=tuple(d["terms"]),
            omitted=d["omitted"],
            inference={k: InferenceResult.from_dict(k, v) for k, v in d["inference"].items()},
            headline_inference=d["headline_inference"],
            statistics=d["statistics"],
        )


def _floats(s: pd.Series) -> dict[str, float]:
    return {str(k): float(v) for k, v in s.items()}


def usable_rows(panel: pd.DataFrame, settings: AnalysisSettings) -> pd.Series:
    """The rows that have the outcome and every regressor: those the estimators use."""
    return panel[[settings.outcome, *settings.regressors]].notna().all(axis=1)


def make_design(panel: pd.DataFrame, settings: AnalysisSettings) -> tuple[Design, list[Finding]]:
    """Build the common estimation sample from a validated panel.

    Rows with a missing outcome or regressor are dropped for every estimator, so
    that all estimators are compared on the same rows.
    """
    s = settings
    data = panel.loc[usable_rows(panel, s)].sort_values([s.unit, s.period], kind="stable")
    # Units enter the index as integer codes (0..G-1 in sorted name order): the
    # numerical core groups on them, and their names are kept beside.
    unit_codes, unit_names = pd.factorize(
        data[s.unit].astype(str).to_numpy(dtype=object), sort=True
    )
    index = pd.MultiIndex.from_arrays(
        [unit_codes.astype(np.int64), data[s.period].to_numpy()], names=[s.unit, s.period]
    )
    y = pd.Series(data[s.outcome].to_numpy(dtype=float), index=index, name=s.outcome)
    x = pd.DataFrame(
        data[list(s.regressors)].to_numpy(dtype=float), index=index, columns=list(s.regressors)
    )
    periods = pd.Index(np.sort(data[s.period].unique()))
    absorb = s.period_effects and len(periods) > ABSORB_PERIODS
    if s.period_effects and 1 < len(periods) <= ABSORB_PERIODS:
        codes = pd.Categorical(data[s.period].to_numpy(), categories=periods)
        dummies = pd.get_dummies(codes, drop_first=True, dtype=float)
        dummies.columns = [f"{PERIOD_PREFIX}{p}" for p in periods[1:]]
        dummies.index = index
    else:
        dummies = pd.DataFrame(index=index)
    factorized = {c: pd.factorize(data[c].astype(str).to_numpy()) for c in s.cluster_by}
    clusters = pd.DataFrame({c: codes for c, (codes, _) in factorized.items()}, index=index)
    cluster_names = {c: np.asarray(values, dtype=object) for c, (_, values) in factorized.items()}
    findings: list[Finding] = []
    names = np.asarray(unit_names, dtype=object)
    if absorb:
        findings.append(
            Finding(
                "period_effects_absorbed",
                "info",
                f"{len(periods)} periods: the period effects are absorbed (partialled out, "
                "their degrees of freedom counted) rather than estimated as dummies, so "
                "their coefficients are not reported.",
                {"periods": len(periods)},
            )
        )
    return Design(y, x, dummies, clusters, s, names, cluster_names, absorb), findings


# ---------------------------------------------------------------- identification


def period_codes(design: Design) -> np.ndarray:
    """Integer codes 0..T-1 of the observed periods, in period order (for grouping).

    Not for "the period before": consecutive codes may be years apart when a
    period is missing for everybody; use `period_ordinals` for calendar steps.
    """
    periods = design.periods
    levels = np.sort(periods.unique())
    return np.searchsorted(levels, periods.to_numpy()).astype(np.intp)


def period_ordinals(design: Design) -> np.ndarray:
    """Each row's period as its calendar ordinal (the period before ``p`` is ``p - 1``)."""
    return np.asarray(design.periods.to_numpy(), dtype=np.int64)


def _absorb_two_way(values: np.ndarray, design: Design) -> tuple[np.ndarray, int]:
    return demean_two_way(values, design.unit_codes, period_codes(design))


def _transformed(design: Design, key: str) -> np.ndarray:
    """The regressors as the estimator sees them after removing its effects."""
    x = design.x.to_numpy()
    unit = design.unit_codes
    two_way = design.settings.period_effects
    if key == "between":
        return demean(group_means(x, unit), np.zeros(int(unit.max()) + 1, dtype=np.intp))
    if key == "first_difference":
        # No intercept in the differenced regression: without period effects the
        # differences are used as they are; the differenced period dummies span one
        # intercept per period that has differences, which demeaning by period removes.
        diff = first_differences(x, design)
        if not two_way or not len(diff):
            return diff
        return demean(diff, pd.factorize(period_codes(design)[first_difference_rows(design)])[0])
    if key == "fixed_effects":
        return _absorb_two_way(x, design)[0] if two_way else demean(x, unit)
    # pooled, random effects and the Mundlak device keep unit-level variation
    if two_way:
        return demean(x, period_codes(design))
    return x - x.mean(axis=0)


def first_difference_rows(design: Design) -> np.ndarray:
    """Positions of rows whose previous calendar period is observed for the same unit.

    A gap breaks the chain, also a period missing for everybody: the difference
    across a missing period is not formed, as linearmodels' first-difference
    estimator does.
    """
    unit = design.unit_codes
    t = period_ordinals(design)
    ok = (unit[1:] == unit[:-1]) & (t[1:] == t[:-1] + 1)
    return np.flatnonzero(ok) + 1


def first_differences(values: np.ndarray, design: Design) -> np.ndarray:
    """Within-unit differences over consecutive observed periods (rows sorted)."""
    rows = first_difference_rows(design)
    out: np.ndarray = values[rows] - values[rows - 1]
    return out


def dependencies(columns: np.ndarray, tol: float = 1e-8) -> tuple[list[int], dict[int, list[int]]]:
    """Scan columns left to right; the kept ones and what explains each one left out.

    Column j is left out when what is left of it after the kept columns before it
    is (numerically) nothing: the j-th diagonal element of R of the QR
    decomposition of the unit-scaled columns. Its explanation is the kept
    columns with a non-zero weight in its least-squares fit on them; the kept
    columns are independent, so the fit is unique and these columns are a
    minimal set that reproduces it (one null vector of the columns).
    """
    norms = np.sqrt((columns**2).sum(axis=0))
    norms[norms == 0.0] = 1.0
    scaled = columns / norms
    r = triangular_factor(scaled)
    kept: list[int] = []
    left_out: dict[int, list[int]] = {}
    for j in range(scaled.shape[1]):
        if kept and abs(r[j, j]) <= tol:
            weights = np.linalg.lstsq(scaled[:, kept], scaled[:, j], rcond=None)[0]
            left_out[j] = [kept[i] for i in np.flatnonzero(np.abs(weights) > 1e-6)]
        else:
            kept.append(j)
    return kept, left_out


def identifiable(design: Design, key: str) -> tuple[list[str], dict[str, str]]:
    """Split the regressors into those estimator ``key`` can use and the rest.

    A regressor is left out when, after the estimator's transformation, nothing
    of it is left (it does not vary within units, varies only over periods, or
    is a unit part plus a period part, which the unit and period effects absorb
    together) or it is a linear combination of regressors already kept; the
    reason names a minimal set of those (`dependencies`).
    """
    names = list(design.x.columns)
    raw = design.x.to_numpy()
    transformed = _transformed(design, key)
    raw_scale = np.sqrt(np.mean((raw - raw.mean(axis=0)) ** 2, axis=0)) + 1e-300
    rms = np.sqrt(np.mean(transformed**2, axis=0))
    omitted: dict[str, str] = {}
    candidates: list[int] = []
    for j, name in enumerate(names):
        if rms[j] > 1e-9 * raw_scale[j]:
            candidates.append(j)
        elif key in {"fixed_effects", "first_difference"} and _time_invariant(design, j):
            omitted[name] = "does not change within units, so the unit effects absorb it"
        elif key == "between":
            omitted[name] = "its unit means do not vary across units"
        elif key in {"fixed_effects", "first_difference"} and not constant_within(
            raw[:, j], period_codes(design)
        ):
            omitted[name] = (
                "is a unit's own level plus a change common to all units in each period "
                "(as years of experience are), so the unit and period effects together "
                "absorb it"
            )
        else:
            omitted[name] = "varies only over periods, so the period effects absorb it"
    kept: list[int] = []
    if candidates:
        kept_pos, left_out = dependencies(transformed[:, candidates])
        kept = [candidates[i] for i in kept_pos]
        for pos, basis in left_out.items():
            others = ", ".join(repr(names[candidates[i]]) for i in basis)
            omitted[names[candidates[pos]]] = (
                f"is a linear combination of {others} in this estimator"
            )
    order = {name: i for i, name in enumerate(names)}
    omitted = dict(sorted(omitted.items(), key=lambda kv: order[kv[0]]))
    return [names[k] for k in kept], omitted


def unit_mean_terms(design: Design, terms: list[str]) -> tuple[list[str], dict[str, str]]:
    """The regressors whose unit means enter correlated random effects, and the rest.

    A unit mean enters for every regressor that changes within units, unless it is
    a linear combination of the constant, the regressors, the period effects and
    the unit means before it (a regressor that is a unit's level plus a period
    trend, say): that mean is left out and the estimator is kept, with the reason
    naming a minimal set of the columns that explain it.
    """
    all_names = list(design.x.columns)
    varying = [t for t in terms if not _time_invariant(design, all_names.index(t))]
    if not varying:
        return [], {}
    x = design.x[terms].to_numpy(dtype=float)
    means = group_means(design.x[varying].to_numpy(dtype=float), design.unit_codes)
    base = [np.ones((design.nobs, 1)), x, design.period_dummies.to_numpy(dtype=float)]
    # What each column is, in the user's words; the period dummies together are
    # "the period effects", named once.
    phrase = ["the constant", *(repr(t) for t in terms)]
    phrase += ["the period effects"] * design.period_dummies.shape[1]
    phrase += [f"the unit mean of {t!r}" for t in varying]
    kept, left_out = dependencies(np.column_stack([*base, means[design.unit_codes]]))
    first = len(phrase) - len(varying)
    notes = {}
    for j, basis in left_out.items():
        if j >= first:
            explained = ", ".join(dict.fromkeys(phrase[i] for i in basis))
            notes[varying[j - first]] = (
                f"its unit mean is left out: it is a linear combination of {explained}"
            )
    return [t for i, t in enumerate(varying) if first + i in kept], notes


def _time_invariant(design: Design, j: int) -> bool:
    return constant_within(design.x.iloc[:, j].to_numpy(), design.unit_codes)


# ---------------------------------------------------------------- fitting


def cluster_count(design: Design) -> int:
    """Clusters G; with two-way clustering the smaller of the two counts.

    Common practice (Cameron, Gelbach & Miller 2011): small-sample factors and
    the t reference distribution use the dimension with fewer clusters.
    """
    return int(design.clusters.nunique().min())


def _nearest_psd(cov: pd.DataFrame) -> tuple[pd.DataFrame, bool]:
    values, vectors = np.linalg.eigh(cov.to_numpy())
    if values.min() >= -1e-12 * max(abs(values.max()), 1e-300):
        return cov, False
    fixed = (vectors * np.clip(values, 0.0, None)) @ vectors.T
    return pd.DataFrame(fixed, index=cov.index, columns=cov.columns), True


def dk_bandwidth(design: Design) -> float:
    """Bartlett bandwidth for Driscoll-Kraay: floor(4 (T/100)^(2/9)), at least 1.

    The Newey-West rule of thumb (Newey & West 1994) applied to the number of periods.
    """
    t = design.periods.nunique()
    return float(max(1, int(np.floor(4 * (t / 100) ** (2 / 9)))))


@dataclass(frozen=True)
class _Fitted:
    """One estimator's regression, its statistics and how its clusters map to rows."""

    reg: Regression
    statistics: dict[str, float]
    units: int
    nested: bool  # every cluster column constant within units (effects not counted)


def _columns(estimator: str, design: Design, terms: list[str]) -> tuple[list[str], np.ndarray]:
    """The regressors of ``estimator`` before its transformation, with their names."""
    n = design.nobs
    x = design.x[terms].to_numpy(dtype=float)
    dummies = design.period_dummies
    d = dummies.to_numpy(dtype=float)
    const = np.ones((n, 1))
    period_names = [str(c) for c in dummies.columns]
    if estimator == "first_difference":
        # A period nobody has a difference in (the first after a period missing for
        # everybody) leaves its differenced dummy a combination of the others: only
        # the dummies of periods with differences enter, which span the same intercepts.
        has_difference = d[first_difference_rows(design)].any(axis=0)
        kept = [name for name, keep in zip(period_names, has_difference, strict=True) if keep]
        return [*terms, *kept], np.column_stack([x, d[:, has_difference]])
    if estimator == "fixed_effects":
        return [*terms, *period_names], np.column_stack([x, d])
    if estimator == "between":
        return [INTERCEPT, *terms], np.column_stack([const, x])
    if design.absorb_periods:  # pooled OLS: the absorbed period effects hold the intercept
        return list(terms), x
    names = [INTERCEPT, *terms, *period_names]
    cols = [const, x, d]
    if estimator == "correlated_random_effects":
        varying = unit_mean_terms(design, terms)[0]
        cols.append(
            group_means(design.x[varying].to_numpy(dtype=float), design.unit_codes)[
                design.unit_codes
            ]
        )
        names += [f"{MEAN_PREFIX}{c}" for c in varying]
    return names, np.column_stack(cols)


def _centered_r2(ssr: float, y: np.ndarray, centre: bool = True) -> float:
    dev = y - y.mean() if centre else y
    tss = float(dev @ dev)
    return 1.0 - ssr / tss if tss > 0 else float("nan")


def _nests_units(design: Design) -> bool:
    """Whether every cluster column is constant within units (units nested in clusters)."""
    unit = design.unit_codes
    return all(constant_within(design.clusters[c].to_numpy(), unit) for c in design.clusters)


def _fit(estimator: str, design: Design, terms: list[str]) -> _Fitted:
    """Transform the data as ``estimator`` does and fit it by least squares.

    Fixed effects: within transformation, period effects as dummies (so that
    with clusters that nest the units the CR1 factor counts them in K while the
    unit effects are not counted). Random effects: quasi-demeaning with
    Swamy-Arora components. First differences: consecutive calendar periods.
    Between: OLS on unit means. With absorbed period effects (`Design.absorb_periods`)
    pooled OLS demeans by period, fixed effects removes both effects exactly
    (`demean_two_way`) and first differences demean by period; the effects' rank
    enters every covariance as coefficients would (Frisch-Waugh-Lovell: the slopes,
    residuals and slope covariances equal those of the regression with dummies).
    """
    names, z = _columns(estimator, design, terms)
    y = design.y.to_numpy(dtype=float)
    unit = design.unit_codes
    period = period_codes(design)
    time = period_ordinals(design)
    n_units = int(unit.max()) + 1
    rows = np.arange(design.nobs)
    nested = _nests_units(design)
    absorb = design.absorb_periods
    stats_: dict[str, float] = {}
    if estimator == "pooled_ols":
        if absorb:
            yp, zp, k = demean(y, period), demean(z, period), int(period.max()) + 1
        else:
            yp, zp, k = y, z, 0
        reg = least_squares(yp, zp, tuple(names), time=time, rows=rows, absorbed_df=k)
        stats_["r2"] = _centered_r2(reg.ssr, y)
    elif estimator == "fixed_effects":
        yw = demean(y, unit)
        if absorb:
            both, k = _absorb_two_way(np.column_stack([y, z]), design)
            yt, zt = both[:, 0], both[:, 1:]
        else:
            yt, zt, k = yw, demean(z, unit), 0
        reg = least_squares(
            yt, zt, tuple(names), time=time, rows=rows, effects_df=n_units, absorbed_df=k
        )
        stats_["r2"] = stats_["r2_within"] = _centered_r2(reg.ssr, yw, centre=False)
        # classical F test that all unit effects are zero: pooled regression with a constant
        if absorb:
            yp, zp = demean(y, period), demean(z, period)
        else:
            yp, zp = y - y.mean(), z - z.mean(axis=0)
        ssr_pooled = least_squares(yp, zp, tuple(names), time=time, rows=rows, absorbed_df=k).ssr
        df1, df2 = n_units - 1, reg.df_resid
        f = ((ssr_pooled - reg.ssr) / df1) / (reg.ssr / df2)
        stats_.update(
            f_unit_effects=f,
            f_unit_effects_p=float(f_sf(f, df1, df2)),
            f_unit_effects_df1=float(df1),
            f_unit_effects_df2=float(df2),
        )
    elif estimator in {"random_effects", "correlated_random_effects"}:
        comps = random_effects_components(y, z, unit)
        theta = comps.theta[unit]
        wy = y - theta * group_means(y, unit)[unit]
        wz = z - theta[:, None] * group_means(z, unit)[unit]
        reg = least_squares(wy, wz, tuple(names), time=time, rows=rows)
        stats_["r2"] = _centered_r2(reg.ssr, wy)
        stats_["sigma2_unit"] = comps.sigma2_unit
        stats_["sigma2_idiosyncratic"] = comps.sigma2_idiosyncratic
        stats_["theta_median"] = float(np.median(comps.theta))
    elif estimator == "first_difference":
        fd = first_difference_rows(design)
        dy, dz, k = y[fd] - y[fd - 1], z[fd] - z[fd - 1], 0
        if absorb:
            groups = pd.factorize(period[fd])[0]
            dy, dz, k = demean(dy, groups), demean(dz, groups), int(groups.max(initial=-1)) + 1
        reg = least_squares(dy, dz, tuple(names), time=time[fd], rows=fd, absorbed_df=k)
        stats_["r2"] = _centered_r2(reg.ssr, dy, centre=False)
    elif estimator == "between":
        ybar = group_means(y, unit)
        starts = np.r_[0, np.flatnonzero(unit[1:] != unit[:-1]) + 1]
        reg = least_squares(
            ybar,
            group_means(z, unit),
            tuple(names),
            time=np.zeros(n_units, dtype=np.intp),
            rows=starts,
        )
        stats_["r2"] = _centered_r2(reg.ssr, ybar)
    else:
        raise ValueError(f"unknown estimator {estimator!r}")
    return _Fitted(reg, stats_, n_units, nested)


def _reference(key: str, df_resid: float, design: Design) -> tuple[str, float]:
    """Reference distribution (name, degrees of freedom) for t-ratios.

    Common practice, no single source: t(G-1) for clustered errors, t(T-1) for
    Driscoll-Kraay, t(residual df) otherwise.
    """
    if key in {"cluster", "wild_bootstrap"}:
        g = cluster_count(design)
        return f"t({g - 1})", float(g - 1)
    if key == "driscoll_kraay":
        t = design.periods.nunique()
        return f"t({t - 1})", float(t - 1)
    return f"t({int(df_resid)})", float(df_resid)


def _inference(
    key: str,
    params: pd.Series,
    cov: pd.DataFrame,
    df_resid: float,
    design: Design,
    level: float,
    absorbed: int = 0,
) -> InferenceResult:
    n = design.nobs
    note = ""
    if key == "cluster":
        g = cluster_count(design)
        k = len(params) + absorbed
        note = (
            f"CR1 small-sample factor G/(G−1)·(N−1)/(N−K) with G={g}, N={n}, K={k} "
            "(the coefficients estimated, period dummies included; unit effects nested in "
            "the clusters are not counted)."
        )
    elif key == "classical":
        note = "Error variance divided by the residual degrees of freedom (effects counted)."
    elif key == "robust":
        note = "White sandwich with the factor N/(N−K)."
    elif key == "driscoll_kraay":
        t = design.periods.nunique()
        note = f"Bartlett kernel, bandwidth {dk_bandwidth(design):.0f} period(s), T={t}."
        if t < 20:
            note += " With fewer than about 20 periods these standard errors are imprecise."
    if key == "cluster" and design.clusters.shape[1] == 2:
        cov, fixed = _nearest_psd(cov)
        note += (
            f" Two-way clustering by {' and '.join(design.clusters.columns)} (Cameron, Gelbach "
            "& Miller 2011); G is the smaller cluster count."
        )
        if fixed:
            note += (
                " The two-way covariance was not positive semi-definite; its negative "
                "eigenvalues were set to zero, as Cameron, Gelbach & Miller (2011) suggest."
            )
    se = pd.Series(np.sqrt(np.diag(cov)), index=params.index)
    name, df = _reference(key, df_resid, design)
    tstat = params / se
    p = pd.Series(2 * t_sf(np.abs(tstat), df), index=params.index)
    crit = t_ppf(0.5 + level / 2, df)
    return InferenceResult(key, se, cov, p, params - crit * se, params + crit * se, name, note)


def _wild_bootstrap(
    estimator: str, design: Design, reg: Regression, terms: list[str], level: float
) -> InferenceResult | None:
    """Restricted wild cluster bootstrap on the regression as the estimator transformed it.

    Fixed effects: the within transformation (unit effects nested in the
    clusters, so the restricted fit on demeaned data is valid); first
    differences: the differenced data; random effects: the quasi-demeaned data
    with the estimated theta. Between has one row per unit and is not resampled.
    """
    if estimator == "between":
        return None
    clusters = design.clusters.iloc[:, 0].to_numpy()[reg.rows]
    names = list(reg.names)
    opts = design.settings.bootstrap
    se, p, lo, hi = {}, {}, {}, {}
    result = None
    for term in terms:
        result = wild_cluster_bootstrap(
            reg.y,
            reg.x,
            clusters,
            term_index=names.index(term),
            term=term,
            draws=opts.draws,
            weights=opts.weights,
            level=level,
            seed=opts.seed,
        )
        se[term] = abs(result.estimate / result.t_stat) if result.t_stat else np.nan
        p[term], lo[term], hi[term] = result.p_value, result.ci_low, result.ci_high
    assert result is not None
    idx = pd.Index(terms)
    se_s = pd.Series(se).reindex(idx)
    cov = pd.DataFrame(np.diag(se_s.to_numpy() ** 2), index=idx, columns=idx)
    enumerated = " (all sign vectors enumerated)" if result.enumerated else ""
    note = (
        f"Restricted wild cluster bootstrap-t, {result.draws} draws{enumerated}, "
        f"{result.weights} weights, seed {result.seed}, {result.clusters} clusters in "
        f"{design.clusters.columns[0]!r}; p-values and intervals by test inversion "
        "(Cameron, Gelbach & Miller 2008; Roodman et al. 2019). The standard error shown is "
        "the CR1 one the bootstrap t-statistic uses."
    )
    return InferenceResult(
        "wild_bootstrap",
        se_s,
        cov,
        pd.Series(p).reindex(idx),
        pd.Series(lo).reindex(idx),
        pd.Series(hi).reindex(idx),
        "bootstrap",
        note,
    )


def _covariance(key: str, estimator: str, fitted: _Fitted, design: Design) -> np.ndarray | None:
    """The covariance of one inference, or None where it does not apply."""
    reg = fitted.reg
    if key == "classical":
        return covariance(reg, "classical")
    if key == "robust":
        return covariance(reg, "robust")
    if key == "driscoll_kraay":
        if estimator == "between":
            return None  # unit means have no time dimension left
        return covariance(reg, "driscoll_kraay", bandwidth=dk_bandwidth(design))
    if key == "cluster":
        all_clusters = design.clusters.to_numpy()
        clusters = all_clusters[reg.rows]
        if estimator == "between" and not fitted.nested:
            return None  # a unit's mean cannot belong to two clusters
        if estimator == "first_difference" and np.any(clusters != all_clusters[reg.rows - 1]):
            return None  # a difference whose two rows lie in different clusters
        return covariance(reg, "cluster", clusters=clusters, count_effects=not fitted.nested)
    raise ValueError(f"unknown inference {key!r}")


def _fit_one(
    estimator: str,
    design: Design,
    terms: list[str],
    omitted: dict[str, str],
    inference: tuple[str, ...],
    level: float,
) -> ModelResult:
    fitted = _fit(estimator, design, terms)
    reg = fitted.reg
    names = list(reg.names)
    params = pd.Series(reg.params, index=names)
    results: dict[str, InferenceResult] = {}
    for key in inference:
        if key == "wild_bootstrap":
            continue  # the bootstrap follows
        cov = _covariance(key, estimator, fitted, design)
        if cov is None:
            continue
        frame = pd.DataFrame(cov, index=names, columns=names)
        results[key] = _inference(
            key, params, frame, float(reg.df_resid), design, level, reg.absorbed_df
        )
    if "wild_bootstrap" in inference:
        boot = _wild_bootstrap(estimator, design, reg, terms, level)
        if boot is not None:
            results["wild_bootstrap"] = boot
    few = cluster_count(design) < FEW_CLUSTERS
    if few and "wild_bootstrap" in results:
        headline = "wild_bootstrap"
    elif "cluster" in results:
        headline = "cluster"
    else:
        headline = next(iter(results))
    return ModelResult(
        key=estimator,
        nobs=reg.nobs,
        units=fitted.units,
        periods=int(design.periods.nunique()),
        params=params,
        terms=tuple(terms),
        omitted=omitted,
        inference=results,
        headline_inference=headline,
        statistics=fitted.statistics,
    )


def planned_inference(design: Design) -> tuple[tuple[str, ...], list[Finding]]:
    """The configured inference, with the wild bootstrap added below 30 clusters.

    With absorbed period effects the bootstrap is left out: its restricted fit on
    the transformed data is exact only for effects nested in the clusters, and
    period effects are not.
    """
    inference = design.settings.inference
    g = cluster_count(design)
    if design.absorb_periods and (g < FEW_CLUSTERS or "wild_bootstrap" in inference):
        return tuple(k for k in inference if k != "wild_bootstrap"), [
            Finding(
                "wild_bootstrap_skipped",
                "warning",
                f"The wild cluster bootstrap is not run: with {design.periods.nunique()} "
                "periods the period effects are absorbed, and resampling the transformed "
                "data is exact only for effects nested in the clusters. "
                + (
                    f"With only {g} clusters the clustered standard errors are unreliable; "
                    "read them with caution."
                    if g < FEW_CLUSTERS
                    else ""
                ),
            )
        ]
    if g < FEW_CLUSTERS and "cluster" in inference and "wild_bootstrap" not in inference:
        return (*inference, "wild_bootstrap"), [
            Finding(
                "wild_bootstrap_added",
                "info",
                f"Only {g} clusters: the wild cluster bootstrap was added beside the clustered "
                f"standard errors and is the headline inference (below about {FEW_CLUSTERS} "
                "clusters the cluster-robust t-test rejects too often).",
            )
        ]
    return inference, []


def estimate_one(
    design: Design, estimator: str, inference: tuple[str, ...]
) -> tuple[ModelResult | None, list[Finding]]:
    """Fit one estimator under ``inference``; None (with a finding) when it cannot be.

    A numerical failure of the fit (a singular matrix, an overflow, a result that
    is not finite) becomes an ``estimator_skipped`` finding, never a crash.
    """
    findings: list[Finding] = []
    label = ESTIMATOR_LABELS[estimator]
    if design.absorb_periods and estimator in _CANNOT_ABSORB:
        findings.append(
            Finding(
                "estimator_skipped",
                "warning",
                f"{label} is not fitted: with {design.periods.nunique()} periods the "
                f"period effects are absorbed (more than {ABSORB_PERIODS}), and its "
                "quasi-demeaning cannot absorb them exactly. Fixed effects and pooled OLS "
                "carry the period effects.",
                {"estimator": estimator},
            )
        )
        return None, findings
    try:
        with np.errstate(over="raise", divide="raise", invalid="raise"):
            return _estimate_checked(design, estimator, inference, findings)
    except (np.linalg.LinAlgError, FloatingPointError, ValueError, ZeroDivisionError) as exc:
        findings.append(
            Finding(
                "estimator_skipped",
                "warning",
                f"{label} could not be fitted ({_in_words(str(exc))}); the other estimators "
                "are reported.",
                {"estimator": estimator},
            )
        )
        return None, findings


def _in_words(message: str) -> str:
    """``message`` with the internal column names of a design in the reader's words."""

    def word(match: re.Match[str]) -> str:
        name = match[0]
        if name == INTERCEPT:
            return "the constant"
        if name.startswith(PERIOD_PREFIX):
            return f"the effect of period {name.removeprefix(PERIOD_PREFIX)}"
        return f"the unit mean of {name.removeprefix(MEAN_PREFIX)!r}"

    internal = "|".join(map(re.escape, (PERIOD_PREFIX, MEAN_PREFIX)))
    return re.sub(rf"{re.escape(INTERCEPT)}\b|(?:{internal})[^,;\s)]+", word, message)


def _estimate_checked(
    design: Design, estimator: str, inference: tuple[str, ...], findings: list[Finding]
) -> tuple[ModelResult | None, list[Finding]]:
    terms, omitted = identifiable(design, estimator)
    for name, reason in omitted.items():
        findings.append(
            Finding(
                "regressor_not_identified",
                "info",
                f"{ESTIMATOR_LABELS[estimator]}: {name!r} {reason}; it is left out of this "
                "estimator only.",
                {"estimator": estimator, "column": name},
            )
        )
    if estimator == "correlated_random_effects" and terms:
        for name, reason in unit_mean_terms(design, terms)[1].items():
            findings.append(
                Finding(
                    "unit_mean_left_out",
                    "info",
                    f"{ESTIMATOR_LABELS[estimator]}: {reason}; the estimator is fitted "
                    f"without it, and its coefficient on {name!r} then rests on the "
                    "random-effects assumption that the unit effects are unrelated to it.",
                    {"estimator": estimator, "column": name},
                )
            )
    if not terms:
        findings.append(
            Finding(
                "estimator_skipped",
                "warning",
                f"{ESTIMATOR_LABELS[estimator]} cannot identify any regressor; not fitted.",
                {"estimator": estimator},
            )
        )
        return None, findings
    model = _fit_one(estimator, design, terms, omitted, inference, design.settings.level)
    values = [model.params.to_numpy()] + [i.std_errors.to_numpy() for i in model.inference.values()]
    if not all(np.isfinite(v).all() for v in values):
        raise np.linalg.LinAlgError("its coefficients or standard errors are not finite")
    return model, findings


def estimate_all(
    design: Design,
    *,
    progress: Callable[[str], None] | None = None,
) -> tuple[dict[str, ModelResult], list[Finding]]:
    """Fit every configured estimator under every configured inference.

    Returns
    -------
    models, findings
        Models keyed by estimator; a finding per regressor an estimator left out.

    Notes
    -----
    Fixed effects: within estimator (Mundlak 1961; Wooldridge 2010, ch. 10),
    two-way when ``period_effects``. Random effects: GLS with Swamy–Arora
    variance components (Swamy & Arora 1972; Baltagi, ch. 2). First differences:
    Wooldridge (2010) §10.6. Between: OLS on unit means. Correlated random
    effects: random effects plus unit means of the time-varying regressors
    (Mundlak 1978; Wooldridge 2010 §10.7.3). Cluster-robust covariance: Liang &
    Zeger (1986), Arellano (1987), CR1 factor as in Cameron & Miller (2015).
    """
    models: dict[str, ModelResult] = {}
    inference, findings = planned_inference(design)
    for estimator in design.settings.estimators:
        if progress:
            progress(estimator)
        model, more = estimate_one(design, estimator, inference)
        findings += more
        if model is not None:
            models[estimator] = model
    if not models:
        reasons = " ".join(f.message for f in findings if f.code == "estimator_skipped")
        raise PanelpipeError(
            f"analysis {design.settings.name!r}: no estimator could be fitted, so nothing "
            f"is published. {reasons} Check the regressors and the data.",
            findings,
        )
    return models, findings
