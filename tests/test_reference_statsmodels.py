"""Check panelpipe's estimates against statsmodels OLS on explicitly built designs.

On a seeded, unbalanced simulated panel (``make_panel`` in conftest.py):

* fixed effects (one-way and two-way) = statsmodels OLS with a dummy per unit
  (and per period but the first): coefficients and classical standard errors;
* clustered standard errors = statsmodels' raw cluster sandwich times the CR1
  factor that panelpipe states in its note;
* pooled OLS = statsmodels OLS with a constant (and period dummies);
* first differences = statsmodels OLS on differences of consecutive periods
  built here;
* between = statsmodels OLS on unit means;
* a time-invariant regressor is left out of fixed effects and first differences
  with a finding, and kept by pooled OLS, random effects and between;
* the classical Hausman statistic = a numpy hand computation (Hausman 1978).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats
from scipy.linalg import block_diag

from _support import panel_settings
from panelpipe.compare import hausman
from panelpipe.config import AnalysisSettings
from panelpipe.estimate import INTERCEPT, ModelResult, estimate_all, make_design
from panelpipe.findings import Finding
from panelpipe.validate import validate_panel

SEED = 20240601
SLOPES = ["x1", "x2"]
REGRESSORS = ("x1", "x2", "z")
ESTIMATORS = ("pooled_ols", "fixed_effects", "random_effects", "first_difference", "between")
TOL = 1e-8


def _settings(
    period_effects: bool,
    regressors: tuple[str, ...] = REGRESSORS,
    estimators: tuple[str, ...] = ESTIMATORS,
) -> AnalysisSettings:
    return panel_settings(
        regressors=regressors,
        period_effects=period_effects,
        estimators=estimators,
    )


class Fitted:
    """The validated panel, panelpipe's models and findings for one setting."""

    def __init__(self, raw: pd.DataFrame, period_effects: bool) -> None:
        settings = _settings(period_effects)
        checked = validate_panel(raw, settings)
        assert checked.status != "fail", checked.findings
        self.period_effects = period_effects
        self.panel = checked.panel  # sorted by unit and period
        design, _ = make_design(self.panel, settings)
        self.models, self.findings = estimate_all(design)

    def period_dummies(self) -> pd.DataFrame:
        """Dummies for every period but the first, or none without period effects."""
        if not self.period_effects:
            return pd.DataFrame(index=self.panel.index)
        dummies = pd.get_dummies(self.panel["period"], prefix="p", dtype=float)
        return dummies.iloc[:, 1:]

    def n_clusters(self) -> int:
        return int(self.panel["unit"].nunique())


@pytest.fixture(scope="module")
def raw(make_panel: Callable[..., pd.DataFrame]) -> pd.DataFrame:
    return make_panel(n_units=30, n_periods=8, seed=SEED)


@pytest.fixture(scope="module", params=[False, True], ids=["one-way", "two-way"])
def fitted(request: pytest.FixtureRequest, raw: pd.DataFrame) -> Fitted:
    return Fitted(raw, request.param)


def _cr1_se(
    ols: sm.regression.linear_model.RegressionResultsWrapper, groups: np.ndarray, n_obs: int, k: int
) -> pd.Series:
    """statsmodels' raw cluster sandwich (no correction) times G/(G-1)·(N-1)/(N-K).

    ``use_correction=False`` makes statsmodels return (X'X)^-1 (sum_g X_g'u_g u_g'X_g)
    (X'X)^-1 with no small-sample factor; the CR1 factor (Cameron & Miller 2015) is
    applied here with the K that panelpipe states.
    """
    raw_fit = ols.model.fit(
        cov_type="cluster", cov_kwds={"groups": groups, "use_correction": False}
    )
    g = len(np.unique(groups))
    factor = g / (g - 1) * (n_obs - 1) / (n_obs - k)
    return pd.Series(np.sqrt(np.diag(raw_fit.cov_params()) * factor), index=ols.params.index)


def _codes(labels: pd.Series) -> np.ndarray:
    return pd.factorize(labels)[0]


# ------------------------------------------------------------------ the sample


def test_simulated_panel_is_unbalanced_with_gaps(raw: pd.DataFrame) -> None:
    assert len(raw) == 30 * 8 - 6
    span = raw.groupby("unit")["period"].agg(lambda p: p.max() - p.min() + 1)
    count = raw.groupby("unit").size()
    assert (span > count).sum() >= 1, "the seed should leave at least one gap inside a unit"
    assert (raw.groupby("unit")["z"].nunique() == 1).all()


# ----------------------------------------------------------------- fixed effects


def _dummy_ols(fit: Fitted) -> sm.regression.linear_model.RegressionResultsWrapper:
    """OLS of y on the slopes, a dummy per unit and the period dummies."""
    p = fit.panel
    units = pd.get_dummies(p["unit"], prefix="u", dtype=float)
    x = pd.concat([p[SLOPES], fit.period_dummies(), units], axis=1)
    return sm.OLS(p["y"], x).fit()


def test_fixed_effects_match_dummy_ols(fitted: Fitted) -> None:
    fe = fitted.models["fixed_effects"]
    ols = _dummy_ols(fitted)
    periods = list(fitted.period_dummies().columns)
    ours = fe.params.copy()
    ours.index = [c.replace("_period_", "p_") for c in ours.index]
    assert list(ours.index) == SLOPES + periods
    np.testing.assert_allclose(ours, ols.params[SLOPES + periods], rtol=TOL, atol=TOL)
    # Classical: statsmodels' nonrobust divides SSR by N - K with K counting every unit
    # and period dummy; panelpipe counts the absorbed unit effects in the df as well.
    se = fe.inference["classical"].std_errors
    np.testing.assert_allclose(se[SLOPES], ols.bse[SLOPES], rtol=TOL)
    assert fe.nobs == len(fitted.panel)


def test_fixed_effects_cluster_se_is_raw_sandwich_times_stated_cr1(fitted: Fitted) -> None:
    fe = fitted.models["fixed_effects"]
    ols = _dummy_ols(fitted)
    n = len(fitted.panel)
    # K = coefficients estimated excluding the unit effects (nested in the unit
    # clusters): the slopes plus the period dummies.
    k = len(SLOPES) + fitted.period_dummies().shape[1]
    g = fitted.n_clusters()
    # By Frisch-Waugh-Lovell the slope block of the dummy-OLS sandwich equals the
    # within-transformed one, so statsmodels' raw sandwich is the right reference.
    expected = _cr1_se(ols, _codes(fitted.panel["unit"]), n, k)
    ours = fe.inference["cluster"]
    np.testing.assert_allclose(ours.std_errors[SLOPES], expected[SLOPES], rtol=TOL)
    assert f"G={g}, N={n}, K={k}" in ours.note
    assert ours.reference == f"t({g - 1})"


# ------------------------------------------------------------------- pooled OLS


def test_pooled_ols_matches_statsmodels(fitted: Fitted) -> None:
    pooled = fitted.models["pooled_ols"]
    p = fitted.panel
    x = pd.concat([sm.add_constant(p[list(REGRESSORS)]), fitted.period_dummies()], axis=1)
    ols = sm.OLS(p["y"], x).fit()
    names = ["const", *REGRESSORS, *fitted.period_dummies().columns]
    ours = pooled.params.to_numpy()
    np.testing.assert_allclose(ours, ols.params[names], rtol=TOL, atol=TOL)
    np.testing.assert_allclose(
        pooled.inference["classical"].std_errors.to_numpy(), ols.bse[names], rtol=TOL
    )
    # Pooled OLS: no effects are absorbed, so K counts every coefficient.
    expected = _cr1_se(ols, _codes(p["unit"]), len(p), len(names))
    np.testing.assert_allclose(
        pooled.inference["cluster"].std_errors.to_numpy(), expected[names], rtol=TOL
    )


# ----------------------------------------------------------- first differences


def _consecutive_differences(panel: pd.DataFrame) -> pd.DataFrame:
    """Differences of each unit's row and its row one period earlier.

    linearmodels' FirstDifferenceOLS differences along the panel's full grid of
    periods, so a difference across a gap (t and t-2 with t-1 missing) is not
    formed; it is dropped here as well.
    """
    p = panel.sort_values(["unit", "period"])
    rank = pd.Series(
        pd.factorize(np.sort(p["period"].unique()))[0], index=np.sort(p["period"].unique())
    )
    step = p["period"].map(rank).diff()
    same_unit = p["unit"].eq(p["unit"].shift())
    keep = same_unit & step.eq(1)
    diffs = p[["y", *REGRESSORS]].diff().loc[keep]
    diffs["unit"] = p.loc[keep, "unit"]
    diffs["period"] = p.loc[keep, "period"]
    return diffs


def test_first_difference_gaps_are_not_bridged(raw: pd.DataFrame) -> None:
    fit = Fitted(raw, period_effects=False)
    diffs = _consecutive_differences(fit.panel)
    bridged = len(fit.panel) - fit.panel["unit"].nunique()
    assert len(diffs) < bridged  # the sample really has gaps
    assert fit.models["first_difference"].nobs == len(diffs)


def test_first_difference_one_way_matches_statsmodels(raw: pd.DataFrame) -> None:
    fit = Fitted(raw, period_effects=False)
    fd = fit.models["first_difference"]
    diffs = _consecutive_differences(fit.panel)
    ols = sm.OLS(diffs["y"], diffs[SLOPES]).fit()  # no constant: no trend in levels
    np.testing.assert_allclose(fd.params[SLOPES], ols.params[SLOPES], rtol=TOL)
    np.testing.assert_allclose(
        fd.inference["classical"].std_errors[SLOPES], ols.bse[SLOPES], rtol=TOL
    )
    expected = _cr1_se(ols, _codes(diffs["unit"]), len(diffs), len(SLOPES))
    np.testing.assert_allclose(
        fd.inference["cluster"].std_errors[SLOPES], expected[SLOPES], rtol=TOL
    )


def test_first_difference_two_way_matches_statsmodels(raw: pd.DataFrame) -> None:
    # Guards against dropping a second period dummy in the differenced equation
    # (it would force the second period's effect to equal the first's).
    fit = Fitted(raw, period_effects=True)
    fd = fit.models["first_difference"]
    diffs = _consecutive_differences(fit.panel)
    # Two-way effects y_it = a_i + g_t + x_it b: differencing removes a_i and leaves a
    # free intercept g_t - g_{t-1} for every period with a difference (common
    # practice, no source; Wooldridge 2010 §10.6 writes it as a constant plus
    # dummies for periods 3..T). No restriction on the period effects is implied.
    intercepts = pd.get_dummies(diffs["period"], prefix="d", dtype=float)
    ols = sm.OLS(diffs["y"], pd.concat([diffs[SLOPES], intercepts], axis=1)).fit()
    np.testing.assert_allclose(fd.params[SLOPES], ols.params[SLOPES], rtol=TOL)
    np.testing.assert_allclose(
        fd.inference["classical"].std_errors[SLOPES], ols.bse[SLOPES], rtol=TOL
    )


def test_first_difference_leaves_out_regressor_changing_only_across_gaps(
    raw: pd.DataFrame,
) -> None:
    frame = raw.loc[~(raw["unit"].eq("u00") & raw["period"].eq(2004))].copy()
    # w steps up for unit u00 between 2003 and 2005, where 2004 is missing: no
    # difference of consecutive periods sees the change.
    frame["w"] = np.where(frame["unit"].eq("u00") & (frame["period"] > 2004), 1.0, 0.0)
    settings = _settings(False, regressors=("x1", "w"), estimators=("first_difference",))
    design, _ = make_design(validate_panel(frame, settings).panel, settings)
    models, findings = estimate_all(design)
    assert models["first_difference"].terms == ("x1",)
    assert _not_identified(findings, "first_difference") == {"w"}


# ----------------------------------------------------------------------- between


def test_between_matches_ols_on_unit_means(raw: pd.DataFrame) -> None:
    fit = Fitted(raw, period_effects=False)
    between = fit.models["between"]
    means = fit.panel.groupby("unit")[["y", *REGRESSORS]].mean()
    ols = sm.OLS(means["y"], sm.add_constant(means[list(REGRESSORS)])).fit()
    np.testing.assert_allclose(between.params.to_numpy(), ols.params.to_numpy(), rtol=TOL)
    np.testing.assert_allclose(
        between.inference["classical"].std_errors.to_numpy(), ols.bse.to_numpy(), rtol=TOL
    )


# ------------------------------------------------- time-invariant regressor z


def _not_identified(findings: list[Finding], estimator: str) -> set[str]:
    return {
        f.where["column"]
        for f in findings
        if f.code == "regressor_not_identified" and f.where["estimator"] == estimator
    }


def test_time_invariant_regressor_left_out_of_within_estimators(fitted: Fitted) -> None:
    for key in ("fixed_effects", "first_difference"):
        model = fitted.models[key]
        assert "z" not in model.params.index
        assert "z" in model.omitted
        assert _not_identified(fitted.findings, key) == {"z"}
    for key in ("pooled_ols", "random_effects", "between"):
        model = fitted.models[key]
        assert "z" in model.terms
        assert "z" in model.params.index
        assert np.isfinite(model.inference["classical"].std_errors["z"])
        assert not _not_identified(fitted.findings, key)
    assert INTERCEPT in fitted.models["random_effects"].params.index


# ------------------------------------------------------------------------ Hausman


def _hausman_parts(fe: ModelResult, re: ModelResult) -> tuple[np.ndarray, np.ndarray]:
    """The slope difference d and covariance difference V_FE - V_RE (classical)."""
    d = (fe.params[SLOPES] - re.params[SLOPES]).to_numpy()
    v = (
        fe.inference["classical"].cov.loc[SLOPES, SLOPES].to_numpy()
        - re.inference["classical"].cov.loc[SLOPES, SLOPES].to_numpy()
    )
    return d, v


@pytest.mark.parametrize("period_effects", [False, True], ids=["one-way", "two-way"])
def test_hausman_matches_hand_computation(raw: pd.DataFrame, period_effects: bool) -> None:
    # Without z the covariance difference is positive definite on this sample, so
    # H = d'(V_FE - V_RE)^-1 d ~ chi2(2) (Hausman 1978), computed here with numpy.
    settings = _settings(
        period_effects, regressors=tuple(SLOPES), estimators=("fixed_effects", "random_effects")
    )
    design, _ = make_design(validate_panel(raw, settings).panel, settings)
    models, _ = estimate_all(design)
    fe, re = models["fixed_effects"], models["random_effects"]
    d, v = _hausman_parts(fe, re)
    assert np.linalg.eigvalsh(v).min() > 0
    statistic = float(d @ np.linalg.inv(v) @ d)
    test = hausman(fe, re)
    assert test.valid, test.invalid_reason
    assert not test.note
    assert test.statistic == pytest.approx(statistic, rel=1e-8)
    assert test.df == len(SLOPES)
    assert test.p_value == pytest.approx(stats.chi2.sf(statistic, len(SLOPES)), rel=1e-8)
    # x1 is built to be correlated with the unit effect, so the test should reject.
    assert test.p_value < 0.01


def test_hausman_with_indefinite_covariance_difference_is_consistent(fitted: Fitted) -> None:
    # With z in the model (kept by random effects, absorbed by fixed effects) the
    # covariance difference of x1, x2 has one negative eigenvalue on this sample.
    fe, re = fitted.models["fixed_effects"], fitted.models["random_effects"]
    d, v = _hausman_parts(fe, re)
    eig, vectors = np.linalg.eigh(v)
    assert (eig < 0).sum() == 1 and (eig > 0).sum() == 1
    test = hausman(fe, re)
    assert test.valid, test.invalid_reason
    # The note says in words that some directions were left out (generalised inverse).
    assert "left out (a generalised inverse)" in test.note
    # Either consistent reading of "generalised inverse, df = rank" (Hausman 1978;
    # the choice between them is common practice, no source) is accepted:
    # (a) the positive part of V: sum over positive eigenvalues of (q'd)^2/lambda,
    #     df = their number; (b) the Moore-Penrose inverse of V, df = rank(V).
    positive = eig > 0
    part_a = (float(np.sum((vectors[:, positive].T @ d) ** 2 / eig[positive])), int(positive.sum()))
    part_b = (
        float(d @ np.linalg.pinv(v, hermitian=True) @ d),
        int(np.linalg.matrix_rank(v, hermitian=True)),
    )
    assert any(
        test.statistic == pytest.approx(stat, rel=1e-8) and test.df == df
        for stat, df in (part_a, part_b)
    )
    assert test.p_value == pytest.approx(stats.chi2.sf(test.statistic, test.df), rel=1e-8)


# ------------------------------------------- what the estimators say they left out


def _workers(seed: int = 7, *, experience: bool) -> pd.DataFrame:
    """Invented workers over six years; ``exper`` rises by one a year for everyone."""
    rng = np.random.default_rng(seed)
    units, years = 40, range(2015, 2021)
    rows = []
    for w in range(units):
        start, effect = rng.integers(0, 20), rng.normal()
        for t in years:
            x1, x2, x3 = rng.normal(size=3)
            exper = float(start + t - 2015)
            rows.append((f"w{w:02d}", t, x1, x2, x3, x2 - 2 * x3, exper, effect))
    frame = pd.DataFrame(rows, columns=["unit", "period", "x1", "x2", "x3", "x4", "exper", "a"])
    frame["x1"] += frame.groupby("unit")["a"].transform("mean")
    noise = rng.normal(size=len(frame))
    frame["y"] = 0.5 * frame["x1"] + (0.03 * frame["exper"] if experience else 0) + frame["a"]
    frame["y"] += noise
    return frame.drop(columns="a")


def test_a_unit_level_plus_period_trend_is_named_as_such() -> None:
    from panelpipe.estimate import identifiable

    design, _ = make_design(_workers(experience=True), panel_settings(regressors=("x1", "exper")))
    kept, omitted = identifiable(design, "fixed_effects")
    assert kept == ["x1"]
    assert "unit and period effects together" in omitted["exper"]
    assert "only over periods" not in omitted["exper"]


def test_a_collinear_regressor_names_a_minimal_set() -> None:
    from panelpipe.estimate import identifiable

    settings = panel_settings(regressors=("x1", "x2", "x3", "x4"))
    design, _ = make_design(_workers(experience=False), settings)
    for key in ("pooled_ols", "fixed_effects"):
        kept, omitted = identifiable(design, key)
        assert kept == ["x1", "x2", "x3"]
        # x4 = x2 - 2 x3 by construction: x1 plays no part in it.
        assert omitted == {"x4": "is a linear combination of 'x2', 'x3' in this estimator"}


def _gls_slopes(frame: pd.DataFrame, columns: list[str], model: ModelResult) -> pd.Series:
    """statsmodels GLS with the random-effects covariance of the model's components."""
    frame = frame.sort_values(["unit", "period"])
    x = frame[[c for c in columns if not c.startswith("mean_")]].copy()
    for c in [c for c in columns if c.startswith("mean_")]:
        x[c] = frame.groupby("unit")[c.removeprefix("mean_")].transform("mean")
    x = pd.concat(
        [x, pd.get_dummies(frame["period"], prefix="p", drop_first=True, dtype=float)], axis=1
    )
    x.insert(0, "const", 1.0)
    s_u, s_e = model.statistics["sigma2_unit"], model.statistics["sigma2_idiosyncratic"]
    sizes = frame.groupby("unit", sort=False).size().to_numpy()
    sigma = block_diag(*(s_e * np.eye(t) + s_u * np.ones((t, t)) for t in sizes))
    fit = sm.GLS(frame["y"].to_numpy(), x.to_numpy(dtype=float), sigma=sigma).fit()
    return pd.Series(fit.params, index=x.columns)


@pytest.mark.parametrize("experience", [True, False], ids=["redundant-mean", "nothing-redundant"])
def test_correlated_random_effects_drops_only_a_redundant_unit_mean(experience: bool) -> None:
    from panelpipe.estimate import estimate_one

    frame = _workers(experience=experience)
    regressors = ("x1", "exper") if experience else ("x1", "x2")
    design, _ = make_design(frame, panel_settings(regressors=regressors))
    model, findings = estimate_one(design, "correlated_random_effects", ("classical",))
    assert model is not None, [f.message for f in findings]
    assert not any("_unit_mean" in f.message or "column 0" in f.message for f in findings)
    means = [f"mean_{r}" for r in regressors if not (experience and r == "exper")]
    # Reference: statsmodels GLS on the same design without the redundant mean, with
    # the random-effects covariance built from the model's variance components.
    reference = _gls_slopes(frame, [*regressors, *means], model)
    for r in regressors:
        assert model.params[r] == pytest.approx(reference[r], rel=1e-7, abs=1e-9)
    redundant = [f for f in findings if f.code == "unit_mean_left_out"]
    if experience:
        (note,) = redundant
        assert "its unit mean is left out" in note.message and "'exper'" in note.message
        assert not any(t.startswith("_unit_mean_exper") for t in model.params.index)
    else:
        assert not redundant


def test_fit_failures_are_told_without_internal_column_names() -> None:
    from panelpipe.estimate import _in_words

    told = _in_words("collinear regressors: _intercept, _period_2016, _unit_mean_exper, x1")
    assert told == (
        "collinear regressors: the constant, the effect of period 2016, "
        "the unit mean of 'exper', x1"
    )


def test_an_audit_fit_failure_names_no_column_number() -> None:
    from panelpipe.diagnose import _cluster_fit

    rng = np.random.default_rng(3)
    x = rng.normal(size=(50, 2))
    with pytest.raises(np.linalg.LinAlgError) as caught:
        _cluster_fit(rng.normal(size=50), np.column_stack([x, x.sum(axis=1)]), np.arange(50) % 5)
    assert "column" not in str(caught.value)
    assert "combinations of the others" in str(caught.value)
