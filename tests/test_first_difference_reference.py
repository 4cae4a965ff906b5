"""First differences against statsmodels OLS on differences built by hand, without a constant.

The first-difference regression has no intercept (Wooldridge 2010, §10.6): which
regressors it can identify must be decided on the differenced columns as they are,
not after removing their means. With period effects, the differenced period dummies
span one intercept per period that has differences, so a regressor that varies only
over periods is absorbed by them.

Reference: statsmodels ``OLS`` (no ``add_constant``) on differences of consecutive
calendar periods of the same unit, built here with pandas.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from _support import panel_settings
from panelpipe.estimate import estimate_one, make_design

TOL = 1e-8


def _panel(years: list[int], units: int = 10, seed: int = 7) -> pd.DataFrame:
    """Invented regions by year: a local grant, a nationwide rate and one dummy per year."""
    rng = np.random.default_rng(seed)
    rows = [
        {
            "unit": f"region_{u:02d}",
            "period": t,
            "x1": rng.normal(),
            # the same for every region in a year: varies only over periods
            "national_rate": 2.0 + np.sin(t) + 0.05 * (t - 2000),
        }
        for u in range(units)
        for t in years
    ]
    df = pd.DataFrame(rows)
    for t in years[1:]:
        df[f"year_{t}"] = (df["period"] == t).astype(float)
    trend = 0.4 * (df["period"] - years[0]) + 0.2 * (df["period"] - years[0]) ** 2
    df["y"] = 1.5 * df["x1"] + 0.7 * df["national_rate"] + trend + rng.normal(size=len(df))
    return df


def _differences(df: pd.DataFrame, columns: list[str]) -> pd.DataFrame:
    """Differences of consecutive calendar years within a region, with the later year."""
    df = df.sort_values(["unit", "period"])
    prev = df.groupby("unit")[["period", *columns]].shift(1)
    ok = df["period"] == prev["period"] + 1
    out = df.loc[ok, columns] - prev.loc[ok, columns]
    out["period"] = df.loc[ok, "period"]
    return out


def test_period_dummies_as_regressors_keep_full_rank() -> None:
    """period_effects false, the year dummies passed as regressors: none is dropped."""
    years = list(range(2011, 2018))
    df = _panel(years)
    dummies = [f"year_{t}" for t in years[1:]]
    regressors = ["x1", *dummies]
    settings = panel_settings(
        regressors=tuple(regressors), period_effects=False, estimators=("first_difference",)
    )
    design, _ = make_design(df, settings)
    model, findings = estimate_one(design, "first_difference", ("classical",))
    assert model is not None, [f.message for f in findings]
    assert not [f for f in findings if f.code == "regressor_not_identified"]
    diff = _differences(df, ["y", *regressors])
    # Reference: statsmodels OLS without a constant on the differenced columns.
    ref = sm.OLS(diff["y"], diff[regressors]).fit()
    for name in regressors:
        assert model.params[name] == pytest.approx(ref.params[name], abs=TOL)
        assert model.inference["classical"].std_errors[name] == pytest.approx(
            ref.bse[name], rel=1e-7
        )


@pytest.mark.parametrize(
    "years",
    [list(range(2011, 2018)), [2011, 2012, 2013, 2015, 2016, 2017]],
    ids=["consecutive", "a-year-nobody-reported"],
)
def test_regressor_varying_only_over_periods_is_absorbed(years: list[int]) -> None:
    """period_effects true: the nationwide rate is left out with a finding, x1 is fitted."""
    df = _panel(years)
    settings = panel_settings(
        regressors=("x1", "national_rate"), period_effects=True, estimators=("first_difference",)
    )
    design, _ = make_design(df, settings)
    model, findings = estimate_one(design, "first_difference", ("classical",))
    messages = [f.message for f in findings]
    assert model is not None, messages
    assert not any("could not be fitted" in m for m in messages)
    left_out = [f for f in findings if f.code == "regressor_not_identified"]
    assert [f.where["column"] for f in left_out] == ["national_rate"]
    assert "period effects absorb it" in left_out[0].message
    diff = _differences(df, ["y", "x1"])
    # Reference: statsmodels OLS without a constant on the differences and one
    # intercept per year that has differences (the span of the differenced dummies).
    intercepts = pd.get_dummies(diff["period"], prefix="d", dtype=float)
    ref = sm.OLS(diff["y"], pd.concat([diff[["x1"]], intercepts], axis=1)).fit()
    assert model.params["x1"] == pytest.approx(ref.params["x1"], abs=TOL)
    assert model.inference["classical"].std_errors["x1"] == pytest.approx(ref.bse["x1"], rel=1e-7)
