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
from linearmodels.panel.covariance import (
    ClusteredCovariance,
    DriscollKraay,
    HeteroskedasticCovariance,
)
from scipy import stats

from .bootstrap import wild_cluster_bootstrap
from .config import AnalysisSettings
from .findings import Finding
from .validate import FEW_CLUSTERS

__all__ = [
    "ESTIMATOR_LABELS",
    "INFERENCE_LABELS",
    "INTERCEPT",
    "MEAN_PREFIX",
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
    "wild_bootstrap": "wild cluster bootstrap",
}

_PERIOD_PREFIX = "_period_"
MEAN_PREFIX = "_unit_mean_"


@dataclass(frozen=True)
class Design:
    """The common estimation sample, indexed by (unit, period)."""

    y: pd.Series
    x: pd.DataFrame
    period_dummies: pd.DataFrame
    clusters: pd.DataFrame
    settings: AnalysisSettings
    unit_names: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=object))

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
        if len(self.unit_names):
            return pd.Index(self.unit_names[self.unit_codes], dtype=object)
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


def make_design(panel: pd.DataFrame, settings: AnalysisSettings) -> tuple[Design, list[Finding]]:
    """Build the common estimation sample from a validated panel.

    Rows with a missing outcome or regressor are dropped for every estimator, so
    that all estimators are compared on the same rows.
    """
    s = settings
    cols = [s.outcome, *s.regressors]
    keep = panel[cols].notna().all(axis=1)
    data = panel.loc[keep].sort_values([s.unit, s.period], kind="stable")
    # Units enter the index as integer codes: linearmodels groups on them many times
    # per fit, and integers are far cheaper to hash and compare than text.
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
    if s.period_effects and len(periods) > 1:
        codes = pd.Categorical(data[s.period].to_numpy(), categories=periods)
        dummies = pd.get_dummies(codes, drop_first=True, dtype=float)
        dummies.columns = [f"{_PERIOD_PREFIX}{p}" for p in periods[1:]]
        dummies.index = index
    else:
        dummies = pd.DataFrame(index=index)
    clusters = pd.DataFrame(
        {c: pd.factorize(data[c].astype(str).to_numpy())[0] for c in s.cluster_by}, index=index
    )
    findings: list[Finding] = []
    names = np.asarray(unit_names, dtype=object)
    return Design(y, x, dummies, clusters, s, names), findings


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
    unit = design.unit_codes
    period = pd.factorize(design.periods)[0]
    two_way = design.settings.period_effects
    if key == "between":
        means = _unit_means(x, unit)
        return _demean(means, np.zeros(len(means), dtype=np.int64))
    if key == "first_difference":
        diff = first_differences(x, design)
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


def first_difference_rows(design: Design) -> np.ndarray:
    """Positions of rows whose previous period is observed for the same unit.

    A gap breaks the chain: the difference across a missing period is not
    formed, as linearmodels' first-difference estimator does.
    """
    unit = design.unit_codes
    periods = np.sort(design.periods.unique())
    pos = np.searchsorted(periods, design.periods.to_numpy())
    ok = (unit[1:] == unit[:-1]) & (pos[1:] == pos[:-1] + 1)
    return np.flatnonzero(ok) + 1


def first_differences(values: np.ndarray, design: Design) -> np.ndarray:
    """Within-unit differences over consecutive observed periods (rows sorted)."""
    rows = first_difference_rows(design)
    return values[rows] - values[rows - 1]


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
        return {
            "cov_type": "clustered",
            "debiased": True,
            "group_debias": True,
            "clusters": design.clusters,
        }
    if key == "driscoll_kraay":
        return {
            "cov_type": "kernel",
            "kernel": "bartlett",
            "debiased": True,
            "bandwidth": dk_bandwidth(design),
        }
    raise ValueError(f"unknown inference {key!r}")


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
        return FirstDifferenceOLS(y, pd.concat([x, dummies], axis=1))
    if estimator == "between":
        return BetweenOLS(y, pd.concat([const, x], axis=1))
    if estimator == "correlated_random_effects":
        varying = [t for t in terms if not _time_invariant(design, list(design.x.columns).index(t))]
        means = design.x[varying].groupby(level=0).transform("mean")
        means.columns = [f"{MEAN_PREFIX}{c}" for c in varying]
        return RandomEffects(y, pd.concat([const, x, dummies, means], axis=1))
    raise ValueError(f"unknown estimator {estimator!r}")


def _reference(key: str, res: Any, design: Design) -> tuple[str, float]:
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
    df = float(res.df_resid)
    return f"t({int(df)})", df


def _inference(key: str, res: Any, design: Design, level: float) -> InferenceResult:
    params = res.params
    cov = res.cov.copy()
    n = int(res.nobs)
    note = ""
    if key == "cluster":
        g = cluster_count(design)
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
    name, df = _reference(key, res, design)
    tstat = params / se
    p = pd.Series(2 * stats.t.sf(np.abs(tstat), df), index=params.index)
    crit = stats.t.ppf(0.5 + level / 2, df)
    return InferenceResult(key, se, cov, p, params - crit * se, params + crit * se, name, note)


def _bootstrap_inputs(
    estimator: str, design: Design, model: Any, res: Any
) -> tuple[np.ndarray, np.ndarray, list[str], np.ndarray] | None:
    """The regression the wild bootstrap resamples, as the estimator transforms it.

    Fixed effects: the within transformation (unit effects nested in the
    clusters, so the restricted fit on demeaned data is valid); first
    differences: the differenced data; random effects: the quasi-demeaned data
    with the estimated theta. Between has one row per unit and is not resampled.
    """
    if estimator == "between":
        return None
    y = model.dependent.dataframe.to_numpy()[:, 0]
    x = model.exog.dataframe
    names = [str(c) for c in x.columns]
    xv = x.to_numpy()
    clusters = design.clusters.iloc[:, 0].to_numpy()
    unit = design.unit_codes
    if estimator == "fixed_effects":
        return _demean(y[:, None], unit)[:, 0], _demean(xv, unit), names, clusters
    if estimator == "first_difference":
        rows = first_difference_rows(design)
        return y[rows] - y[rows - 1], xv[rows] - xv[rows - 1], names, clusters[rows]
    if estimator in {"random_effects", "correlated_random_effects"}:
        theta = res.theta.iloc[:, 0].reindex(design.unit_codes).to_numpy()
        counts = np.bincount(unit)
        ybar = np.bincount(unit, weights=y) / counts
        xbar = _unit_means(xv, unit)
        yq = y - theta * ybar[unit]
        xq = xv - theta[:, None] * xbar[unit]
        return yq, xq, names, clusters
    return y, xv, names, clusters


def _wild_bootstrap(
    estimator: str, design: Design, model: Any, res: Any, terms: list[str], level: float
) -> InferenceResult | None:
    data = _bootstrap_inputs(estimator, design, model, res)
    if data is None:
        return None
    y, x, names, clusters = data
    opts = design.settings.bootstrap
    se, p, lo, hi = {}, {}, {}, {}
    result = None
    for term in terms:
        result = wild_cluster_bootstrap(
            y,
            x,
            clusters,
            term_index=names.index(term),
            term=term,
            draws=int(opts.get("draws", 9999)),
            weights=str(opts.get("weights", "auto")),
            level=level,
            seed=int(opts.get("seed", 20261202)),
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


@dataclass(frozen=True)
class _Refit:
    """What `_inference` reads of a fit: its parameters, covariance and sizes."""

    params: pd.Series
    cov: pd.DataFrame
    nobs: int
    df_resid: float


_FAST = {"pooled_ols", "fixed_effects", "random_effects", "correlated_random_effects"}


def _covariance_from_fit(
    key: str, estimator: str, design: Design, model: Any, first: Any
) -> pd.DataFrame | None:
    """Another covariance for a fitted model, without fitting it again.

    linearmodels recomputes the whole fit (transformation, least squares,
    R-squared and F statistics) for every covariance type; here its covariance
    estimators are applied to the transformed data the first fit used, with the
    degrees-of-freedom rules linearmodels applies (effects counted except under
    clustering on a variable that nests the units). Returns None where only a
    refit is safe (two-way clustering, first differences, between).
    tests/test_estimate_covariance.py checks every fast path against a refit.
    """
    if estimator not in _FAST or design.clusters.shape[1] != 1:
        return None
    data = _bootstrap_inputs(estimator, design, model, first)
    if data is None:
        return None
    y, x, names, _ = data
    params = first.params[names].to_numpy()
    periods = np.sort(design.periods.unique())
    time_ids = np.searchsorted(periods, design.periods.to_numpy())[:, None]
    entity_ids = design.unit_codes[:, None]
    extra_df = 0
    if estimator == "fixed_effects":
        nested = bool(
            key == "cluster"
            and design.clusters.iloc[:, 0].groupby(design.unit_codes).nunique().max() == 1
        )
        extra_df = 0 if nested else len(design.unit_names) or int(design.units.nunique())
    args = (y[:, None], x, params[:, None], entity_ids, time_ids)
    if key == "robust":
        est: Any = HeteroskedasticCovariance(*args, debiased=True, extra_df=extra_df)
    elif key == "cluster":
        est = ClusteredCovariance(
            *args,
            debiased=True,
            extra_df=extra_df,
            clusters=design.clusters.iloc[:, 0].to_numpy()[:, None],
            group_debias=True,
        )
    elif key == "driscoll_kraay":
        est = DriscollKraay(
            *args,
            debiased=True,
            extra_df=extra_df,
            kernel="bartlett",
            bandwidth=dk_bandwidth(design),
        )
    else:
        return None
    return pd.DataFrame(est.cov, index=names, columns=names)


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
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        first = model.fit(**_fit_kwargs("classical", design, estimator))
    for key in inference:
        if key == "wild_bootstrap" or (key == "driscoll_kraay" and estimator == "between"):
            continue  # the bootstrap follows; unit means have no time dimension left
        if key == "classical":
            res: Any = first
        else:
            cov = _covariance_from_fit(key, estimator, design, model, first)
            if cov is not None:
                res = _Refit(first.params, cov, int(first.nobs), float(first.df_resid))
            else:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    res = model.fit(**_fit_kwargs(key, design, estimator))
        results[key] = _inference(key, res, design, level)
    if "wild_bootstrap" in inference:
        boot = _wild_bootstrap(estimator, design, model, first, terms, level)
        if boot is not None:
            results["wild_bootstrap"] = boot
    few = cluster_count(design) < FEW_CLUSTERS
    if few and "wild_bootstrap" in results:
        headline = "wild_bootstrap"
    elif "cluster" in results:
        headline = "cluster"
    else:
        headline = next(iter(results))
    statistics: dict[str, float] = {"r2": float(first.rsquared)}
    if estimator in {"random_effects", "correlated_random_effects"}:
        vd = first.variance_decomposition
        statistics["sigma2_unit"] = float(vd["Effects"])
        statistics["sigma2_idiosyncratic"] = float(vd["Residual"])
        statistics["theta_median"] = float(np.median(np.asarray(first.theta)))
    if estimator == "fixed_effects":
        statistics["r2_within"] = float(first.rsquared_within)
        pooled = first.f_pooled  # classical F test that all unit effects are zero
        statistics["f_unit_effects"] = float(pooled.stat)
        statistics["f_unit_effects_p"] = float(pooled.pval)
        statistics["f_unit_effects_df1"] = float(pooled.df)
        statistics["f_unit_effects_df2"] = float(pooled.df_denom)
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
    inference = s.inference
    g = cluster_count(design)
    if g < FEW_CLUSTERS and "cluster" in inference and "wild_bootstrap" not in inference:
        inference = (*inference, "wild_bootstrap")
        findings.append(
            Finding(
                "wild_bootstrap_added",
                "info",
                f"Only {g} clusters: the wild cluster bootstrap was added beside the clustered "
                f"standard errors and is the headline inference (below about {FEW_CLUSTERS} "
                "clusters the cluster-robust t-test rejects too often).",
            )
        )
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
        models[estimator] = _fit_one(estimator, design, terms, omitted, inference, s.level)
    return models, findings
