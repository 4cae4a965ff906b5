"""The numerical core (panelpipe.fit via estimate._fit_one) equals linearmodels.

Reference: linearmodels 7.x, a general-purpose econometrics library, fitting the
same models (the same regressors, period dummies and constant) with the same
covariance options: ``debiased=True``, ``group_debias=True`` for clusters, the
Bartlett kernel with our bandwidth for Driscoll-Kraay. Each estimator is checked
under every covariance, one-way and two-way period effects, clusters that nest
the units and clusters that do not, and two-way clustering.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
import pandas as pd
import pytest
from linearmodels.panel import (
    BetweenOLS,
    FirstDifferenceOLS,
    PanelOLS,
    PooledOLS,
    RandomEffects,
)

from _support import panel_settings
from panelpipe.compare import _mundlak_fit
from panelpipe.estimate import (
    INTERCEPT,
    MEAN_PREFIX,
    Design,
    _fit_one,
    dk_bandwidth,
    identifiable,
    make_design,
)

ESTIMATORS = [
    "pooled_ols",
    "fixed_effects",
    "random_effects",
    "first_difference",
    "between",
    "correlated_random_effects",
]
INFERENCE = ("classical", "robust", "cluster", "driscoll_kraay")


def _reference_model(estimator: str, design: Design, terms: list[str]) -> Any:
    """The linearmodels model with the regressors the pipeline uses."""
    y = design.y
    x = design.x[terms]
    const = pd.DataFrame({INTERCEPT: np.ones(design.nobs)}, index=y.index)
    dummies = design.period_dummies
    if estimator == "pooled_ols":
        return PooledOLS(y, pd.concat([const, x, dummies], axis=1))
    if estimator == "fixed_effects":
        return PanelOLS(y, pd.concat([x, dummies], axis=1), entity_effects=True)
    if estimator == "random_effects":
        return RandomEffects(y, pd.concat([const, x, dummies], axis=1))
    if estimator == "first_difference":
        return FirstDifferenceOLS(y, pd.concat([x, dummies], axis=1))
    if estimator == "between":
        return BetweenOLS(y, pd.concat([const, x], axis=1))
    varying = [t for t in terms if design.x[t].groupby(level=0).nunique().max() > 1]
    means = design.x[varying].groupby(level=0).transform("mean")
    means.columns = [f"{MEAN_PREFIX}{c}" for c in varying]
    return RandomEffects(y, pd.concat([const, x, dummies, means], axis=1))


def _reference_kwargs(key: str, design: Design) -> dict[str, Any]:
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
    return {
        "cov_type": "kernel",
        "kernel": "bartlett",
        "debiased": True,
        "bandwidth": dk_bandwidth(design),
    }


def _panel(nested: bool) -> pd.DataFrame:
    from conftest import simulate_panel

    panel = simulate_panel(n_units=24, n_periods=7)
    panel["region"] = "r" + (pd.factorize(panel["unit"])[0] % 6).astype(str)
    if not nested:  # move two rows of one unit to another region
        panel.loc[panel.index[:2], "region"] = "r_other"
    return panel


CASES = [
    pytest.param(("unit",), True, True, id="by-unit-two-way"),
    pytest.param(("unit",), False, True, id="by-unit-one-way"),
    pytest.param(("region",), True, True, id="by-region-nested"),
    pytest.param(("region",), True, False, id="by-region-not-nested"),
    pytest.param(("region", "period"), True, True, id="region-and-period"),
]


@pytest.mark.parametrize("estimator", ESTIMATORS)
@pytest.mark.parametrize(("cluster_by", "period_effects", "nested"), CASES)
def test_every_estimator_and_covariance_equals_linearmodels(
    estimator: str, cluster_by: tuple[str, ...], period_effects: bool, nested: bool
) -> None:
    panel = _panel(nested)
    settings = panel_settings(
        cluster_by=cluster_by, period_effects=period_effects, inference=INFERENCE
    )
    design, _ = make_design(panel, settings)
    terms, omitted = identifiable(design, estimator)
    ours = _fit_one(estimator, design, terms, omitted, INFERENCE, 0.95)
    model = _reference_model(estimator, design, terms)
    for key in INFERENCE:
        if estimator == "between" and key == "driscoll_kraay":
            assert key not in ours.inference
            continue
        if estimator == "between" and key == "cluster" and (not nested or "period" in cluster_by):
            assert key not in ours.inference  # linearmodels refuses: clusters vary in a unit
            with pytest.raises(ValueError, match="vary within an entity"):
                model.fit(**_reference_kwargs(key, design))
            continue
        if (
            estimator == "first_difference"
            and key == "cluster"
            and (not nested or "period" in cluster_by)
        ):
            assert key not in ours.inference  # the two rows of a difference in two clusters
            with pytest.raises(ValueError, match="identical for values used"):
                model.fit(**_reference_kwargs(key, design))
            continue
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = model.fit(**_reference_kwargs(key, design))
        names = list(ref.params.index)
        np.testing.assert_allclose(ours.params[names], ref.params, rtol=1e-9, atol=1e-12)
        cov = ours.inference[key].cov.loc[names, names].to_numpy()
        ref_cov = ref.cov.to_numpy()
        if key == "cluster" and len(cluster_by) == 2:
            # both sides may be indefinite; ours clips negative eigenvalues (said in the note)
            values, vectors = np.linalg.eigh(ref_cov)
            ref_cov = (vectors * np.clip(values, 0.0, None)) @ vectors.T
        np.testing.assert_allclose(cov, ref_cov, rtol=1e-8, atol=1e-13)
        assert ours.nobs == int(ref.nobs)
        if key == "classical":
            df = float(ref.df_resid)
            assert ours.inference[key].reference == f"t({int(df)})"
    st = ours.statistics
    first = model.fit(**_reference_kwargs("classical", design))
    if estimator in {"random_effects", "correlated_random_effects"}:
        vd = first.variance_decomposition
        assert st["sigma2_unit"] == pytest.approx(float(vd["Effects"]), rel=1e-9)
        assert st["sigma2_idiosyncratic"] == pytest.approx(float(vd["Residual"]), rel=1e-9)
        assert st["theta_median"] == pytest.approx(float(np.median(first.theta)), rel=1e-9)
        assert st["r2"] == pytest.approx(float(first.rsquared), rel=1e-9)
    if estimator == "fixed_effects":
        assert st["r2_within"] == pytest.approx(float(first.rsquared_within), rel=1e-9)
        pooled = first.f_pooled
        assert st["f_unit_effects"] == pytest.approx(float(pooled.stat), rel=1e-9)
        assert st["f_unit_effects_p"] == pytest.approx(float(pooled.pval), rel=1e-6, abs=1e-300)
        assert st["f_unit_effects_df1"] == float(pooled.df)
        assert st["f_unit_effects_df2"] == float(pooled.df_denom)
    if estimator in {"pooled_ols", "first_difference", "between"}:
        assert st["r2"] == pytest.approx(float(first.rsquared), rel=1e-9)


def test_mundlak_regression_equals_linearmodels_pooled_ols(make_panel) -> None:
    """Reference: linearmodels PooledOLS with unit means and CR1 clustered errors."""
    panel = make_panel(n_units=30, n_periods=8)
    design, _ = make_design(panel, panel_settings(cluster_by=("unit",), period_effects=True))
    params, cov = _mundlak_fit(design, ["x1", "x2"])
    x = pd.DataFrame({"_intercept": 1.0}, index=design.y.index).join(design.x)
    x = x.join(design.period_dummies)
    for term in ("x1", "x2"):
        x[f"_unit_mean_{term}"] = design.x[term].groupby(level=0).transform("mean")
    ref = PooledOLS(design.y, x).fit(
        cov_type="clustered", cluster_entity=True, debiased=True, group_debias=True
    )
    names = list(ref.params.index)
    np.testing.assert_allclose(params[names], ref.params, rtol=1e-10)
    np.testing.assert_allclose(cov.loc[names, names], ref.cov, rtol=1e-9, atol=1e-14)


def test_distribution_functions_equal_scipy_stats() -> None:
    """Reference: scipy.stats (general-purpose library) at a spread of arguments."""
    from scipy import stats

    from panelpipe import distributions as d

    x = np.array([-3.2, -0.4, 0.0, 0.7, 1.96, 5.5])
    for df in (1.0, 4.0, 9.5, 250.0):
        np.testing.assert_allclose(d.t_sf(x, df), stats.t.sf(x, df), rtol=1e-12)
        np.testing.assert_allclose(d.chi2_sf(np.abs(x), df), stats.chi2.sf(np.abs(x), df))
        np.testing.assert_allclose(d.f_sf(np.abs(x), 3, df), stats.f.sf(np.abs(x), 3, df))
        q = np.array([0.025, 0.5, 0.975])
        np.testing.assert_allclose(d.t_ppf(q, df), stats.t.ppf(q, df), rtol=1e-12)
    np.testing.assert_allclose(d.norm_sf(x), stats.norm.sf(x), rtol=1e-12)
    np.testing.assert_allclose(d.norm_ppf([0.1, 0.5, 0.9]), stats.norm.ppf([0.1, 0.5, 0.9]))
