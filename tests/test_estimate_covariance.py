"""Covariances computed from the first fit equal linearmodels' own refits.

Reference: linearmodels itself, fitting the same model again with each
covariance type (the slow path the pipeline avoids).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from _support import panel_settings
from panelpipe.config import AnalysisSettings
from panelpipe.estimate import _covariance_from_fit, _fit_kwargs, _model, identifiable, make_design


def _settings(cluster_by: tuple[str, ...], period_effects: bool) -> AnalysisSettings:
    return panel_settings(cluster_by=cluster_by, period_effects=period_effects)


@pytest.mark.parametrize("period_effects", [True, False], ids=["two-way", "one-way"])
@pytest.mark.parametrize("cluster_by", [("unit",), ("region",)], ids=["by-unit", "by-region"])
@pytest.mark.parametrize(
    "estimator", ["pooled_ols", "fixed_effects", "random_effects", "correlated_random_effects"]
)
@pytest.mark.parametrize("key", ["robust", "cluster", "driscoll_kraay"])
def test_fast_covariance_equals_refit(
    make_panel, estimator: str, key: str, cluster_by: tuple[str, ...], period_effects: bool
) -> None:
    panel = make_panel(n_units=24, n_periods=7)
    panel["region"] = "r" + (pd.factorize(panel["unit"])[0] % 6).astype(str)
    if cluster_by == ("region",) and estimator == "fixed_effects":
        # units nested in regions: effects are not counted; break nesting for one unit
        panel.loc[panel.index[:2], "region"] = "r_other"
    settings = _settings(cluster_by, period_effects)
    design, _ = make_design(panel, settings)
    terms, _ = identifiable(design, estimator)
    model = _model(estimator, design, terms)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        first = model.fit(**_fit_kwargs("classical", design, estimator))
        refit = model.fit(**_fit_kwargs(key, design, estimator))
    fast = _covariance_from_fit(key, estimator, design, model, first)
    assert fast is not None
    np.testing.assert_allclose(
        fast.to_numpy(), refit.cov.loc[fast.index, fast.columns].to_numpy(), rtol=1e-9, atol=1e-14
    )


def test_mundlak_regression_equals_linearmodels_pooled_ols(make_panel) -> None:
    """Reference: linearmodels PooledOLS with unit means and CR1 clustered errors."""
    from linearmodels.panel import PooledOLS

    from panelpipe.compare import _mundlak_fit

    panel = make_panel(n_units=30, n_periods=8)
    design, _ = make_design(panel, _settings(("unit",), True))
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
