"""Tests of the validity audit (panelpipe.diagnose).

* Each diagnostic: a seeded simulation plants its threat and the audit flags it.
* Over replications of a clean design (every null true) no diagnostic flags more
  often than its nominal rate.
* The O(NT) CD statistic equals a direct computation over all unit pairs:
  exactly Pesaran's CD on balanced panels, exactly its own pair formula on
  unbalanced ones, and Pesaran's recentred unbalanced CD within the documented
  approximation.
* Leave-one-cluster-out estimates from cluster sums equal explicit refits of
  the fixed-effects model with linearmodels.
* Oster's delta and bias-adjusted coefficient recover the truth from the
  population moments of Oster's (2019) own model.
* The audit's within and first-difference fits reproduce the estimation stage.

The scenarios and data are invented here.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd
import pytest
from linearmodels.panel import PanelOLS
from scipy import stats

from _support import panel_settings
from panelpipe.config import AnalysisSettings
from panelpipe.diagnose import (
    DIAGNOSTIC_KEYS,
    THRESHOLDS,
    Diagnostic,
    leave_one_cluster_out,
    oster_beta_star,
    oster_delta,
    pesaran_cd,
    run_audit,
)
from panelpipe.estimate import Design, ModelResult, estimate_all, make_design
from panelpipe.fit import demean

FLAGGED = ("caution", "problem")


def simulate(
    seed: int,
    n_units: int = 60,
    n_periods: int = 8,
    *,
    beta: float = 1.0,
    x_between: float = 0.5,
    x_within: float = 1.0,
    confounder: float = 0.0,
    feedback: float = 0.0,
    curvature: float = 0.0,
    noise_in_x: float = 0.0,
    selective_exit: float = 0.0,
    random_exit: float = 0.05,
    ar: float = 0.0,
    common_shock: float = 0.0,
    unequal_variance: float = 0.0,
    groups: int | None = None,
    leverage: float = 0.0,
) -> pd.DataFrame:
    """A seeded panel of regions over years; every threat is off by default.

    ``y = beta x + 0.5 x2 + a_i + u_it`` with a unit effect ``a_i`` that ``x`` loads
    on (``x_between``) and a persistent within part (AR(1), 0.8) scaled by
    ``x_within``. Units leave for good with probability ``random_exit`` each
    period. The threats:

    confounder
        ``x2`` (observed) and an unobserved ``w`` (half as strong) push both ``x``
        and ``y``.
    feedback
        this period's shock raises next period's ``x``.
    curvature
        ``y`` also depends on ``x**2``.
    noise_in_x
        ``x`` is observed with classical measurement error of this sd.
    selective_exit
        extra exit probability after a shock below -0.5.
    ar
        AR(1) coefficient of the shocks.
    common_shock
        a shock per year that hits every unit, with unequal loadings.
    unequal_variance
        the shock sd is ``exp(unequal_variance * N(0, 1))`` per unit.
    groups
        units form this many clusters in column ``group`` (default: one each).
    leverage
        the first unit has five times the variation in ``x`` and a slope
        smaller by this much.
    """
    rng = np.random.default_rng(seed)
    n, t = n_units, n_periods
    a = rng.normal(size=n)
    shock_sd = np.exp(unequal_variance * rng.normal(size=n))
    u = np.empty((n, t))
    u[:, 0] = rng.normal(size=n) / np.sqrt(1.0 - ar**2)
    for s in range(1, t):
        u[:, s] = ar * u[:, s - 1] + rng.normal(size=n)
    u *= shock_sd[:, None]
    if common_shock:
        loading = 1.0 + 0.5 * rng.normal(size=n)
        u += common_shock * loading[:, None] * rng.normal(size=t)[None, :]
    xi = np.empty((n, t))
    xi[:, 0] = rng.normal(size=n)
    for s in range(1, t):
        xi[:, s] = 0.8 * xi[:, s - 1] + 0.6 * rng.normal(size=n) + feedback * u[:, s - 1]
    x2 = rng.normal(size=(n, t))
    w = rng.normal(size=(n, t))
    pull = confounder * (x2 + 0.5 * w)
    x = x_between * a[:, None] + x_within * xi + pull
    slope = np.full(n, beta)
    if leverage:
        x[0] *= 5.0
        slope[0] -= leverage
    y = slope[:, None] * x + curvature * x**2 + 0.5 * x2 + a[:, None] + pull + u
    x_seen = x + noise_in_x * rng.normal(size=(n, t))
    keep = np.ones((n, t), dtype=bool)
    exit_p = random_exit + selective_exit * (u < -0.5)
    for s in range(1, t):
        keep[:, s] = keep[:, s - 1] & (rng.uniform(size=n) >= exit_p[:, s - 1])
    unit = np.repeat(np.arange(n), t)
    frame = pd.DataFrame(
        {
            "unit": [f"r{i:03d}" for i in unit],
            "period": 2001 + np.tile(np.arange(t), n),
            "y": y.ravel(),
            "x": x_seen.ravel(),
            "x2": x2.ravel(),
            "group": [f"g{i % groups:02d}" if groups else f"g{i:03d}" for i in unit],
        }
    )
    return frame[keep.ravel()].reset_index(drop=True)


def settings(
    *,
    regressors: tuple[str, ...] = ("x", "x2"),
    period_effects: bool = True,
    cluster_by: tuple[str, ...] = ("unit",),
    estimators: tuple[str, ...] = ("fixed_effects",),
    inference: tuple[str, ...] = ("classical", "cluster"),
) -> AnalysisSettings:
    return panel_settings(
        regressors=regressors,
        period_effects=period_effects,
        cluster_by=cluster_by,
        estimators=estimators,
        inference=inference,
    )


def fitted(panel: pd.DataFrame, s: AnalysisSettings) -> tuple[Design, dict[str, ModelResult]]:
    design, _ = make_design(panel, s)
    models, _ = estimate_all(design)
    return design, models


def audit(panel: pd.DataFrame, **kw: Any) -> dict[str, Diagnostic]:
    return run_audit(*fitted(panel, settings(**kw)))


# ---------------------------------------------------------------- shape of the output


def test_every_key_is_present_with_plain_json(make_panel: Callable[..., pd.DataFrame]) -> None:
    s = settings(regressors=("x1", "x2", "z"), estimators=("fixed_effects", "first_difference"))
    result = run_audit(*fitted(make_panel(), s))
    assert tuple(result) == DIAGNOSTIC_KEYS
    for key, diag in result.items():
        assert diag.key == key
        entry = diag.to_dict()
        json.dumps(entry, allow_nan=False)
        assert {"status", "statistic", "p_value", "message"} <= set(entry)
        assert entry["status"] in {"ok", "caution", "problem", "not_run"}
        assert diag.message.endswith(".") and "causal" not in diag.message.lower()
        if key != "missing_data":  # the panel has gaps but no missing values
            assert diag.status != "not_run", diag.reason


def test_without_fixed_effects_the_checks_say_why(make_panel: Callable[..., pd.DataFrame]) -> None:
    s = settings(regressors=("x1", "x2"), estimators=("pooled_ols",))
    result = run_audit(*fitted(make_panel(), s))
    assert result["few_clusters"].status != "not_run"
    for key in set(DIAGNOSTIC_KEYS) - {"few_clusters", "missing_data"}:
        assert result[key].status == "not_run"
        assert result[key].reason.startswith("fixed effects were not estimated")


def test_a_focus_fixed_effects_cannot_estimate_is_not_run(
    make_panel: Callable[..., pd.DataFrame],
) -> None:
    design, models = fitted(make_panel(), settings(regressors=("x1", "z")))
    result = run_audit(design, models, focus="z")
    assert result["strict_exogeneity"].status == "not_run"
    assert "cannot estimate 'z'" in result["strict_exogeneity"].reason


def test_an_unknown_focus_is_an_error(make_panel: Callable[..., pd.DataFrame]) -> None:
    design, models = fitted(make_panel(), settings(regressors=("x1", "x2")))
    with pytest.raises(ValueError, match=r"focus 'x3' is not one of the 2 regressors \(x1, x2\)"):
        run_audit(design, models, focus="x3")


def test_a_two_period_panel_skips_what_needs_three() -> None:
    result = audit(simulate(1, n_periods=2, random_exit=0.0))
    assert result["serial_correlation"].status == "not_run"
    assert result["strict_exogeneity"].status == "not_run"
    assert result["attrition"].status == "ok"  # balanced: nothing to test
    assert result["heteroskedasticity"].status != "not_run"


def test_a_balanced_panel_has_no_attrition_to_test() -> None:
    diag = audit(simulate(2, random_exit=0.0))["attrition"]
    assert diag.status == "ok" and diag.p_value is None
    assert diag.message.startswith("The panel is balanced")


def test_thresholds_are_the_documented_ones() -> None:
    assert THRESHOLDS["oster_rmax_multiplier"] == 1.3
    assert THRESHOLDS["oster_delta"] == 1.0
    assert THRESHOLDS["few_clusters"] == 30


# ---------------------------------------------------------------- planted threats

# Each plant flags in 20 of 20 seeds (0-19) when the tests were written.
PLANTED: list[tuple[str, dict[str, Any], dict[str, Any], tuple[str, ...]]] = [
    ("omitted_variables", {"beta": 0.0, "confounder": 1.0}, {}, ("caution",)),
    ("strict_exogeneity", {"feedback": 0.5}, {}, ("problem",)),
    ("functional_form", {"curvature": 0.5}, {}, ("caution",)),
    ("measurement_error", {"noise_in_x": 0.8, "n_units": 200}, {}, ("caution",)),
    ("measurement_error", {"x_between": 3.0, "x_within": 0.3}, {}, ("caution",)),
    ("attrition", {"selective_exit": 0.5}, {}, ("problem",)),
    ("serial_correlation", {"ar": 0.5}, {}, ("caution",)),
    ("serial_correlation", {"ar": 0.5}, {"inference": ("classical",)}, ("problem",)),
    ("cross_sectional_dependence", {"common_shock": 0.5}, {"period_effects": False}, ("problem",)),
    ("cross_sectional_dependence", {"common_shock": 0.5}, {}, ("caution",)),
    ("heteroskedasticity", {"unequal_variance": 0.7}, {}, ("caution",)),
    ("few_clusters", {"groups": 12}, {"cluster_by": ("group",)}, ("problem",)),
    ("influential_clusters", {"leverage": 3.0, "random_exit": 0.0}, {}, FLAGGED),
]


@pytest.mark.parametrize(
    ("key", "threat", "options", "expected"),
    PLANTED,
    ids=[
        f"{key}-{'-'.join(f'{k}={v}' for k, v in threat.items())}"
        + ("-" + "-".join(f"{k}" for k in options) if options else "")
        for key, threat, options, _ in PLANTED
    ],
)
def test_a_planted_threat_is_flagged(
    key: str, threat: dict[str, Any], options: dict[str, Any], expected: tuple[str, ...]
) -> None:
    diag = audit(simulate(20261202, **threat), **options)[key]
    assert diag.status in expected, diag.message


def test_few_clusters_reports_the_wild_bootstrap_for_the_focus() -> None:
    # Without clustered inference the estimation stage adds no bootstrap, so the
    # audit runs its own (B = 999) on the within data.
    diag = audit(simulate(5, groups=12), cluster_by=("group",), inference=("classical",))[
        "few_clusters"
    ]
    assert diag.status == "problem"
    assert 0.0 <= diag.effect["wild_bootstrap_p_value"] <= 1.0
    low, high = diag.effect["wild_bootstrap_ci"]
    assert low < diag.effect["estimate"] < high
    assert diag.details["wild_bootstrap"]["draws"] == THRESHOLDS["bootstrap_draws"]


def test_omitted_variables_reports_the_coefficient_path_and_the_bound() -> None:
    diag = audit(simulate(3, beta=0.0, confounder=1.0))["omitted_variables"]
    path = diag.effect["coefficient_path"]
    assert set(path) == {"pooled_ols", "unit_effects", "unit_and_period_effects"}
    low, high = diag.effect["identified_set"]
    assert low <= 0.0 <= high and abs(diag.effect["delta_for_zero"]) < 1.0


# ---------------------------------------------------------------- clean designs


@pytest.mark.slow
def test_clean_designs_are_flagged_no_more_often_than_the_nominal_rate() -> None:
    """150 clean replications (60 units x 8 years, 5% random exit per year).

    Flag rates measured when the tests were written, seeds 0-149 (and, in
    brackets, 800 replications with seeds 5000-5799):
    omitted_variables 0 [0], strict_exogeneity 0.047 [0.054], functional_form
    0.053 [0.066], measurement_error 0.033 [0.056], attrition 0.040 [0.053],
    serial_correlation 0.080 [0.054], cross_sectional_dependence 0.067 [0.050],
    heteroskedasticity 0.040 [0.041], few_clusters 0 [0], influential_clusters
    0 [0]. A count passes when it is at most the 99% quantile of
    Binomial(150, 0.05), i.e. 15 of 150: the nominal 5% plus sampling noise.
    The RESET-type test runs slightly above 5% (the cubes have high leverage
    even for the jackknife covariance).
    """
    reps = 150
    limit = stats.binom.ppf(0.99, reps, THRESHOLDS["alpha"])
    counts = dict.fromkeys(DIAGNOSTIC_KEYS, 0)
    for seed in range(reps):
        result = audit(simulate(seed), inference=("cluster",))
        for key, diag in result.items():
            assert diag.status != "not_run" or key == "missing_data", (key, diag.reason)
            counts[key] += diag.status in FLAGGED
    rates = {k: v / reps for k, v in counts.items()}
    assert all(v <= limit for v in counts.values()), rates


# ---------------------------------------------------------------- the CD statistic


def _pairwise_cd(
    resid: np.ndarray, unit: np.ndarray, period: np.ndarray, *, recentre: bool
) -> tuple[float, float]:
    """Direct O(N^2 T) computation over every pair of units.

    ``recentre=True``: Pesaran's CD, each pair's correlation over its shared
    periods with means and variances over those periods. ``recentre=False``:
    panelpipe's pair formula, units standardised over their own periods, each
    pair weighted by its shared periods; returns (that sum / sqrt(sum T_ij),
    that sum / its exact null sd).
    """
    n, t = unit.max() + 1, period.max() + 1
    e = np.full((n, t), np.nan)
    e[unit, period] = resid
    t_i = (~np.isnan(e)).sum(axis=1)
    z = e / np.sqrt(np.nansum(e**2, axis=1) / t_i)[:, None]
    k = t_i / (t_i - 1)
    total = pairs_t = variance = cd = 0.0
    for i in range(n):
        for j in range(i + 1, n):
            shared = ~np.isnan(e[i]) & ~np.isnan(e[j])
            t_ij = int(shared.sum())
            if t_ij == 0:
                continue
            if recentre:
                a = e[i, shared] - e[i, shared].mean()
                b = e[j, shared] - e[j, shared].mean()
                cd += np.sqrt(t_ij) * (a @ b) / np.sqrt((a @ a) * (b @ b))
                continue
            total += z[i, shared] @ z[j, shared]
            pairs_t += t_ij
            variance += (
                k[i]
                * k[j]
                * (t_ij * (1 - 1 / t_i[i] - 1 / t_i[j]) + t_ij / np.sqrt(t_i[i] * t_i[j]))
            )
    if recentre:
        return float(np.sqrt(2.0 / (n * (n - 1))) * cd), float("nan")
    return total / np.sqrt(pairs_t), total / np.sqrt(variance)


def _residual_panel(seed: int, missing: float) -> tuple[np.ndarray, ...]:
    """Unit-demeaned residuals with a common factor, some cells missing at random."""
    rng = np.random.default_rng(seed)
    n, t = 20, 8
    unit = np.repeat(np.arange(n), t)
    period = np.tile(np.arange(t), n)
    loading = rng.normal(1.0, 1.0, size=n)
    resid = rng.normal(size=n * t) + 0.4 * loading[unit] * rng.normal(size=t)[period]
    keep = rng.uniform(size=n * t) >= missing
    unit, period, resid = unit[keep], period[keep], resid[keep]
    resid = demean(resid[:, None], unit)[:, 0]
    return resid, unit, period


@pytest.mark.parametrize("seed", range(5))
def test_cd_equals_pesaran_on_balanced_panels(seed: int) -> None:
    resid, unit, period = _residual_panel(seed, missing=0.0)
    cd = pesaran_cd(resid, unit, period)
    direct, _ = _pairwise_cd(resid, unit, period, recentre=True)
    assert cd.pesaran == pytest.approx(direct, rel=1e-12, abs=1e-12)
    t = 8  # balanced: the exact null sd differs from Pesaran's by sqrt(T/(T-1))
    assert cd.statistic == pytest.approx(direct * np.sqrt((t - 1) / t), rel=1e-12)


@pytest.mark.parametrize("seed", range(5))
def test_cd_on_unbalanced_panels_equals_its_pair_formula(seed: int) -> None:
    resid, unit, period = _residual_panel(seed, missing=0.1)
    cd = pesaran_cd(resid, unit, period)
    pesaran_like, standardised = _pairwise_cd(resid, unit, period, recentre=False)
    assert cd.pesaran == pytest.approx(pesaran_like, rel=1e-10)
    assert cd.statistic == pytest.approx(standardised, rel=1e-10)


@pytest.mark.parametrize("seed", range(10))
def test_cd_on_unbalanced_panels_approximates_the_recentred_cd(seed: int) -> None:
    """With 5% of cells missing the O(NT) form stays within 0.35 max(1, |CD|).

    The documented approximation: units standardised over their own periods
    and pairs weighted by shared periods, instead of recentring every pair.
    """
    resid, unit, period = _residual_panel(100 + seed, missing=0.05)
    direct, _ = _pairwise_cd(resid, unit, period, recentre=True)
    assert abs(pesaran_cd(resid, unit, period).pesaran - direct) <= 0.35 * max(1.0, abs(direct))


# ---------------------------------------------------------------- leave one cluster out


@pytest.mark.parametrize("groups", [None, 10], ids=["clusters=units", "clusters=10-groups"])
def test_leave_one_cluster_out_equals_refits(groups: int | None) -> None:
    panel = simulate(7, n_units=20, n_periods=6, groups=groups)
    cluster_by = ("group",) if groups else ("unit",)
    design, models = fitted(panel, settings(cluster_by=cluster_by))
    result = run_audit(design, models)["influential_clusters"]
    x = pd.concat([design.x, design.period_dummies], axis=1)
    unit = pd.factorize(design.units)[0]
    yw = demean(design.y.to_numpy()[:, None], unit)[:, 0]
    xw = demean(x.to_numpy(), unit)
    cluster = design.clusters.iloc[:, 0].to_numpy()
    loo = leave_one_cluster_out(yw, xw, cluster, int(cluster.max()) + 1)
    for g in np.unique(cluster):
        rest = cluster != g
        refit = PanelOLS(design.y[rest], x[rest], entity_effects=True).fit()
        np.testing.assert_allclose(loo[g], refit.params.to_numpy(), rtol=1e-8, atol=1e-10)
    shift = loo[:, 0] - models["fixed_effects"].params["x"]
    g = design.clusters.iloc[:, 0].nunique()
    assert result.effect["cv3_se"] == pytest.approx(np.sqrt((g - 1) / g * (shift**2).sum()))
    assert result.effect["max_change"] == pytest.approx(shift[np.argmax(np.abs(shift))])


def test_clusters_are_named_by_their_own_values() -> None:
    """Clustering by a column other than the unit: labels are that column's values."""
    panel = simulate(7, n_units=20, n_periods=6, groups=10)
    design, models = fitted(panel, settings(cluster_by=("group",)))
    effect = run_audit(design, models)["influential_clusters"].effect
    assert set(effect["leave_one_out"]) == {f"g{i:02d}" for i in range(10)}


@pytest.mark.parametrize("columns", [3, 7], ids=["K<size", "K>=size"])
def test_leave_one_cluster_out_marks_a_cluster_it_cannot_leave_out(columns: int) -> None:
    """A column with variation in one cluster only (a period seen only there).

    Clusters of 5 rows: with 3 columns the K x K systems are solved, with 7 the
    deletion formula's 5 x 5 systems; both must equal the refits (numpy lstsq).
    """
    rng = np.random.default_rng(0)
    clusters = np.repeat(np.arange(8), 5)
    X = rng.normal(size=(40, columns))
    X[5:, 2] = 0.0
    y = rng.normal(size=40)
    loo = leave_one_cluster_out(y, X, clusters, 8)
    assert np.isnan(loo[0]).all()
    for g in range(1, 8):
        rest = clusters != g
        expected = np.linalg.lstsq(X[rest], y[rest], rcond=None)[0]
        np.testing.assert_allclose(loo[g], expected, rtol=1e-10)


# ---------------------------------------------------------------- Oster's bound


def _oster_population(
    beta: float, lam: float, delta: float, v1: float, v2: float, vx: float, ve: float
) -> dict[str, float]:
    """Population moments of Oster's model.

    ``Y = beta X + W1 + W2 + e`` with W1 (observed index) and W2 (unobserved)
    uncorrelated and ``X = lam W1 + delta lam W2 + X~``, so that
    ``Cov(W2, X)/Var(W2) = delta Cov(W1, X)/Var(W1)`` (proportional selection).
    """
    a1, a2 = lam, delta * lam
    var_x = a1**2 * v1 + a2**2 * v2 + vx
    cov_xy = beta * var_x + a1 * v1 + a2 * v2
    var_y = beta**2 * var_x + v1 + v2 + ve + 2 * beta * (a1 * v1 + a2 * v2)
    tau = a2**2 * v2 + vx
    beta_long = beta + a2 * v2 / tau
    # residual variance of Y on (X, W1): Var(W2 + e) minus what X~-part of X explains
    resid = v2 + ve - (a2 * v2) ** 2 / tau
    return {
        "beta_short": cov_xy / var_x,
        "r2_short": cov_xy**2 / (var_x * var_y),
        "beta_long": beta_long,
        "r2_long": 1.0 - resid / var_y,
        "r2_max": 1.0 - ve / var_y,
        "var_y": var_y,
        "var_x": var_x,
        "tau_x": tau,
    }


@pytest.mark.parametrize("seed", range(6))
def test_oster_delta_and_bound_recover_the_model(seed: int) -> None:
    rng = np.random.default_rng(seed)
    beta, lam, delta = rng.normal(), rng.normal(), rng.uniform(-2.0, 3.0)
    v1, v2, vx, ve = rng.uniform(0.2, 2.0, size=4)
    moments = _oster_population(beta, lam, delta, v1, v2, vx, ve)
    assert oster_delta(beta, **moments) == pytest.approx(delta, rel=1e-9)
    at_one = _oster_population(beta, lam, 1.0, v1, v2, vx, ve)
    assert oster_beta_star(**at_one) == pytest.approx(beta, rel=1e-9, abs=1e-12)


# ---------------------------------------------------------------- agreement with estimation


def test_the_audit_refits_match_the_estimation_stage(
    make_panel: Callable[..., pd.DataFrame],
) -> None:
    s = settings(regressors=("x1", "x2"), estimators=("fixed_effects", "first_difference"))
    design, models = fitted(make_panel(), s)
    result = run_audit(design, models)
    fe, fd = models["fixed_effects"], models["first_difference"]
    me = result["measurement_error"]
    assert me.effect["fixed_effects"] == pytest.approx(fe.params["x1"], rel=1e-10)
    assert me.effect["first_difference"] == pytest.approx(fd.params["x1"], rel=1e-10)
    assert me.details["se_fixed_effects"] == pytest.approx(
        fe.inference["cluster"].std_errors["x1"], rel=1e-10
    )
    assert me.details["se_first_difference"] == pytest.approx(
        fd.inference["cluster"].std_errors["x1"], rel=1e-10
    )
    assert result["influential_clusters"].effect["cr1_se"] == pytest.approx(
        fe.inference["cluster"].std_errors["x1"], rel=1e-10
    )
