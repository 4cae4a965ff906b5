"""The missing-data check of the audit and the audit's wording.

* Rows lost to missing values are counted, in total and per reason (checked
  against pandas' own count of missing cells).
* The selection test flags an outcome that goes missing more often for units
  with high regressor values, and flags missing-at-random values at about the
  nominal rate (Monte Carlo, 200 replications each, seeds fixed).
* The attrition check no longer calls a panel balanced when rows were lost to
  missing values.
* A statistic outside its range (the errors' autocorrelation implied by the
  differenced residuals) is reported as not computable, with the reason.
* Advice names only what the run computed (the wild cluster bootstrap).

The regions, years and numbers are invented here.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from _support import panel_settings
from panelpipe.config import AnalysisSettings
from panelpipe.diagnose import THRESHOLDS, Diagnostic, missing_data_audit, run_audit
from panelpipe.estimate import estimate_all, estimate_one, make_design, planned_inference

FLAGGED = ("caution", "problem")


def regions(
    seed: int,
    *,
    n_units: int = 40,
    n_periods: int = 6,
    missing: float = 0.0,
    high_x_missing: float = 0.0,
    trend_errors: float = 0.0,
) -> pd.DataFrame:
    """Invented regions over years: ``y = x + 0.5 w + a_i + u_it``.

    ``missing`` is the chance that a row's outcome is missing, at random;
    ``high_x_missing`` is the extra chance for the regions whose average ``x`` is
    above the median (the outcome goes missing more often where ``x`` is high).
    ``trend_errors`` gives each region's errors a trend of its own (a random
    slope of this sd), which makes the differenced residuals positively
    autocorrelated.
    """
    rng = np.random.default_rng(seed)
    n, t = n_units, n_periods
    a = rng.normal(size=n)
    level = rng.normal(size=n)
    x = 0.5 * a[:, None] + level[:, None] + rng.normal(size=(n, t))
    w = rng.normal(size=(n, t))
    u = rng.normal(size=(n, t)) + trend_errors * rng.normal(size=n)[:, None] * np.arange(t)
    y = x + 0.5 * w + a[:, None] + u
    high = x.mean(axis=1) > np.median(x.mean(axis=1))
    p_missing = missing + high_x_missing * high[:, None]
    y = np.where(rng.uniform(size=(n, t)) < p_missing, np.nan, y)
    unit = np.repeat(np.arange(n), t)
    return pd.DataFrame(
        {
            "unit": pd.array([f"reg{i:02d}" for i in unit], dtype="string"),
            "period": 2011 + np.tile(np.arange(t), n),
            "y": y.ravel(),
            "x": x.ravel(),
            "w": w.ravel(),
        }
    )


def settings(**over: Any) -> AnalysisSettings:
    base: dict[str, Any] = {
        "regressors": ("x", "w"),
        "estimators": ("fixed_effects",),
        "inference": ("classical", "cluster"),
    }
    base.update(over)
    return panel_settings(**base)


def fe_only(panel: pd.DataFrame, s: AnalysisSettings) -> Diagnostic:
    """The missing-data check alone, with the fixed-effects model it audits."""
    design, _ = make_design(panel, s)
    inference, _ = planned_inference(design)
    fe, _ = estimate_one(design, "fixed_effects", inference)
    assert fe is not None
    return missing_data_audit(panel, design, {"fixed_effects": fe})


def full_audit(panel: pd.DataFrame, s: AnalysisSettings) -> dict[str, Diagnostic]:
    design, _ = make_design(panel, s)
    models, _ = estimate_all(design)
    return run_audit(design, models, panel=panel)


# ---------------------------------------------------------------- counts


def test_rows_and_units_lost_are_counted_per_reason() -> None:
    panel = regions(1, missing=0.2)
    panel.loc[[3, 4, 50], "w"] = np.nan  # rows 3 and 4 of reg00, row 50 of reg08
    diag = fe_only(panel, settings())
    loss = diag.details["loss"]
    # Reference: pandas' own count of missing cells (common practice, no source).
    y_gone = panel["y"].isna()
    w_gone = panel["w"].isna()
    any_gone = y_gone | w_gone
    assert loss["rows_loaded"] == len(panel) == 240
    assert loss["units_loaded"] == 40
    assert loss["rows_dropped"] == int(any_gone.sum())
    assert loss["rows_used"] == len(panel) - int(any_gone.sum())
    assert loss["units_used"] == panel.loc[~any_gone, "unit"].nunique()
    assert loss["units_with_dropped_rows"] == panel.loc[any_gone, "unit"].nunique()
    reasons = diag.details["by_reason"]
    assert reasons["y"] == {"rows": int(y_gone.sum()), "units": panel.loc[y_gone, "unit"].nunique()}
    assert reasons["w"] == {"rows": int(w_gone.sum()), "units": panel.loc[w_gone, "unit"].nunique()}
    assert reasons["x"] == {"rows": 0, "units": 0}
    assert f"{int(any_gone.sum())} of 240 rows" in diag.message
    assert f"{int(y_gone.sum())} for a missing y" in diag.message
    assert "3 for a missing w" in diag.message
    by_estimator = diag.details["by_estimator"]
    assert by_estimator["fixed_effects"]["rows_used"] == loss["rows_used"]


def test_nothing_missing_is_not_run_with_the_reason() -> None:
    diag = fe_only(regions(2), settings())
    assert diag.status == "not_run"
    assert diag.reason == "no row has a missing outcome or regressor, so no row was dropped"
    assert diag.details["loss"]["rows_dropped"] == 0


def test_whole_units_lost_to_missing_outcomes_are_not_called_balanced() -> None:
    panel = regions(3)
    panel.loc[panel["unit"].isin(["reg01", "reg02", "reg03"]), "y"] = np.nan
    result = full_audit(panel, settings())
    attrition = result["attrition"]
    assert "balanced" not in attrition.message and "no attrition" not in attrition.message
    assert "18 rows of 3 units were dropped for missing values" in attrition.message
    assert result["missing_data"].details["loss"]["units_used"] == 37


# ---------------------------------------------------------------- the selection test


def test_selection_on_the_regressor_is_flagged_and_says_what_differs() -> None:
    diag = fe_only(regions(4, missing=0.1, high_x_missing=0.4), settings())
    assert diag.status in FLAGGED, diag.message
    assert diag.message.endswith(".") and "causal" not in diag.message.lower()
    assert diag.p_value is not None and diag.p_value < THRESHOLDS["alpha"]


@pytest.mark.slow
def test_the_selection_test_has_its_nominal_size_and_power() -> None:
    """200 replications at random and 200 with selection, 40 regions x 6 years.

    Measured when the test was written: flagged 0.080 of the missing-at-random
    panels with seeds 0-199 and 0.049 over seeds 0-799 (the two tests share the
    nominal 5% by Bonferroni), and 0.955 of the selected ones (seeds 0-199). The
    band is the central 99% of Binomial(200, 0.05) (scipy), 3 to 19 flags.
    """
    reps = 200
    s = settings()
    at_random = sum(
        fe_only(regions(seed, missing=0.25), s).status in FLAGGED for seed in range(reps)
    )
    selected = sum(
        fe_only(regions(seed, missing=0.1, high_x_missing=0.4), s).status in FLAGGED
        for seed in range(reps)
    )
    low, high = stats.binom.ppf([0.005, 0.995], reps, THRESHOLDS["alpha"])
    assert low <= at_random <= high, at_random / reps
    assert selected / reps > 0.8, selected / reps


# ---------------------------------------------------------------- impossible statistics


def test_an_implied_autocorrelation_outside_its_range_is_not_computable() -> None:
    # Short, unbalanced (a few rows missing their outcome) and errors trending by
    # region: the differenced residuals are positively autocorrelated, which no
    # first-order autocorrelation of the errors can produce (it gives -1 to 0).
    panel = regions(5, n_periods=5, missing=0.05, trend_errors=1.0)
    diag = full_audit(panel, settings())["serial_correlation"]
    rho = diag.effect["fd_residual_autocorrelation"]
    assert rho > 0.0
    assert diag.effect["implied_ar1_of_errors"] is None
    reason = diag.details["not_computable"]["implied_ar1_of_errors"]
    assert f"{rho:.3g}" in reason and "between -1 and 0" in reason
    assert "implied autocorrelation" not in diag.message
    assert f"{1 + 2 * rho:.3g}" not in diag.message


# ---------------------------------------------------------------- advice follows what ran


def _few_clusters(inference: tuple[str, ...]) -> Diagnostic:
    # 40 regions: a caution (below 50 clusters) but not few enough for the
    # estimation stage to add the bootstrap by itself.
    return full_audit(regions(6), settings(inference=inference))["few_clusters"]


def test_advice_quotes_the_estimation_stages_bootstrap_when_it_ran() -> None:
    diag = _few_clusters(("classical", "cluster", "wild_bootstrap"))
    assert diag.status == "caution"
    p = diag.effect["wild_bootstrap_p_value"]
    assert "the wild cluster bootstrap of the estimates" in diag.message
    assert (f"p = {p:.3g}" if p >= 0.001 else "p < 0.001") in diag.message


def test_advice_never_points_to_a_bootstrap_that_was_not_in_the_run() -> None:
    diag = _few_clusters(("classical", "cluster"))
    assert diag.status == "caution"
    assert "compare the wild cluster bootstrap" not in diag.message
    p = diag.effect["wild_bootstrap_p_value"]
    assert "the audit's own wild cluster bootstrap" in diag.message
    assert (f"p = {p:.3g}" if p >= 0.001 else "p < 0.001") in diag.message
    assert "add wild_bootstrap to inference" in diag.message
