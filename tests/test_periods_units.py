"""Periods follow the calendar, periods that are not periods are refused, one unit has one
spelling, extreme values are refused, and many periods are absorbed rather than dummied.

Invented panels throughout (``make_panel`` of conftest.py, or small hand-made ones).
"""

from __future__ import annotations

import unicodedata
from collections.abc import Callable

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from _support import panel_settings
from panelpipe.compare import breusch_pagan_lm, mundlak_test
from panelpipe.diagnose import _Index
from panelpipe.estimate import (
    estimate_all,
    estimate_one,
    first_difference_rows,
    make_design,
)
from panelpipe.findings import Finding
from panelpipe.periods import parse_periods
from panelpipe.validate import validate_panel

Maker = Callable[..., pd.DataFrame]


def _codes(findings: tuple[Finding, ...] | list[Finding]) -> dict[str, Finding]:
    return {f.code: f for f in findings}


def _without_year(raw: pd.DataFrame, year: int) -> pd.DataFrame:
    out = raw[raw["period"] != year].reset_index(drop=True)
    out["_line"] = np.arange(2, len(out) + 2)
    return out


# ---------------------------------------------------------------- item 4: the calendar


def _hand_differences(panel: pd.DataFrame, cols: list[str]) -> pd.DataFrame:
    """x(t) - x(t-1) of the same unit where the calendar period t-1 is observed."""
    prev = panel[["unit", "period", *cols]].copy()
    prev["period"] = prev["period"] + 1
    both = panel.merge(prev, on=["unit", "period"], suffixes=("", "_prev"))
    return pd.DataFrame({c: both[c] - both[f"{c}_prev"] for c in cols})


def test_first_differences_skip_a_year_missing_for_everybody(make_panel: Maker) -> None:
    raw = _without_year(make_panel(n_missing=0), 2004)
    settings = panel_settings(
        regressors=("x1", "x2"), period_effects=False, estimators=("first_difference",)
    )
    checked = validate_panel(raw, settings)
    design, _ = make_design(checked.panel, settings)
    models, _ = estimate_all(design)
    diffs = _hand_differences(checked.panel, ["y", "x1", "x2"])
    # Reference: statsmodels OLS without a constant on differences formed by calendar
    # arithmetic (the year before 2005 is 2004, which nobody has).
    ref = sm.OLS(diffs["y"], diffs[["x1", "x2"]]).fit()
    fd = models["first_difference"]
    assert fd.nobs == len(diffs) == 30 * 5  # 2002-03 and 2006-08 per unit
    np.testing.assert_allclose(fd.params[["x1", "x2"]], ref.params, rtol=1e-10)
    np.testing.assert_allclose(
        fd.inference["classical"].std_errors[["x1", "x2"]], ref.bse, rtol=1e-10
    )
    assert len(first_difference_rows(design)) == len(diffs)
    counts = _codes(checked.findings)["rows_per_estimator"].where["rows"]
    assert counts["first_difference"] == len(diffs)


def test_the_audit_finds_no_next_period_across_a_missing_year(make_panel: Maker) -> None:
    raw = _without_year(make_panel(n_missing=0), 2004)
    settings = panel_settings(regressors=("x1", "x2"), estimators=("fixed_effects",))
    design, _ = make_design(validate_panel(raw, settings).panel, settings)
    index = _Index.of(design)
    periods = design.periods.to_numpy()
    before, after = index.shifted(-1), index.shifted(1)
    assert np.all(before[periods == 2005] == -1)
    assert np.all(after[periods == 2003] == -1)
    ok = before >= 0
    assert np.all(periods[before[ok]] == periods[ok] - 1)


# ---------------------------------------------------------------- item 5: periods


@pytest.mark.parametrize(
    "value",
    ["9223372036854775808", "12345678901234567890", "-9223372036854775809"],
    ids=["int64-max-plus-one", "twenty-digits", "below-int64-min"],
)
def test_a_period_beyond_the_integer_range_is_unreadable(value: str) -> None:
    parsed = parse_periods(pd.Series(["2019", "2020", value], dtype="string"))
    assert parsed.bad.tolist() == [False, False, True]
    assert parsed.ordinal.iloc[:2].tolist() == [2019, 2020]


def test_a_five_digit_year_among_years_is_an_error(make_panel: Maker) -> None:
    raw = make_panel()
    raw.loc[5, "period"] = 20019
    found = _codes(validate_panel(raw, panel_settings()).findings)
    assert found["bad_period"].severity == "error"
    assert "20019" in found["bad_period"].message
    assert f"simulated.csv line {raw.loc[5, '_line']}" in found["bad_period"].message


def test_a_period_far_outside_the_others_is_a_warning(make_panel: Maker) -> None:
    raw = make_panel()
    raw.loc[7, "period"] = 1205  # a year, but centuries before the other eight
    checked = validate_panel(raw, panel_settings())
    found = _codes(checked.findings)
    assert checked.status == "warn"
    assert found["period_outlier"].severity == "warning"
    assert "1205" in found["period_outlier"].message
    assert f"line {raw.loc[7, '_line']}" in found["period_outlier"].message


def test_a_daily_period_far_outside_the_others_is_a_warning() -> None:
    dates = pd.date_range("2021-01-04", periods=30, freq="D").strftime("%Y-%m-%d").tolist()
    dates[-1] = "2201-02-02"
    assert not parse_periods(pd.Series(dates, dtype="string")).bad.any()  # readable
    raw = pd.DataFrame(
        {
            "unit": pd.Series(["a"] * 30, dtype="string"),
            "period": pd.Series(dates, dtype="string"),
            "y": np.arange(30.0) ** 1.5,
            "x1": np.sin(np.arange(30.0)),
            "x2": np.cos(np.arange(30.0)),
            "z": np.arange(30.0) % 4,
            "_source": "d.csv",
            "_line": np.arange(2, 32),
        }
    )
    outliers = [
        f for f in validate_panel(raw, panel_settings()).findings if f.code == "period_outlier"
    ]
    assert (
        outliers and "2201-02-02" in outliers[0].message and "d.csv line 31" in outliers[0].message
    )


# ---------------------------------------------------------------- item 6: unit spellings


def _two_sources(first: list[str], second: list[str]) -> pd.DataFrame:
    rows = []
    for source, units, year in (("a.csv", first, 2020), ("b.parquet", second, 2021)):
        for line, unit in enumerate(units, start=2):
            rows.append((unit, str(year), 1.0 + line, 0.5 * line, line % 3, 1.0, source, line))
    frame = pd.DataFrame(rows, columns=["unit", "period", "y", "x1", "x2", "z", "_source", "_line"])
    frame["unit"] = frame["unit"].astype("string")
    frame["period"] = frame["period"].astype("string")
    return frame


@pytest.mark.parametrize(
    ("first", "second", "shown"),
    [
        (["007", "008"], ["7", "008"], ["'007'", "'7'"]),
        (["07", "7"], ["07", "7"], ["'07'", "'7'"]),
        (
            [unicodedata.normalize("NFC", "Sörby"), "b"],
            [unicodedata.normalize("NFD", "Sörby"), "b"],
            ["Sörby"],
        ),
    ],
    ids=["leading-zeros-across-files", "two-spellings-in-one-file", "unicode-normal-forms"],
)
def test_one_unit_written_two_ways_is_an_error(
    first: list[str], second: list[str], shown: list[str]
) -> None:
    raw = _two_sources(first, second)
    checked = validate_panel(raw, panel_settings(regressors=("x1",)))
    found = _codes(checked.findings)
    assert checked.status == "fail"
    message = found["unit_spelling"].message
    for text in shown:
        assert text in message
    assert "a.csv line 2" in message
    assert "same way in every delivery" in message


def test_distinct_ids_that_merely_share_digits_are_kept() -> None:
    raw = _two_sources(["70", "7a"], ["70", "7a"])
    found = _codes(validate_panel(raw, panel_settings(regressors=("x1",))).findings)
    assert "unit_spelling" not in found


# ---------------------------------------------------------------- item 10: extreme values


@pytest.mark.parametrize("value", [1e308, -1e200, 3e150], ids=["1e308", "-1e200", "3e150"])
def test_a_value_whose_square_overflows_is_refused(make_panel: Maker, value: float) -> None:
    raw = make_panel()
    raw.loc[3, "x2"] = value
    found = _codes(validate_panel(raw, panel_settings()).findings)
    assert found["value_too_large"].severity == "error"
    assert "'x2'" in found["value_too_large"].message
    assert f"simulated.csv line {raw.loc[3, '_line']}" in found["value_too_large"].message


def test_a_constant_outcome_is_refused(make_panel: Maker) -> None:
    raw = make_panel()
    raw["y"] = 4.25
    found = _codes(validate_panel(raw, panel_settings()).findings)
    assert found["constant_outcome"].severity == "error"
    assert "'y'" in found["constant_outcome"].message


def test_a_failing_estimator_becomes_a_finding(make_panel: Maker) -> None:
    settings = panel_settings(regressors=("x1",), estimators=("fixed_effects",))
    design, _ = make_design(validate_panel(make_panel(), settings).panel, settings)
    design.y.iloc[:] = np.nan  # nothing a least-squares fit can use
    model, findings = estimate_one(design, "fixed_effects", ("classical", "cluster"))
    assert model is None
    assert _codes(findings)["estimator_skipped"].severity == "warning"


# ---------------------------------------------------------------- item 11: scale, many periods


@pytest.mark.parametrize("scale", [1e-60, 1e60], ids=["tiny", "huge"])
def test_a_rescaled_regressor_gives_the_rescaled_slope(make_panel: Maker, scale: float) -> None:
    raw = make_panel()
    settings = panel_settings(estimators=("pooled_ols", "fixed_effects", "random_effects"))
    checked = validate_panel(raw.assign(x1=raw["x1"] * scale), settings)
    assert "constant_regressor" not in _codes(checked.findings)
    scaled, _ = estimate_all(make_design(checked.panel, settings)[0])
    # Reference: statsmodels OLS with a constant and period dummies on the data scaled
    # back (fixed effects: a dummy per unit as well).
    panel = validate_panel(raw, settings).panel
    dummies = pd.get_dummies(panel["period"], prefix="p", drop_first=True, dtype=float)
    units = pd.get_dummies(panel["unit"], prefix="u", drop_first=True, dtype=float)
    pooled = sm.add_constant(pd.concat([panel[["x1", "x2", "z"]], dummies], axis=1))
    within = sm.add_constant(pd.concat([panel[["x1", "x2"]], dummies, units], axis=1))
    for key, x in (("pooled_ols", pooled), ("fixed_effects", within)):
        ref = sm.OLS(panel["y"], x).fit()
        ours = scaled[key]
        np.testing.assert_allclose(ours.params["x1"] * scale, ref.params["x1"], rtol=1e-8)
        se = ours.inference["classical"].std_errors["x1"]
        np.testing.assert_allclose(se * scale, ref.bse["x1"], rtol=1e-8)
    assert "x1" in scaled["random_effects"].terms


def test_a_regressor_too_tiny_to_invert_is_refused_not_called_constant(make_panel: Maker) -> None:
    raw = make_panel()
    checked = validate_panel(raw.assign(x1=raw["x1"] * 1e-170), panel_settings())
    found = _codes(checked.findings)
    assert "constant_regressor" not in found
    assert found["value_too_small"].severity == "error"
    assert "'x1'" in found["value_too_small"].message


def _daily_panel(units: int, days: int, seed: int = 7) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    unit = np.repeat(np.arange(units), days)
    day = np.tile(np.arange(days), units)
    x1 = rng.normal(size=unit.size) + 0.3 * rng.normal(size=units)[unit]
    x2 = rng.normal(size=unit.size)
    y = (
        0.8 * x1
        - 0.4 * x2
        + rng.normal(size=units)[unit]
        + np.sin(day / 9)
        + rng.normal(size=unit.size)
    )
    dates = (np.datetime64("2020-01-02") + day.astype("timedelta64[D]")).astype(str)
    frame = pd.DataFrame(
        {
            "unit": pd.Series([f"w{u:03d}" for u in unit], dtype="string"),
            "period": pd.Series(dates, dtype="string"),
            "y": y,
            "x1": x1,
            "x2": x2,
            "z": rng.normal(size=units)[unit],
            "_source": "daily.csv",
            "_line": np.arange(2, unit.size + 2),
        }
    )
    return frame.drop(index=rng.choice(unit.size, size=unit.size // 20, replace=False))


ABSORBABLE = ("pooled_ols", "fixed_effects", "first_difference")


def test_absorbed_period_effects_equal_dense_dummies(monkeypatch: pytest.MonkeyPatch) -> None:
    import panelpipe.estimate as estimate

    settings = panel_settings(
        estimators=ABSORBABLE, inference=("classical", "robust", "cluster", "driscoll_kraay")
    )
    panel = validate_panel(_daily_panel(12, 30), settings).panel
    dense_design, _ = make_design(panel, settings)
    dense, _ = estimate_all(dense_design)
    monkeypatch.setattr(estimate, "ABSORB_PERIODS", 10)
    design, _ = make_design(panel, settings)
    assert design.period_dummies.shape[1] == 0 and design.absorb_periods
    absorbed, _ = estimate_all(design)
    for key in ABSORBABLE:
        slopes = list(absorbed[key].terms)
        np.testing.assert_allclose(
            absorbed[key].params[slopes], dense[key].params[slopes], rtol=0, atol=1e-8
        )
        assert set(dense[key].inference) - set(absorbed[key].inference) == {"wild_bootstrap"}
        for inf in absorbed[key].inference:
            np.testing.assert_allclose(
                absorbed[key].inference[inf].std_errors[slopes],
                dense[key].inference[inf].std_errors[slopes],
                rtol=1e-8,
                err_msg=f"{key} {inf}",
            )
    dense_tests = mundlak_test(dense_design, dense["fixed_effects"])
    absorbed_tests = mundlak_test(design, absorbed["fixed_effects"])
    np.testing.assert_allclose(absorbed_tests.statistic, dense_tests.statistic, rtol=1e-8)
    np.testing.assert_allclose(
        breusch_pagan_lm(design).statistic,
        breusch_pagan_lm(dense_design).statistic,
        rtol=1e-8,
    )


def test_many_periods_match_statsmodels_with_period_dummies(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    import panelpipe.estimate as estimate

    monkeypatch.setattr(estimate, "ABSORB_PERIODS", 10)
    settings = panel_settings(
        regressors=("x1", "x2"),
        estimators=("pooled_ols", "random_effects"),
        inference=("classical",),
    )
    panel = validate_panel(_daily_panel(10, 25), settings).panel
    models, findings = estimate_all(make_design(panel, settings)[0])
    # Reference: statsmodels OLS with a constant and a dummy per day but the first.
    x = pd.get_dummies(panel["period"], prefix="d", drop_first=True, dtype=float)
    ref = sm.OLS(panel["y"], sm.add_constant(pd.concat([panel[["x1", "x2"]], x], axis=1))).fit()
    ours = models["pooled_ols"]
    np.testing.assert_allclose(ours.params[["x1", "x2"]], ref.params[["x1", "x2"]], rtol=1e-9)
    np.testing.assert_allclose(
        ours.inference["classical"].std_errors[["x1", "x2"]], ref.bse[["x1", "x2"]], rtol=1e-9
    )
    assert "random_effects" not in models
    skipped = [f for f in findings if f.code == "estimator_skipped"]
    assert skipped and "period effects" in skipped[0].message


@pytest.mark.slow
def test_a_daily_panel_of_1500_periods_fits_without_dense_dummies() -> None:
    from panelpipe.diagnose import run_audit

    settings = panel_settings(
        regressors=("x1", "x2"), estimators=("pooled_ols", "fixed_effects", "random_effects")
    )
    panel = validate_panel(_daily_panel(40, 1500), settings).panel
    design, _ = make_design(panel, settings)
    assert design.period_dummies.shape[1] == 0
    models, _ = estimate_all(design)
    assert {"pooled_ols", "fixed_effects"} <= set(models)
    audit = run_audit(design, models, focus="x1")
    # The audit's refits need period dummies: not run, with the reason, rather than guessed.
    assert audit["strict_exogeneity"].status == "not_run"
    assert "absorbed" in audit["strict_exogeneity"].message
