"""Tests of the simulated demo data (``panelpipe.demo``) and the shipped CSV files.

Estimates are checked with an outside reference library, ``linearmodels``:
``PanelOLS(..., entity_effects=True, time_effects=True)`` for fixed effects and
``PanelOLS(..., time_effects=True)`` with a constant for pooled OLS (with year
effects), both with standard errors clustered by region.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from linearmodels.panel import PanelOLS

from panelpipe.demo import (
    COLUMNS,
    N_MISSING_ROWS,
    TRUE_COEFFICIENTS,
    main,
    simulate_regions,
    write_demo,
)

SHIPPED = Path(__file__).resolve().parents[1] / "config" / "demo"
HISTORY = "regional_jobs_2011_2024.csv"
DELIVERY = "regional_jobs_2025.csv"
TIME_VARYING = ["subsidy_rate", "broadband_share", "log_median_wage"]
# Many regions keep sampling noise small; the seed differs from the shipped one on purpose.
LARGE_SEED = 314159


@pytest.fixture(scope="module")
def history() -> pd.DataFrame:
    return pd.read_csv(SHIPPED / HISTORY, dtype={"region": str})


@pytest.fixture(scope="module")
def delivery() -> pd.DataFrame:
    return pd.read_csv(SHIPPED / DELIVERY, dtype={"region": str})


@pytest.fixture(scope="module")
def large_panel() -> pd.DataFrame:
    return simulate_regions(n_regions=200, seed=LARGE_SEED).set_index(["region", "year"])


def _fit(panel: pd.DataFrame, regressors: list[str], **effects: bool) -> tuple[float, float]:
    """Subsidy slope and its region-clustered standard error from ``linearmodels``."""
    exog = panel[regressors]
    if not effects.get("entity_effects", False):
        exog = exog.assign(const=1.0)
    result = PanelOLS(panel["youth_employment"], exog, **effects).fit(
        cov_type="clustered", cluster_entity=True
    )
    return float(result.params["subsidy_rate"]), float(result.std_errors["subsidy_rate"])


@pytest.mark.parametrize("runner", ["write_demo", "main"])
def test_regenerated_files_match_shipped_bytes(tmp_path: Path, runner: str) -> None:
    if runner == "write_demo":
        written = write_demo(tmp_path)
    else:
        assert main([str(tmp_path)]) == 0
        written = [tmp_path / HISTORY, tmp_path / DELIVERY]
    assert [p.name for p in written] == [HISTORY, DELIVERY]
    for path in written:
        assert path.read_bytes() == (SHIPPED / path.name).read_bytes(), path.name


def test_shipped_files_columns_and_text_ids(history: pd.DataFrame, delivery: pd.DataFrame) -> None:
    for frame in (history, delivery):
        assert list(frame.columns) == list(COLUMNS)
        assert all(re.fullmatch(r"R\d{3}", code) for code in frame["region"])
    assert history["region"].nunique() == 40
    assert history.groupby("region")["region_name"].nunique().eq(1).all()
    assert history["region_name"].nunique() == 40


def test_history_and_delivery_split_by_year(history: pd.DataFrame, delivery: pd.DataFrame) -> None:
    assert history["year"].between(2011, 2024).all()
    assert history["year"].min() == 2011
    assert history["year"].max() == 2024
    assert set(delivery["year"]) == {2025}
    assert sorted(delivery["region"]) == sorted(history["region"].unique())


def test_a_few_rows_are_missing_never_in_the_last_year(
    history: pd.DataFrame, delivery: pd.DataFrame
) -> None:
    combined = pd.concat([history, delivery])
    assert not combined.duplicated(["region", "year"]).any()
    missing = 40 * 15 - len(combined)
    assert missing == N_MISSING_ROWS
    assert 4 <= missing <= 8
    assert len(delivery) == 40


def test_coastal_is_constant_within_region(history: pd.DataFrame) -> None:
    assert history.groupby("region")["coastal"].nunique().eq(1).all()
    assert set(history["coastal"]) == {0, 1}


def test_region_effect_is_correlated_with_subsidy(history: pd.DataFrame) -> None:
    # Take the true slopes off the outcome: what is left is the constant, the region
    # and year effects and the error; its region means track the region effect.
    remainder = history["youth_employment"] - sum(
        beta * history[name] for name, beta in TRUE_COEFFICIENTS.items()
    )
    region_effect = remainder.groupby(history["region"]).mean()
    mean_subsidy = history.groupby("region")["subsidy_rate"].mean()
    correlation = region_effect.corr(mean_subsidy)
    print(f"correlation of region effect and mean subsidy: {correlation:.3f}")
    assert correlation < -0.6


def test_fixed_effects_recover_slope_and_pooled_ols_is_biased(large_panel: pd.DataFrame) -> None:
    true = TRUE_COEFFICIENTS["subsidy_rate"]
    fe, fe_se = _fit(large_panel, TIME_VARYING, entity_effects=True, time_effects=True)
    pooled, pooled_se = _fit(large_panel, [*TIME_VARYING, "coastal"], time_effects=True)
    print(
        f"subsidy_rate: true {true}, fixed effects {fe:.4f} (SE {fe_se:.4f}), "
        f"pooled OLS {pooled:.4f} (SE {pooled_se:.4f})"
    )
    # Clustered SEs are calibrated here (100 seeds: SD of (b - true)/SE was 1.00),
    # so a 4-SE miss would be a one-in-ten-thousand event.
    assert abs(fe - true) < 4 * fe_se
    # Poorer regions get more subsidy and have lower employment: pooled OLS is too low.
    assert pooled - true < -5 * pooled_se


def test_serial_correlation_makes_classical_errors_too_small(large_panel: pd.DataFrame) -> None:
    subsidy = large_panel["subsidy_rate"].unstack("year")
    demeaned = subsidy.sub(subsidy.mean(axis=1), axis=0)
    within = demeaned.sub(demeaned.mean(axis=0), axis=1).to_numpy()
    now, before = within[:, 1:].ravel(), within[:, :-1].ravel()
    both = ~np.isnan(now) & ~np.isnan(before)
    autocorrelation = np.corrcoef(now[both], before[both])[0, 1]

    model = PanelOLS(
        large_panel["youth_employment"],
        large_panel[TIME_VARYING],
        entity_effects=True,
        time_effects=True,
    )
    clustered = model.fit(cov_type="clustered", cluster_entity=True).std_errors["subsidy_rate"]
    classical = model.fit(cov_type="unadjusted").std_errors["subsidy_rate"]
    print(
        f"within autocorrelation of subsidy_rate {autocorrelation:.3f}; "
        f"clustered/classical SE {clustered / classical:.2f}"
    )
    # Demeaning over 15 years pulls the AR(1) coefficient 0.65 down to about 0.5.
    assert autocorrelation > 0.3
    assert clustered > 1.15 * classical


def test_simulation_is_pure_and_seeded() -> None:
    first = simulate_regions(n_regions=5, seed=7)
    pd.testing.assert_frame_equal(first, simulate_regions(n_regions=5, seed=7))
    assert not first.equals(simulate_regions(n_regions=5, seed=8))


def test_drop_rows_only_removes_rows() -> None:
    full = simulate_regions(n_regions=10, drop_rows=False)
    dropped = simulate_regions(n_regions=10)
    assert len(full) == 10 * 15
    assert len(full) - len(dropped) == N_MISSING_ROWS
    kept = full.merge(dropped[["region", "year"]], on=["region", "year"])
    pd.testing.assert_frame_equal(kept, dropped)


def test_true_coefficients_override_shifts_outcome_exactly() -> None:
    default = simulate_regions(n_regions=5)
    no_subsidy_effect = simulate_regions(n_regions=5, true_coefficients={"subsidy_rate": 0.0})
    shift = default["youth_employment"] - no_subsidy_effect["youth_employment"]
    np.testing.assert_allclose(shift, TRUE_COEFFICIENTS["subsidy_rate"] * default["subsidy_rate"])


def test_many_regions_get_distinct_codes_and_names() -> None:
    frame = simulate_regions(n_regions=1200, first_year=2024, last_year=2025, drop_rows=False)
    assert frame["region"].iloc[0] == "R0001"
    assert frame.groupby("region")["region_name"].first().is_unique


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"true_coefficients": {"subsidy": 1.0}}, "unknown name.*: subsidy; expected"),
        ({"n_regions": 0}, "n_regions must be at least 1, got 0"),
        ({"first_year": 2020, "last_year": 2020}, "need at least two years"),
        ({"n_regions": 2, "first_year": 2020, "last_year": 2022}, "cannot drop 6 rows from 4"),
    ],
    ids=["unknown-coefficient", "no-regions", "one-year", "too-few-rows-to-drop"],
)
def test_invalid_arguments_raise(kwargs: dict[str, object], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        simulate_regions(**kwargs)  # type: ignore[arg-type]
