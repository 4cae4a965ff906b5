"""Compare: tests that weigh one estimator against another.

A test result is an object with its statistic, degrees of freedom, p-value and
null hypothesis, or an explicit invalid result with the reason; never a bare
tuple and never NaN without a reason.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .distributions import chi2_sf, f_sf
from .estimate import MEAN_PREFIX, Design, ModelResult, period_codes, period_ordinals
from .fit import covariance, demean, group_means, least_squares

__all__ = [
    "TestResult",
    "breusch_pagan_lm",
    "hausman",
    "mundlak_test",
    "run_comparisons",
    "unit_effects_f",
]


@dataclass(frozen=True)
class TestResult:
    """A hypothesis test, or the reason it could not be computed."""

    name: str
    null: str
    statistic: float | None = None
    df: int | None = None
    p_value: float | None = None
    note: str = ""
    invalid_reason: str = ""

    @property
    def valid(self) -> bool:
        return not self.invalid_reason

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"name": self.name, "null": self.null}
        if self.valid:
            out.update(statistic=self.statistic, df=self.df, p_value=self.p_value)
        else:
            out["invalid_reason"] = self.invalid_reason
        if self.note:
            out["note"] = self.note
        return out


def hausman(fe: ModelResult, re: ModelResult) -> TestResult:
    """Classical Hausman test of fixed against random effects.

    Compares the slopes common to both models with their classical covariances.

    Notes
    -----
    :math:`H = (b_{FE}-b_{RE})'[V_{FE}-V_{RE}]^{-1}(b_{FE}-b_{RE}) \\sim \\chi^2_k`
    under the null that the unit effects are uncorrelated with the regressors
    (Hausman 1978). When :math:`V_{FE}-V_{RE}` is not positive definite, the
    generalised inverse keeps its positive eigenvalues only, and the degrees of
    freedom are their number.
    """
    name = "Do fixed and random effects disagree? Hausman test, classical"
    null = "the unit effects are unrelated to the regressors, so random effects are consistent"
    if "classical" not in fe.inference or "classical" not in re.inference:
        return TestResult(name, null, invalid_reason="classical standard errors were not computed")
    common = [t for t in fe.terms if t in re.terms]
    if not common:
        return TestResult(name, null, invalid_reason="the two models share no slope coefficient")
    diff = (fe.params[common] - re.params[common]).to_numpy()
    v = (
        fe.inference["classical"].cov.loc[common, common]
        - re.inference["classical"].cov.loc[common, common]
    ).to_numpy()
    eig, vectors = np.linalg.eigh(v)
    tol = max(eig.max(initial=0.0), 1e-300) * len(common) * 1e-10
    positive = eig > tol
    note = ""
    if positive.all():
        stat = float(diff @ np.linalg.solve(v, diff))
        df = len(common)
    else:
        df = int(positive.sum())
        if df == 0:
            return TestResult(
                name,
                null,
                invalid_reason="the covariance difference has no positive eigenvalue, so the "
                "classical test is undefined here; rely on the cluster-robust comparison",
            )
        # Generalised inverse on the positive part: directions with a non-positive
        # variance difference carry no usable information (Hausman 1978).
        proj = vectors[:, positive].T @ diff
        stat = float(np.sum(proj**2 / eig[positive]))
        note = (
            f"The test assumes random effects are the more precise of the two; in "
            f"{len(common) - df} of the {len(common)} directions they are not here, so "
            f"those directions were left out (a generalised inverse) and the statistic "
            f"has {df} degree(s) of freedom. Read it beside the cluster-robust comparison."
        )
    return TestResult(name, null, stat, df, float(chi2_sf(stat, df)), note)


def mundlak_test(design: Design, fe: ModelResult) -> TestResult:
    """Cluster-robust Hausman test via the Mundlak device.

    Adds the unit means of the time-varying regressors to a pooled regression
    (intercept, every regressor, period dummies) and tests that their
    coefficients are jointly zero with a cluster-robust (CR1) Wald statistic.

    Notes
    -----
    :math:`y_{it} = x_{it}'\beta + \bar x_i'\\gamma + c_i + u_{it}`; under the
    null :math:`\\gamma = 0` random effects are consistent. Pooled OLS and
    random effects give the same :math:`\\hat\beta` (the within estimate) and both
    give a valid test; with the cluster-robust covariance
    :math:`W = \\hat\\gamma' \\hat V_\\gamma^{-1} \\hat\\gamma` stays valid under
    heteroskedasticity and serial correlation (Mundlak 1978; Wooldridge 2010,
    §10.7.3). Written with numpy (normal equations and cluster sums of scores)
    because the random-effects version refitted a second model and took most
    of the comparison step at a million rows.
    """
    name = "Do fixed and random effects disagree? Hausman test, cluster-robust (unit means)"
    null = "the unit means of the regressors add nothing, so random effects are consistent"
    varying = list(fe.terms)
    if not varying:
        return TestResult(name, null, invalid_reason="no time-varying regressor to test")
    params, cov = _mundlak_fit(design, varying)
    means = [f"{MEAN_PREFIX}{t}" for t in varying if f"{MEAN_PREFIX}{t}" in params.index]
    if not means:
        return TestResult(name, null, invalid_reason="no unit mean could be estimated")
    g = params[means].to_numpy()
    v = cov.loc[means, means].to_numpy()
    try:
        stat = float(g @ np.linalg.solve(v, g))
    except np.linalg.LinAlgError:
        return TestResult(name, null, invalid_reason="the covariance of the unit means is singular")
    df = len(means)
    clusters = int(design.clusters.nunique().min())
    # W/q against F(q, G-1), matching the t(G-1) reference of the clustered t-tests
    # (common practice with cluster-robust Wald tests, no single source).
    return TestResult(
        name,
        null,
        stat,
        df,
        float(f_sf(stat / df, df, clusters - 1)),
        f"Joint test of {df} unit-mean coefficient(s) with the clustered covariance over "
        f"{clusters} clusters; the statistic divided by {df} is compared with an F "
        f"distribution with {df} and {clusters - 1} degrees of freedom. It holds when "
        "errors have unequal variances or are correlated within units.",
    )


def _pooled_columns(design: Design, extra: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray, int]:
    """y and [intercept, regressors, period dummies, extra] of a pooled regression.

    With absorbed period effects everything is demeaned by period instead (the
    intercept and the dummies are then absorbed; their count is returned).
    """
    y = design.y.to_numpy(dtype=float)
    if design.absorb_periods:
        period = period_codes(design)
        x = demean(np.column_stack([design.x.to_numpy(), *extra]), period)
        return demean(y, period), x, int(period.max()) + 1
    dummies = design.period_dummies.to_numpy()
    return y, np.column_stack([np.ones(design.nobs), design.x.to_numpy(), dummies, *extra]), 0


def _mundlak_fit(design: Design, varying: list[str]) -> tuple[pd.Series, pd.DataFrame]:
    """Pooled OLS with unit means added, and its CR1 cluster-robust covariance."""
    unit = design.unit_codes
    means = group_means(design.x[varying].to_numpy(), unit)[unit]
    names = [
        *([] if design.absorb_periods else ["_intercept"]),
        *design.x.columns,
        *design.period_dummies.columns,
        *(f"{MEAN_PREFIX}{t}" for t in varying),
    ]
    y, x, absorbed = _pooled_columns(design, [means])
    keep = _independent_columns(x.T @ x)
    names = [str(names[k]) for k in keep]
    reg = least_squares(
        y,
        x[:, keep],
        tuple(names),
        time=period_ordinals(design),
        rows=np.arange(design.nobs),
        absorbed_df=absorbed,
    )
    clusters = design.clusters.iloc[:, 0].to_numpy()
    cov = covariance(reg, "cluster", clusters=clusters)  # CR1: no effects to count
    return pd.Series(reg.params, index=names), pd.DataFrame(cov, index=names, columns=names)


def _independent_columns(xtx: np.ndarray) -> list[int]:
    """Columns of X that are not linear combinations of earlier ones (from X'X)."""
    keep: list[int] = []
    for j in range(xtx.shape[0]):
        trial = [*keep, j]
        sub = xtx[np.ix_(trial, trial)]
        scale = np.sqrt(np.outer(np.diag(sub), np.diag(sub))) + 1e-300
        if np.linalg.eigvalsh(sub / scale).min() > 1e-10:
            keep.append(j)
    return keep


def breusch_pagan_lm(design: Design) -> TestResult:
    """Breusch–Pagan LM test for random unit effects (unbalanced form).

    Notes
    -----
    With pooled OLS residuals :math:`e_{it}` (intercept, regressors and, when
    configured, period dummies), :math:`A = \\sum_i (\\sum_t e_{it})^2 / \\sum e_{it}^2 - 1`
    and :math:`LM = n^2 A^2 / (2(\\sum_i T_i^2 - n)) \\sim \\chi^2_1` under the
    null of no unit effect (Breusch & Pagan 1980; unbalanced form of Baltagi &
    Li 1990, which reduces to :math:`NT A^2/(2(T-1))` when balanced).
    """
    name = "Do units carry their own random effect? Breusch–Pagan test"
    null = "the unit effects have zero variance, so pooled OLS would do"
    y, x, _ = _pooled_columns(design, [])
    coef, *_ = np.linalg.lstsq(x, y, rcond=None)
    e = y - x @ coef
    unit = design.unit_codes
    sums = np.bincount(unit, weights=e)
    counts = np.bincount(unit)
    n = len(e)
    denom = 2.0 * (np.sum(counts.astype(float) ** 2) - n)
    if denom <= 0:
        return TestResult(name, null, invalid_reason="every unit is observed once")
    a = np.sum(sums**2) / np.sum(e**2) - 1.0
    stat = float(n**2 * a**2 / denom)
    return TestResult(name, null, stat, 1, float(chi2_sf(stat, 1)))


def unit_effects_f(fe: ModelResult) -> TestResult:
    """F test that all unit effects are zero (poolability), from the within fit."""
    name = "Do units differ? Joint test of the unit effects"
    null = "every unit shares one intercept, so pooled OLS would do"
    st = fe.statistics
    if "f_unit_effects" not in st:
        return TestResult(name, null, invalid_reason="the fixed-effects fit gave no F test")
    return TestResult(
        name,
        null,
        float(st["f_unit_effects"]),
        int(st["f_unit_effects_df1"]),
        float(st["f_unit_effects_p"]),
        f"Compared with an F distribution with {int(st['f_unit_effects_df1'])} and "
        f"{int(st['f_unit_effects_df2'])} degrees of freedom; assumes errors of equal "
        "variance, uncorrelated within units.",
    )


def run_comparisons(design: Design, models: Mapping[str, ModelResult]) -> dict[str, TestResult]:
    """Every comparison the fitted estimators allow, keyed as in results.json."""
    tests: dict[str, TestResult] = {}
    fe, re = models.get("fixed_effects"), models.get("random_effects")
    if fe is not None and re is not None:
        tests["hausman"] = hausman(fe, re)
    if fe is not None:
        tests["hausman_robust"] = mundlak_test(design, fe)
        tests["unit_effects_f"] = unit_effects_f(fe)
    tests["breusch_pagan"] = breusch_pagan_lm(design)
    return tests
