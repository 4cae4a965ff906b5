"""Estimate: fit every configured estimator with every configured inference.

linearmodels does the fitting; this module prepares one common estimation
sample, decides per estimator which regressors it can identify, and collects
coefficients, covariances, intervals and p-values in plain typed objects.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from linearmodels.panel import (
    BetweenOLS,
    FirstDifferenceOLS,
    PanelOLS,
    PooledOLS,
    RandomEffects,
)
from scipy import stats

from .config import AnalysisSettings
from .findings import Finding

__all__ = [
    "ESTIMATOR_LABELS",
    "INFERENCE_LABELS",
    "INTERCEPT",
    "Design",
    "InferenceResult",
    "ModelResult",
    "estimate_all",
    "make_design",
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
}

_PERIOD_PREFIX = "_period_"
_MEAN_PREFIX = "_unit_mean_"


@dataclass(frozen=True)
class Design:
    """The common estimation sample, indexed by (unit, period)."""

    y: pd.Series
    x: pd.DataFrame
    period_dummies: pd.DataFrame
    clusters: pd.Series
    settings: AnalysisSettings

    @property
    def nobs(self) -> int:
        return len(self.y)

    @property
    def units(self) -> pd.Index:
        return self.y.index.get_level_values(0)

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
        shown = [t for t in self.params.index if not t.startswith(("_period_", _MEAN_PREFIX))]
        return {
            "label": self.label,
            "nobs": self.nobs,
            "units": self.units,
            "periods": self.periods,
            "params": _floats(self.params[shown]),
            "std_errors": {k: _floats(v.std_errors[shown]) for k, v in self.inference.items()},
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


def make_design(panel: pd.DataFrame, settings: AnalysisSettings) -> tuple[Design, list[Finding]]:
    """Build the common estimation sample from a validated panel.

    Rows with a missing outcome or regressor are dropped for every estimator, so
    that all estimators are compared on the same rows.
    """
    s = settings
    cols = [s.outcome, *s.regressors]
    keep = panel[cols].notna().all(axis=1)
    data = panel.loc[keep]
    index = pd.MultiIndex.from_arrays(
        [data[s.unit].astype(str).to_numpy(), data[s.period].to_numpy()], names=[s.unit, s.period]
    )
    y = pd.Series(data[s.outcome].to_numpy(dtype=float), index=index, name=s.outcome)
    x = pd.DataFrame(
        data[list(s.regressors)].to_numpy(dtype=float), index=index, columns=list(s.regressors)
    )
    periods = pd.Index(np.sort(data[s.period].unique()))
    if s.period_effects and len(periods) > 1:
        codes = pd.Categorical(data[s.period].to_numpy(), categories=periods)
        dummies = pd.get_dummies(codes, drop_first=True, dtype=float)
        dummies.columns = [f"{_PERIOD_PREFIX}{p}" for p in periods[1:]]
        dummies.index = index
    else:
        dummies = pd.DataFrame(index=index)
    clusters = pd.Series(data[s.cluster_by[0]].astype(str).to_numpy(), index=index, name="cluster")
    findings: list[Finding] = []
    return Design(y, x, dummies, clusters, s), findings


# ---------------------------------------------------------------- identification


def _demean(values: np.ndarray, codes: np.ndarray) -> np.ndarray:
    counts = np.bincount(codes)
    out = np.empty_like(values)
    for j in range(values.shape[1]):
        means = np.bincount(codes, weights=values[:, j]) / counts
        out[:, j] = values[:, j] - means[codes]
    return out


def _transformed(design: Design, key: str) -> np.ndarray:
    """The regressors as the estimator sees them after removing its effects."""
    x = design.x.to_numpy()
    unit = pd.factorize(design.units)[0]
    period = pd.factorize(design.periods)[0]
    two_way = design.settings.period_effects
    if key == "between":
        means = _unit_means(x, unit)
        return _demean(means, np.zeros(len(means), dtype=np.int64))
    if key == "first_difference":
        order = np.lexsort((design.periods.to_numpy(), unit))
        xs, us = x[order], unit[order]
        diff = xs[1:] - xs[:-1]
        diff = diff[us[1:] == us[:-1]]
        return _demean(diff, np.zeros(len(diff), dtype=np.int64))
    if key == "fixed_effects":
        out = _demean(x, unit)
        if two_way:
            for _ in range(100):  # alternating projections for unbalanced two-way effects
                before = out
                out = _demean(_demean(out, period), unit)
                if np.max(np.abs(out - before), initial=0.0) < 1e-10:
                    break
        return out
    # pooled, random effects and the Mundlak device keep unit-level variation
    return _demean(x, period if two_way else np.zeros(len(x), dtype=np.int64))


def _unit_means(x: np.ndarray, unit: np.ndarray) -> np.ndarray:
    counts = np.bincount(unit)
    means = np.column_stack(
        [np.bincount(unit, weights=x[:, j]) / counts for j in range(x.shape[1])]
    )
    return means


def identifiable(design: Design, key: str) -> tuple[list[str], dict[str, str]]:
    """Split the regressors into those estimator ``key`` can use and the rest.

    A regressor is left out when, after the estimator's transformation, nothing
    of it is left (it does not vary within units, or varies only over periods)
    or it is a linear combination of regressors already kept.
    """
    names = list(design.x.columns)
    raw = design.x.to_numpy()
    transformed = _transformed(design, key)
    kept: list[int] = []
    omitted: dict[str, str] = {}
    raw_scale = np.sqrt(np.mean((raw - raw.mean(axis=0)) ** 2, axis=0)) + 1e-300
    for j, name in enumerate(names):
        col = transformed[:, j]
        if np.sqrt(np.mean(col**2)) <= 1e-9 * raw_scale[j]:
            if key in {"fixed_effects", "first_difference"} and _time_invariant(design, j):
                omitted[name] = "does not change within units, so the unit effects absorb it"
            elif key == "between":
                omitted[name] = "its unit means do not vary across units"
            else:
                omitted[name] = "varies only over periods, so the period effects absorb it"
            continue
        if kept:
            basis = transformed[:, kept]
            coef, *_ = np.linalg.lstsq(basis, col, rcond=None)
            resid = col - basis @ coef
            if np.sqrt(np.mean(resid**2)) <= 1e-8 * np.sqrt(np.mean(col**2)):
                others = ", ".join(names[k] for k in kept)
                omitted[name] = f"is a linear combination of {others} in this estimator"
                continue
        kept.append(j)
    return [names[k] for k in kept], omitted


def _time_invariant(design: Design, j: int) -> bool:
    col = design.x.iloc[:, j]
    return bool(col.groupby(level=0).nunique().max() <= 1)


# ---------------------------------------------------------------- fitting


def _fit_kwargs(key: str, design: Design, estimator: str) -> dict[str, Any]:
    if key == "classical":
        return {"cov_type": "unadjusted", "debiased": True}
    if key == "robust":
        return {"cov_type": "robust", "debiased": True}
    if key == "cluster":
        codes = pd.DataFrame({"cluster": pd.factorize(design.clusters)[0]}, index=design.y.index)
        return {"cov_type": "clustered", "debiased": True, "group_debias": True, "clusters": codes}
    if key == "driscoll_kraay":
        return {
            "cov_type": "kernel",
            "kernel": "bartlett",
            "debiased": True,
            "bandwidth": dk_bandwidth(design),
        }
    raise ValueError(f"unknown inference {key!r}")


def dk_bandwidth(design: Design) -> float:
    """Bartlett bandwidth for Driscoll-Kraay: floor(4 (T/100)^(2/9)), at least 1.

    The Newey-West rule of thumb (Newey & West 1994) applied to the number of periods.
    """
    t = design.periods.nunique()
    return float(max(1, int(np.floor(4 * (t / 100) ** (2 / 9)))))


def _model(estimator: str, design: Design, terms: list[str]) -> Any:
    y = design.y
    x = design.x[terms]
    const = pd.DataFrame({INTERCEPT: np.ones(design.nobs)}, index=y.index)
    dummies = design.period_dummies
    if estimator == "pooled_ols":
        return PooledOLS(y, pd.concat([const, x, dummies], axis=1))
    if estimator == "fixed_effects":
        # Period effects enter as dummies so that, with clusters that nest the units,
        # the CR1 factor counts them in K while the unit effects are not counted.
        return PanelOLS(y, pd.concat([x, dummies], axis=1), entity_effects=True)
    if estimator == "random_effects":
        return RandomEffects(y, pd.concat([const, x, dummies], axis=1))
    if estimator == "first_difference":
        return FirstDifferenceOLS(y, pd.concat([x, dummies.iloc[:, 1:]], axis=1))
    if estimator == "between":
        return BetweenOLS(y, pd.concat([const, x], axis=1))
    if estimator == "correlated_random_effects":
        varying = [t for t in terms if not _time_invariant(design, list(design.x.columns).index(t))]
        means = design.x[varying].groupby(level=0).transform("mean")
        means.columns = [f"{_MEAN_PREFIX}{c}" for c in varying]
        return RandomEffects(y, pd.concat([const, x, dummies, means], axis=1))
    raise ValueError(f"unknown estimator {estimator!r}")


def _reference(key: str, res: Any, design: Design) -> tuple[str, float]:
    """Reference distribution (name, degrees of freedom) for t-ratios.

    Common practice, no single source: t(G-1) for clustered errors, t(T-1) for
    Driscoll-Kraay, t(residual df) otherwise.
    """
    if key == "cluster":
        g = design.clusters.nunique()
        return f"t({g - 1})", float(g - 1)
    if key == "driscoll_kraay":
        t = design.periods.nunique()
        return f"t({t - 1})", float(t - 1)
    df = float(res.df_resid)
    return f"t({int(df)})", df


def _inference(key: str, res: Any, design: Design, level: float) -> InferenceResult:
    params = res.params
    cov = res.cov.copy()
    n = int(res.nobs)
    note = ""
    if key == "cluster":
        g = design.clusters.nunique()
        k = len(params)
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
    se = pd.Series(np.sqrt(np.diag(cov)), index=params.index)
    name, df = _reference(key, res, design)
    tstat = params / se
    p = pd.Series(2 * stats.t.sf(np.abs(tstat), df), index=params.index)
    crit = stats.t.ppf(0.5 + level / 2, df)
    return InferenceResult(key, se, cov, p, params - crit * se, params + crit * se, name, note)


def _fit_one(
    estimator: str,
    design: Design,
    terms: list[str],
    omitted: dict[str, str],
    inference: tuple[str, ...],
    level: float,
) -> ModelResult:
    model = _model(estimator, design, terms)
    results: dict[str, InferenceResult] = {}
    first: Any = None
    for key in inference:
        if key == "driscoll_kraay" and estimator == "between":
            continue  # unit means have no time dimension left
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = model.fit(**_fit_kwargs(key, design, estimator))
        first = first if first is not None else res
        results[key] = _inference(key, res, design, level)
    headline = "cluster" if "cluster" in results else next(iter(results))
    statistics: dict[str, float] = {"r2": float(first.rsquared)}
    if estimator in {"random_effects", "correlated_random_effects"}:
        vd = first.variance_decomposition
        statistics["sigma2_unit"] = float(vd["Effects"])
        statistics["sigma2_idiosyncratic"] = float(vd["Residual"])
        statistics["theta_median"] = float(np.median(np.asarray(first.theta)))
    if estimator == "fixed_effects":
        statistics["r2_within"] = float(first.rsquared_within)
    units = first.entity_info["total"] if estimator != "between" else len(first.params)
    return ModelResult(
        key=estimator,
        nobs=int(first.nobs),
        units=int(units) if estimator != "between" else int(design.units.nunique()),
        periods=int(design.periods.nunique()),
        params=first.params,
        terms=tuple(terms),
        omitted=omitted,
        inference=results,
        headline_inference=headline,
        statistics=statistics,
    )


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
    s = design.settings
    models: dict[str, ModelResult] = {}
    findings: list[Finding] = []
    for estimator in s.estimators:
        if progress:
            progress(estimator)
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
        if not terms:
            findings.append(
                Finding(
                    "estimator_skipped",
                    "warning",
                    f"{ESTIMATOR_LABELS[estimator]} cannot identify any regressor; not fitted.",
                    {"estimator": estimator},
                )
            )
            continue
        models[estimator] = _fit_one(estimator, design, terms, omitted, s.inference, s.level)
    return models, findings
