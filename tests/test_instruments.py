"""Instruments within panels (panelpipe.instruments) against outside references.

References, named beside each check:
- linearmodels 7.x ``IV2SLS`` and ``IVGMM`` (a general-purpose library the project
  depends on) fitted on data transformed here with pandas (group means, shifts by
  calendar period, period dummies), independently of the module's own transformation;
  small-sample factors: ``debiased=True`` (N/(N-K-extra_df)) with ``extra_df`` the unit
  effects the within transformation removed (not counted when clusters nest the units,
  as the least-squares estimators do), and CR1 G/(G-1)(N-1)/(N-K-extra_df) for clusters;
- linearmodels ``PanelOLS`` with the Bartlett kernel (Driscoll-Kraay) for that covariance;
- statsmodels OLS F tests for the first stage, the control-function test and the
  Anderson-Rubin statistic at the ends of its set;
- Wooldridge, *Introductory Econometrics*, Example 15.10 (job training data shipped by
  linearmodels.datasets.jobtraining); values from memory;
- simulations with known true values (a dynamic panel; a weak instrument).
Data for the equivalence checks: linearmodels.datasets.wage_panel (545 men, 1980-87),
with a few rows dropped to make gaps; the roles of its columns are arbitrary here.
"""

from __future__ import annotations

import json
import warnings
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from linearmodels.iv import IV2SLS, IVGMM
from linearmodels.panel import PanelOLS
from scipy import stats

from panelpipe.findings import PanelpipeError
from panelpipe.instruments import (
    IVData,
    IVResult,
    anderson_hsiao,
    dk_bandwidth,
    first_difference_iv,
    fixed_effects_iv,
    lagged_outcome_finding,
    nickell_bias,
    pooled_iv,
)

EXOG, ENDOG, INSTR = ["married"], ["hours"], ["expersq", "union"]
ESTIMATORS = {
    "pooled_iv": pooled_iv,
    "fixed_effects_iv": fixed_effects_iv,
    "first_difference_iv": first_difference_iv,
}


def _wages(n_units: int = 200) -> pd.DataFrame:
    from linearmodels.datasets import wage_panel

    d = wage_panel.load().sort_values(["nr", "year"]).reset_index(drop=True)
    d = d[d["nr"].isin(d["nr"].unique()[:n_units])]
    d = d.drop(index=d.index[5::41]).reset_index(drop=True)  # gaps inside some units
    d["hours"] = d["hours"] / 1000.0
    d["expersq"] = d["expersq"] / 10.0
    d["region"] = d["nr"].rank(method="dense").astype(int) % 12  # nests the units
    return d


def _data(
    d: pd.DataFrame,
    clusters: list[str] | None,
    period_effects: bool,
    exog: list[str] = EXOG,
    endog: list[str] = ENDOG,
    instr: list[str] = INSTR,
) -> IVData:
    codes = None
    if clusters:
        codes = np.column_stack([pd.factorize(d[c])[0] for c in clusters])
    return IVData(
        d["lwage"].to_numpy(float),
        d[exog].to_numpy(float).reshape(len(d), -1),
        d[endog].to_numpy(float).reshape(len(d), -1),
        d[instr].to_numpy(float).reshape(len(d), -1),
        pd.factorize(d["nr"])[0],
        d["year"].to_numpy(),
        tuple(exog),
        tuple(endog),
        tuple(instr),
        clusters=codes,
        period_effects=period_effects,
        outcome_name="lwage",
    )


def _reference_frame(
    d: pd.DataFrame, estimator: str, period_effects: bool, cols: list[str] | None = None
) -> pd.DataFrame:
    """The transformed rows, built with pandas: columns y, exog, endog, instruments."""
    cols = cols or ["lwage", *EXOG, *ENDOG, *INSTR]
    dummies = pd.get_dummies(d["year"], prefix="p", dtype=float)
    if estimator == "pooled_iv":
        out = d[cols].astype(float)
        out = pd.concat([out, dummies if period_effects else dummies.iloc[:, :0]], axis=1)
        out["const"] = 1.0
        if period_effects:
            out = out.drop(columns=[dummies.columns[0]])
        return out.assign(_row=np.arange(len(d)))
    if estimator == "fixed_effects_iv":
        both = pd.concat(
            [d[cols].astype(float), dummies.iloc[:, 1:] if period_effects else dummies.iloc[:, :0]],
            axis=1,
        )
        out = both - both.groupby(d["nr"].to_numpy()).transform("mean")
        return out.assign(_row=np.arange(len(d)))
    # first differences over consecutive years of the same unit
    g = d.groupby("nr")
    ok = (g["year"].diff() == 1).to_numpy()
    diff = d[cols].astype(float) - g[cols].shift(1).astype(float)
    out = diff[ok]
    if period_effects:
        out = pd.concat([out, dummies[ok]], axis=1)
        out = out.loc[:, (out != 0).any()]
    return out.assign(_row=np.flatnonzero(ok))


def _reference_fit(
    frame: pd.DataFrame, endog: list[str] = ENDOG, instr: list[str] = INSTR, **kw: Any
) -> Any:
    exog = frame.drop(columns=["lwage", *endog, *instr, "_row"])
    model = IV2SLS(frame["lwage"], exog, frame[endog], frame[instr])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return model.fit(debiased=True, **kw)


CASES = [
    pytest.param(["nr"], True, id="by-unit-two-way"),
    pytest.param(["region"], False, id="by-region-one-way"),
    pytest.param(["occupation"], True, id="not-nested"),
    pytest.param(["nr", "year"], True, id="unit-and-year"),
]


@pytest.mark.parametrize("estimator", list(ESTIMATORS))
@pytest.mark.parametrize(("clusters", "period_effects"), CASES)
def test_two_stage_equals_iv2sls_on_transformed_data(
    estimator: str, clusters: list[str], period_effects: bool
) -> None:
    """Reference: linearmodels IV2SLS on the same rows transformed with pandas."""
    d = _wages()
    ours = ESTIMATORS[estimator](_data(d, clusters, period_effects))
    frame = _reference_frame(d, estimator, period_effects)
    assert ours.nobs == len(frame)
    units = d["nr"].nunique()
    nested = all(d.groupby("nr")[c].nunique().max() == 1 for c in clusters)
    effects = units if estimator == "fixed_effects_iv" else 0
    for kind, kw in [
        ("classical", {"cov_type": "unadjusted", "extra_df": effects}),
        ("robust", {"cov_type": "robust", "extra_df": effects}),
        (
            "cluster",
            {
                "cov_type": "clustered",
                "extra_df": 0 if nested else effects,
                "clusters": d[clusters]
                .iloc[frame["_row"]]
                .reset_index(drop=True)
                .set_axis(frame.index),
            },
        ),
    ]:
        cross = estimator == "first_difference_iv" and clusters in (["occupation"], ["nr", "year"])
        if kind == "cluster" and cross:
            # a difference joins two rows of different clusters: left out, with a note
            assert "cluster" not in ours.covariances
            assert any("two clusters" in n for n in ours.notes)
            continue
        ref = _reference_fit(frame, **kw)
        names = list(ours.names)
        np.testing.assert_allclose(ours.params, ref.params[names], rtol=1e-9, atol=1e-12)
        cov = ref.cov.loc[names, names].to_numpy()
        np.testing.assert_allclose(ours.covariances[kind], cov, rtol=1e-8, atol=1e-14)
    if estimator != "fixed_effects_iv":  # linearmodels: t df N - K without extra_df; ours N-K-G
        # t(N - K) p-values and intervals as linearmodels' debiased results give them
        ref = _reference_fit(frame, cov_type="unadjusted")
        table = pd.DataFrame(ours.rows()).query("inference == 'classical'").set_index("term")
        np.testing.assert_allclose(table["p_value"], ref.pvalues[list(ours.names)], rtol=1e-7)
        ci = ref.conf_int().loc[list(ours.names)]
        np.testing.assert_allclose(table["ci_low"], ci["lower"], rtol=1e-9)
    out = json.loads(json.dumps(ours.to_dict(), allow_nan=False))  # results.json shape
    assert set(out["std_errors"]) == set(ours.covariances)
    assert list(out["first_stage"]) == ENDOG
    assert {"method", "ci_low", "ci_high"} <= set(out["weak_iv_robust"])


@pytest.mark.parametrize("estimator", list(ESTIMATORS))
def test_weighted_two_stage_equals_weighted_iv2sls(estimator: str) -> None:
    """Reference: linearmodels IV2SLS with ``weights`` on rows transformed with pandas
    (weighted unit means for the within transformation; period dummies; for differences
    the weight 1/(1/w(t) + 1/w(t-1)), linearmodels FirstDifferenceOLS's convention).
    The weights are arbitrary positive numbers made from the data's columns."""
    d = _wages()
    w = 1.0 + (d["year"] - 1980) / 10.0 * (d["nr"] % 3) + d["married"] / 2
    data = _data(d, ["nr"], True)
    ours = ESTIMATORS[estimator](IVData(**{**data.__dict__, "weights": w.to_numpy()}))
    cols = ["lwage", *EXOG, *ENDOG, *INSTR]
    dummies = pd.get_dummies(d["year"], prefix="p", dtype=float)
    if estimator == "pooled_iv":
        frame = _reference_frame(d, estimator, True)
        weights = w
    elif estimator == "fixed_effects_iv":
        both = pd.concat([d[cols].astype(float), dummies.iloc[:, 1:]], axis=1)
        unit = d["nr"].to_numpy()
        means = (
            both.mul(w, axis=0)
            .groupby(unit)
            .transform("sum")
            .div(w.groupby(unit).transform("sum"), axis=0)
        )
        frame = (both - means).assign(_row=np.arange(len(d)))
        weights = w
    else:
        frame = _reference_frame(d, estimator, True)
        rows = frame["_row"].to_numpy()
        weights = pd.Series(1 / (1 / w.to_numpy()[rows] + 1 / w.to_numpy()[rows - 1]), frame.index)
    exog = frame.drop(columns=["lwage", *ENDOG, *INSTR, "_row"])
    model = IV2SLS(frame["lwage"], exog, frame[ENDOG], frame[INSTR], weights=weights)
    groups = pd.Series(d["nr"].to_numpy()[frame["_row"].to_numpy()], index=frame.index)
    effects = d["nr"].nunique() if estimator == "fixed_effects_iv" else 0
    names = list(ours.names)
    for kind, kw in [
        ("classical", {"cov_type": "unadjusted", "extra_df": effects}),
        ("robust", {"cov_type": "robust", "extra_df": effects}),
        ("cluster", {"cov_type": "clustered", "clusters": groups}),
    ]:
        ref = model.fit(debiased=True, **kw)
        np.testing.assert_allclose(ours.params, ref.params[names], rtol=1e-9)
        np.testing.assert_allclose(ours.covariances[kind], ref.cov.loc[names, names], rtol=1e-8)


@pytest.mark.parametrize("estimator", list(ESTIMATORS))
def test_two_endogenous_terms_equal_iv2sls(estimator: str) -> None:
    """Reference: linearmodels IV2SLS, two endogenous terms and three instruments,
    clustered by unit (nested: unit effects not counted), period effects."""
    d = _wages()
    endog, instr = ["hours", "union"], ["expersq", "married", "occupation"]
    ours = ESTIMATORS[estimator](_data(d, ["nr"], True, exog=[], endog=endog, instr=instr))
    frame = _reference_frame(d, estimator, True, ["lwage", *endog, *instr])
    groups = pd.Series(d["nr"].to_numpy()[frame["_row"].to_numpy()], index=frame.index)
    ref = _reference_fit(frame, endog, instr, cov_type="clustered", clusters=groups)
    names = list(ours.names)
    assert names == endog
    np.testing.assert_allclose(ours.params, ref.params[names], rtol=1e-9)
    np.testing.assert_allclose(ours.covariances["cluster"], ref.cov.loc[names, names], rtol=1e-8)
    assert set(ours.first_stage) == set(endog)
    assert ours.effective_f is None  # defined for one endogenous term only
    assert ours.weak_iv_robust["shape"] == "not_computed"
    assert ours.overidentification is not None and ours.overidentification["df"] == 1


@pytest.mark.parametrize("estimator", list(ESTIMATORS))
def test_driscoll_kraay_equals_panel_kernel_on_second_stage(estimator: str) -> None:
    """Reference: linearmodels PanelOLS, Bartlett kernel (Driscoll-Kraay), our bandwidth.

    Two-stage least squares solves X^'(y - X b) = 0, so the outcome e + X^ b (e the
    structural residuals) regressed on the fitted regressors X^ gives b with residuals
    e exactly: the kernel covariance of that regression is the two-stage one. The
    reference's factor N/(N-K) is moved to N/(N-K-extra) by hand (unit effects counted).
    """
    d = _wages()
    ours = ESTIMATORS[estimator](_data(d, None, True))
    frame = _reference_frame(d, estimator, True)
    exog = frame.drop(columns=["lwage", *ENDOG, *INSTR, "_row"])
    z = pd.concat([exog, frame[INSTR]], axis=1).to_numpy()
    x = pd.concat([exog, frame[ENDOG]], axis=1).to_numpy()
    xhat = z @ np.linalg.lstsq(z, x, rcond=None)[0]
    b = np.linalg.lstsq(xhat, frame["lwage"].to_numpy(), rcond=None)[0]
    e = frame["lwage"].to_numpy() - x @ b
    rows = frame["_row"].to_numpy()
    index = pd.MultiIndex.from_arrays([d["nr"].to_numpy()[rows], d["year"].to_numpy()[rows]])
    names = list(exog.columns) + ENDOG
    ystar = pd.Series(e + xhat @ b, index=index)
    ref = PanelOLS(ystar, pd.DataFrame(xhat, index=index, columns=names)).fit(
        cov_type="kernel", kernel="bartlett", bandwidth=dk_bandwidth(8), debiased=True
    )
    n, k = xhat.shape
    extra = d["nr"].nunique() if estimator == "fixed_effects_iv" else 0
    ref_cov = ref.cov.loc[list(ours.names), list(ours.names)] * (n - k) / (n - k - extra)
    np.testing.assert_allclose(ours.covariances["driscoll_kraay"], ref_cov, rtol=1e-8)


def test_anderson_hsiao_equals_iv2sls_on_lagged_differences() -> None:
    """Reference: IV2SLS of the change on the lagged change, y(t-2) as instrument.

    Lags by calendar year built with pandas (a row needs years t, t-1 and t-2); period
    dummies for the period effects; clusters by unit (they nest the units).
    """
    d = _wages()
    ours = anderson_hsiao(_data(d, ["nr"], True, endog=[], instr=[]), lag_name="lwage_lag")
    g = d.groupby("nr")
    lag1, lag2 = g["lwage"].shift(1), g["lwage"].shift(2)
    ok = ((g["year"].diff() == 1) & (g["year"].diff(2) == 2)).to_numpy()
    frame = pd.DataFrame(
        {
            "dy": d["lwage"] - lag1,
            "lwage_lag": lag1 - lag2,
            "married": g["married"].diff(),
            "lag2": lag2,
        }
    )[ok]
    dummies = pd.get_dummies(d["year"], dtype=float)[ok]
    dummies = dummies.loc[:, dummies.any()]
    exog = pd.concat([frame[["married"]], dummies], axis=1)
    model = IV2SLS(frame["dy"], exog, frame[["lwage_lag"]], frame[["lag2"]])
    for kind, kw in [
        ("classical", {"cov_type": "unadjusted"}),
        ("cluster", {"cov_type": "clustered", "clusters": d["nr"][ok]}),
    ]:
        ref = model.fit(debiased=True, **kw)
        names = list(ours.names)
        assert names == ["married", "lwage_lag"]
        np.testing.assert_allclose(ours.params, ref.params[names], rtol=1e-9)
        np.testing.assert_allclose(ours.covariances[kind], ref.cov.loc[names, names], rtol=1e-8)
    assert ours.nobs == int(ok.sum())


@pytest.mark.parametrize("kind", ["classical", "robust", "cluster"])
def test_first_stage_f_equals_statsmodels_f_test(kind: str) -> None:
    """Reference: statsmodels OLS of the endogenous term on a constant, the exogenous
    regressor and the instruments; ``f_test`` of the instruments' coefficients with the
    same covariance (statsmodels' cluster factor G/(G-1)(N-1)/(N-K) equals ours here).
    """
    d = _wages()
    ours = pooled_iv(_data(d, ["region"], False), headline=kind)
    x = sm.add_constant(d[EXOG + INSTR].astype(float))
    fit_kw: dict[str, Any] = {
        "cov_type": {"classical": "nonrobust", "robust": "HC1", "cluster": "cluster"}[kind]
    }
    if kind == "cluster":
        fit_kw["cov_kwds"] = {"groups": d["region"].to_numpy()}
    ref = sm.OLS(d["hours"].astype(float), x).fit(**fit_kw)
    test = ref.f_test(" = 0, ".join(INSTR) + " = 0")
    fs = ours.first_stage["hours"]
    assert fs["f_statistic"] == pytest.approx(float(test.fvalue), rel=1e-9)
    assert fs["df"][0] == 2
    df2 = 11 if kind == "cluster" else len(d) - 4  # G - 1, or N - K
    assert fs["df"][1] == df2
    assert fs["p_value"] == pytest.approx(stats.f.sf(fs["f_statistic"], 2, df2), rel=1e-9)
    # one instrument: the effective F of Montiel Olea & Pflueger equals the first-stage F
    one = pooled_iv(_data(d, ["region"], False, instr=["expersq"]), headline=kind)
    assert one.effective_f is not None
    assert one.effective_f["statistic"] == pytest.approx(
        one.first_stage["hours"]["f_statistic"], rel=1e-9
    )


def test_effective_f_equals_first_stage_f_under_classical_errors() -> None:
    """Montiel Olea & Pflueger (2013): under homoskedasticity F_eff is the ordinary F."""
    ours = fixed_effects_iv(_data(_wages(), None, True), headline="classical")
    assert ours.effective_f is not None
    assert ours.effective_f["statistic"] == pytest.approx(
        ours.first_stage["hours"]["f_statistic"], rel=1e-9
    )


@pytest.mark.parametrize("estimator", list(ESTIMATORS))
def test_overidentification_equals_linearmodels(estimator: str) -> None:
    """Reference: IV2SLS ``sargan`` (classical) and two-step IVGMM ``j_stat`` (robust,
    clustered weights) on the same transformed rows; one cluster column."""
    d = _wages()
    frame = _reference_frame(d, estimator, True)
    exog = frame.drop(columns=["lwage", *ENDOG, *INSTR, "_row"])
    classical = ESTIMATORS[estimator](_data(d, None, True), headline="classical")
    ref = _reference_fit(frame, cov_type="unadjusted")
    assert classical.overidentification is not None
    assert classical.overidentification["method"] == "Sargan"
    assert classical.overidentification["statistic"] == pytest.approx(
        float(ref.sargan.stat), rel=1e-8
    )
    groups = d["region"].to_numpy()[frame["_row"].to_numpy()]
    for kind, kw in [
        ("robust", {"weight_type": "robust"}),
        ("cluster", {"weight_type": "clustered", "clusters": groups}),
    ]:
        ours = ESTIMATORS[estimator](_data(d, ["region"], True), headline=kind)
        gmm = IVGMM(frame["lwage"], exog, frame[ENDOG], frame[INSTR], **kw).fit(iter_limit=2)
        assert ours.overidentification is not None
        assert ours.overidentification["statistic"] == pytest.approx(
            float(gmm.j_stat.stat), rel=1e-6
        )
        assert ours.overidentification["df"] == 1


def test_control_function_test_equals_references() -> None:
    """References: linearmodels' Wu-Hausman F (classical), and a statsmodels OLS with the
    first-stage residual added and a clustered f_test (cluster-robust version)."""
    d = _wages()
    classical = pooled_iv(_data(d, None, False), headline="classical")
    frame = _reference_frame(d, "pooled_iv", False)
    ref = _reference_fit(frame, cov_type="unadjusted")
    wu = ref.wu_hausman()
    assert classical.endogeneity["statistic"] == pytest.approx(float(wu.stat), rel=1e-8)
    assert classical.endogeneity["compared_with"] == "pooled_ols"
    clustered = pooled_iv(_data(d, ["region"], False), headline="cluster")
    z = sm.add_constant(d[EXOG + INSTR].astype(float))
    v = sm.OLS(d["hours"], z).fit().resid
    x = sm.add_constant(d[EXOG + ENDOG].astype(float)).assign(v=v)
    cf = sm.OLS(d["lwage"], x).fit(cov_type="cluster", cov_kwds={"groups": d["region"]})
    assert clustered.endogeneity["statistic"] == pytest.approx(
        float(cf.f_test("v = 0").fvalue), rel=1e-8
    )


def test_wooldridge_example_15_10_job_training() -> None:
    """Wooldridge, Introductory Econometrics, Example 15.10 (values from memory).

    First differences 1987-88 of log scrap rates on hours of training per employee,
    instrumented by the change in the grant indicator, with an intercept (the period
    effect of 1988): hours about -0.014 (se about 0.008), 45 firms. Data:
    linearmodels.datasets.jobtraining.
    """
    from linearmodels.datasets import jobtraining

    d = jobtraining.load()
    d = d[d["year"].isin([1987, 1988])].dropna(subset=["lscrap", "hrsemp"])
    d = d[d.groupby("fcode")["year"].transform("size") == 2].sort_values(["fcode", "year"])
    data = IVData(
        d["lscrap"].to_numpy(float),
        np.empty((len(d), 0)),
        d[["hrsemp"]].to_numpy(float),
        d[["grant"]].to_numpy(float),
        pd.factorize(d["fcode"])[0],
        d["year"].to_numpy(),
        (),
        ("hrsemp",),
        ("grant",),
        period_effects=True,
        outcome_name="lscrap",
    )
    ours = first_difference_iv(data, headline="classical")
    assert ours.nobs == 45
    assert ours.params[0] == pytest.approx(-0.014, abs=0.0015)
    se = ours.std_errors("classical")["hrsemp"]
    assert se == pytest.approx(0.008, abs=0.0015)


def _dynamic_panel(rng: np.random.Generator, n: int, t: int, rho: float) -> IVData:
    """y(it) = rho y(i,t-1) + a(i) + e(it), started from the stationary distribution."""
    a = rng.normal(size=n)
    y = np.empty((n, t))
    y[:, 0] = a / (1 - rho) + rng.normal(size=n) / np.sqrt(1 - rho**2)
    for s in range(1, t):
        y[:, s] = rho * y[:, s - 1] + a + rng.normal(size=n)
    unit = np.repeat(np.arange(n), t)
    return IVData(
        y.ravel(),
        np.empty((n * t, 0)),
        np.empty((n * t, 0)),
        np.empty((n * t, 0)),
        unit,
        np.tile(np.arange(t), n),
        (),
        (),
        (),
        period_effects=False,
    )


def test_anderson_hsiao_recovers_rho_where_fixed_effects_has_nickell_bias() -> None:
    """Simulation with known rho = 0.5, T = 6 periods, 500 units, 40 replications.

    Fixed effects of y on its lag (5 periods in the within regression) is biased by
    about Nickell's amount; Anderson-Hsiao's mean is near the truth.
    """
    rng = np.random.default_rng(18)
    rho, n, t = 0.5, 500, 6
    fe, ah = [], []
    for _ in range(40):
        data = _dynamic_panel(rng, n, t, rho)
        y = data.y.reshape(n, t)
        # fixed effects by hand with the within transformation (numpy least squares)
        yw = (y[:, 1:] - y[:, 1:].mean(axis=1, keepdims=True)).ravel()
        xw = (y[:, :-1] - y[:, :-1].mean(axis=1, keepdims=True)).ravel()
        fe.append(float(xw @ yw / (xw @ xw)))
        ah.append(float(anderson_hsiao(data, ["classical"]).params[0]))
    bias = nickell_bias(rho, t - 1)
    assert bias == pytest.approx(-(1 + rho) / (t - 2), rel=0.5)  # rough size, common practice
    assert np.mean(fe) - rho == pytest.approx(bias, abs=0.02)
    assert np.mean(fe) - rho < -0.2
    assert abs(np.mean(ah) - rho) < 0.05


def _weak_iv_draw(rng: np.random.Generator, n: int, beta: float) -> IVData:
    """One weak instrument (first-stage F about 3), strongly endogenous regressor."""
    z = rng.normal(size=(n, 1))
    v = rng.normal(size=n)
    u = 0.9 * v + np.sqrt(1 - 0.81) * rng.normal(size=n)
    w = 0.12 * z[:, 0] + v
    y = beta * w + u
    groups = np.repeat(np.arange(n // 4), 4)
    return IVData(
        y,
        np.empty((n, 0)),
        w[:, None],
        z,
        groups,
        np.tile(np.arange(4), n // 4),
        (),
        ("w",),
        ("z",),
        clusters=groups,
    )


def test_anderson_rubin_set_covers_at_nominal_rate_with_weak_instrument() -> None:
    """Monte Carlo, 200 replications, known beta = 1: the cluster-robust AR set covers
    near 95% while the Wald interval under-covers (common practice, no single source)."""
    rng = np.random.default_rng(2013)
    beta, reps = 1.0, 200
    ar_cover = wald_cover = 0
    shapes: dict[str, int] = {}
    for _ in range(reps):
        res = pooled_iv(_weak_iv_draw(rng, 200, beta), ["cluster"])
        shapes[res.weak_iv_robust["shape"]] = shapes.get(res.weak_iv_robust["shape"], 0) + 1
        ar_cover += _covers(res, beta)
        # Dufour (1997), from memory: the AR set is unbounded exactly when the first-stage
        # test does not reject (as b grows the AR statistic tends to the first-stage F)
        fs = res.first_stage["w"]
        unbounded = res.weak_iv_robust["shape"] in {"two_rays", "whole_line"}
        assert unbounded == (fs["p_value"] > 0.05)
        se = res.std_errors("cluster")["w"]
        crit = stats.t.ppf(0.975, 49)
        wald_cover += abs(res.params[0] - beta) <= crit * se
    assert 0.91 <= ar_cover / reps <= 0.99
    assert wald_cover / reps < ar_cover / reps - 0.04
    assert len(shapes) >= 2  # bounded and unbounded sets both occur when instruments are weak


def _covers(res: IVResult, value: float) -> bool:
    return any(
        (lo is None or lo <= value) and (hi is None or value <= hi)
        for lo, hi in res.weak_iv_robust["pieces"]
    )


@pytest.mark.parametrize(
    ("instrument", "kind", "shape"),
    [
        ("union", "cluster", "two_rays"),
        ("expersq", "cluster", "interval"),
        ("union", "classical", "interval"),
    ],
)
def test_anderson_rubin_ends_reject_at_exactly_five_percent(
    instrument: str, kind: str, shape: str
) -> None:
    """Reference: statsmodels OLS of lwage - b hours on a constant, married and the
    instrument, f_test of the instrument (clustered by region, or classical): at each
    finite end of the set the p-value with F(1, G-1) or F(1, N-K) is 0.05. The shapes
    were seen on this data (the union instrument is weak under clustering: F about 4)."""
    d = _wages()
    res = pooled_iv(_data(d, ["region"], False, instr=[instrument]), headline=kind)
    assert res.weak_iv_robust["shape"] == shape
    assert _covers(res, float(res.params[-1]))  # just identified: AR is 0 at the estimate
    x = sm.add_constant(d[[*EXOG, instrument]].astype(float))
    ends = [e for piece in res.weak_iv_robust["pieces"] for e in piece if e is not None]
    assert len(ends) == 2
    df2 = 11 if kind == "cluster" else len(d) - 3
    for b in ends:
        fit_kw: dict[str, Any] = {"cov_type": "nonrobust"}
        if kind == "cluster":
            fit_kw = {"cov_type": "cluster", "cov_kwds": {"groups": d["region"]}}
        fit = sm.OLS(d["lwage"] - b * d["hours"], x).fit(**fit_kw)
        f = float(fit.f_test(f"{instrument} = 0").fvalue)
        assert stats.f.sf(f, 1, df2) == pytest.approx(0.05, abs=1e-7)


def test_nickell_bias_small_cases() -> None:
    """Nickell's formula as remembered: at rho = 0 it gives exactly -1/T (T periods in the
    within regression); for large T about -(1 + rho)/(T - 1) (common practice, no source).
    The simulation above checks it against fixed-effects fits."""
    assert nickell_bias(0.0, 5) == pytest.approx(-1 / 5, rel=1e-12)
    assert nickell_bias(0.5, 50) == pytest.approx(-1.5 / 49, rel=0.05)
    finding = lagged_outcome_finding("lag_lwage", 0.5, 5)
    assert finding.code == "lagged_outcome_bias"
    assert finding.where["approximate_bias"] == pytest.approx(nickell_bias(0.5, 5))
    assert "anderson_hsiao" in finding.message


def test_measurement_error_biases_fixed_effects_and_not_its_iv() -> None:
    """Simulation, known beta = 1, 60 replications of 300 units x 5 periods: a regressor
    measured twice with independent errors (noise variance equal to the within variance
    of the true value). Fixed effects on one measure is attenuated toward 1/2 (classical
    errors-in-variables, common practice, no source); the within IV with the other
    measure as instrument is centred on the truth."""
    rng = np.random.default_rng(1981)
    n, t, beta = 300, 5, 1.0
    unit, period = np.repeat(np.arange(n), t), np.tile(np.arange(t), n)
    ls, iv = [], []
    for _ in range(60):
        a = rng.normal(size=n)[unit]
        true = a + rng.normal(size=n * t)
        m1, m2 = true + rng.normal(size=n * t), true + rng.normal(size=n * t)
        y = beta * true + 2 * a + rng.normal(size=n * t)
        data = IVData(
            y, np.empty((n * t, 0)), m1[:, None], m2[:, None], unit, period, (), ("m1",), ("m2",)
        )
        iv.append(float(fixed_effects_iv(data, ["classical"]).params[0]))
        yw = y - np.bincount(unit, y)[unit] / t
        xw = m1 - np.bincount(unit, m1)[unit] / t
        ls.append(float(xw @ yw / (xw @ xw)))
    assert np.mean(ls) == pytest.approx(0.5, abs=0.03)
    assert np.mean(iv) == pytest.approx(beta, abs=0.03)


# ------------------------------------------------------------------ bad input


def test_refusals_name_the_terms() -> None:
    d = _wages(60)
    with pytest.raises(PanelpipeError, match=r"2 endogenous term.*only 1 instrument"):
        pooled_iv(_data(d, None, True, endog=["hours", "union"], instr=["expersq"]))
    with pytest.raises(PanelpipeError, match="married is listed as an instrument"):
        pooled_iv(_data(d, None, True, instr=["married", "expersq"]))
    with pytest.raises(PanelpipeError, match="educ has no variation left after the within"):
        fixed_effects_iv(_data(d, None, True, instr=["educ", "union"]))
    lagged = d.assign(lwage_lag=d.groupby("nr")["lwage"].shift(1).fillna(0.0))
    with pytest.raises(PanelpipeError, match="lwage_lag is the lagged outcome"):
        anderson_hsiao(
            _data(lagged, None, True, exog=["lwage_lag"], endog=[], instr=[]), lag_name="lwage_lag"
        )
    with pytest.raises(PanelpipeError, match="hours is listed as an instrument"):
        first_difference_iv(_data(d, None, True, instr=["hours", "union"]))
    with pytest.raises(PanelpipeError, match=r"collinear with the exogenous.*twice"):
        pooled_iv(_data(d.assign(twice=2 * d["married"]), None, True, instr=["twice", "union"]))
    with pytest.raises(PanelpipeError, match="at least one term under `endogenous`"):
        pooled_iv(_data(d, None, True, endog=[], instr=["union"]))


def test_thin_data_refused_or_left_out_with_a_reason() -> None:
    """Common practice, no source: too few rows, no consecutive periods, one cluster."""
    d = _wages(60)
    with pytest.raises(PanelpipeError, match="usable rows after its transformation"):
        fixed_effects_iv(_data(d.head(4), None, True))
    every_other = d[d["year"] % 2 == 0]
    with pytest.raises(PanelpipeError, match="usable rows"):
        first_difference_iv(_data(every_other, None, True))
    one = d.assign(one=0)
    with pytest.raises(PanelpipeError, match="cluster covariance of pooled_iv cannot be computed"):
        pooled_iv(_data(one, ["one"], True))
    two = d.assign(two=d["nr"].rank(method="dense").astype(int) % 2)
    res = pooled_iv(_data(two, ["two"], True), headline="cluster")
    assert res.overidentification is not None
    assert res.overidentification["statistic"] is None  # 2 clusters, 3 moments: singular
    assert "singular" in res.overidentification["method"]
