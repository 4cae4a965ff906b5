"""Tests of the staggered-adoption audit (panelpipe.timing).

Outside references, named beside each check:

* statsmodels OLS with unit and period dummies: the two-way coefficient, and each
  2x2 comparison of Goodman-Bacon (2021, *J. Econometrics*) refitted on its own
  sub-sample; the decomposition identity of his Theorem 1 against that coefficient.
* pandas group means: each group-time effect of Callaway & Sant'Anna (2021,
  *J. Econometrics*, Theorem 1 without covariates) as a difference of mean changes.
* statsmodels' cluster-robust standard error of the equivalent two-period
  regression, which differs from the influence-function one only by statsmodels'
  small-sample factor G/(G-1)·(N-1)/(N-K) (statsmodels documentation of
  ``cov_type="cluster"``, ``use_correction=True``).
* de Chaisemartin & D'Haultfœuille (2020, *AER*): the weights on treated cells sum
  to one, and their weighted sum of the true cell effects equals the two-way
  estimate's expectation (their Theorem 1), checked here with noiseless data.
* Simulations with known true effects (invented here) for recovery and coverage.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from panelpipe.findings import PanelpipeError
from panelpipe.timing import TimingResult, TimingSkipped, detect, timing_audit

NEVER = 10**6


def simulate(
    seed: int,
    *,
    n_units: int = 120,
    n_periods: int = 8,
    cohorts: tuple[int, ...] = (2, 5),
    shares: tuple[float, ...] = (0.35, 0.35),
    effect: tuple[float, float] = (1.0, 0.0),
    noise: float = 1.0,
    anticipation: float = 0.0,
) -> pd.DataFrame:
    """A balanced staggered panel; the effect at event time e >= 0 is a + b·e.

    ``cohorts`` are adoption indices (0-based period positions); units not in a
    cohort are never treated. ``anticipation`` adds that much to a cohort's outcome
    in the period before adoption (a planted pre-trend). Periods are years from 2001.
    """
    rng = np.random.default_rng(seed)
    adopt = np.full(n_units, NEVER)
    draw = rng.random(n_units)
    low = 0.0
    for a, s in zip(cohorts, shares, strict=True):
        adopt[(draw >= low) & (draw < low + s)] = a
        low += s
    unit = np.repeat(np.arange(n_units), n_periods)
    t = np.tile(np.arange(n_periods), n_units)
    g = adopt[unit]
    d = (t >= g).astype(float)
    tau = np.where(d > 0, effect[0] + effect[1] * (t - g), 0.0)
    y = (
        rng.normal(size=n_units)[unit]
        + rng.normal(scale=0.5, size=n_periods)[t]
        + tau
        + anticipation * (t == g - 1)
        + noise * rng.normal(size=unit.size)
    )
    return pd.DataFrame(
        {"unit": [f"r{i:03d}" for i in unit], "period": 2001 + t, "y": y, "d": d, "g": g}
    )


def audit(df: pd.DataFrame, **kw: Any) -> TimingResult:
    result = timing_audit(df["unit"], df["period"], df["y"], df["d"], **kw)
    assert isinstance(result, TimingResult), getattr(result, "reason", "")
    return result


def two_way_ols(df: pd.DataFrame) -> Any:
    """statsmodels OLS of y on d with unit and period dummies."""
    return smf.ols("y ~ d + C(unit) + C(period)", data=df).fit()


# ---------------------------------------------------------------- decomposition


@pytest.mark.parametrize(
    ("cohorts", "shares"),
    [((2, 5), (0.35, 0.35)), ((1, 3, 6), (0.3, 0.3, 0.4)), ((2, 4, 5), (0.2, 0.3, 0.2))],
    ids=["two-cohorts-never", "three-cohorts-no-never", "three-cohorts-never"],
)
def test_decomposition_adds_up_to_the_statsmodels_two_way_coefficient(
    cohorts: tuple[int, ...], shares: tuple[float, ...]
) -> None:
    """Goodman-Bacon (2021) Theorem 1 against statsmodels OLS with dummies."""
    df = simulate(3, cohorts=cohorts, shares=shares, effect=(1.0, 0.4))
    result = audit(df)
    beta = two_way_ols(df).params["d"]
    weights = np.array([r["weight"] for r in result.decomposition])
    estimates = np.array([r["estimate"] for r in result.decomposition])
    assert result.two_way_estimate == pytest.approx(beta, abs=1e-10)
    assert weights.sum() == pytest.approx(1.0, abs=1e-12)
    assert weights @ estimates == pytest.approx(beta, abs=1e-10)
    assert (weights > 0).all()
    kinds = {r["comparison"] for r in result.decomposition}
    assert kinds == ({"never", "not_yet", "already"} if sum(shares) < 1 else {"not_yet", "already"})


def test_each_2x2_estimate_equals_statsmodels_on_its_sub_sample() -> None:
    """Each comparison refitted with statsmodels OLS (unit and period dummies).

    Sub-samples as defined by Goodman-Bacon (2021), Section 2: treated cohort k with
    the never treated over all periods; earlier k with later l before l adopts;
    later l with earlier k from k's adoption on.
    """
    df = simulate(5, cohorts=(2, 5), shares=(0.35, 0.35), effect=(1.0, 0.5))
    result = audit(df)
    first = {f"{2001 + a}": a for a in (2, 5)}
    t_last = df["period"].max() - 2001
    for row in result.decomposition:
        k = first[row["treated"]]
        if row["comparison"] == "never":
            sub = df[(df["g"] == k) | (df["g"] == NEVER)]
        else:
            other = first[row["comparison_cohort"]]
            early, late = min(k, other), max(k, other)
            t = df["period"] - 2001
            window = (t < late) if row["comparison"] == "not_yet" else (t >= early)
            sub = df[df["g"].isin([k, other]) & window]
        assert t_last > 0
        assert row["estimate"] == pytest.approx(two_way_ols(sub).params["d"], abs=1e-10)


def test_treated_cell_weights_give_the_two_way_coefficient_on_noiseless_data() -> None:
    """de Chaisemartin & D'Haultfœuille (2020) Theorem 1 with no noise.

    With outcome = unit + period effects + cell effects exactly, the two-way
    coefficient (statsmodels) equals the weighted sum of the cell effects.
    """
    df = simulate(7, cohorts=(1, 4), shares=(0.5, 0.5), effect=(0.5, 1.0), noise=0.0)
    result = audit(df)
    beta = two_way_ols(df).params["d"]
    tau = {
        (c["cohort"], c["period"]): 0.5 + 1.0 * (int(c["period"]) - int(c["cohort"]))
        for c in result.treated_cell_weights
    }
    weighted = sum(c["weight"] * tau[c["cohort"], c["period"]] for c in result.treated_cell_weights)
    assert sum(c["weight"] for c in result.treated_cell_weights) == pytest.approx(1.0)
    assert weighted == pytest.approx(beta, abs=1e-9)
    neg = [c["weight"] for c in result.treated_cell_weights if c["weight"] < 0]
    assert neg, "no never-treated units and effects late in the early cohort: some weights < 0"
    assert result.negative_weights["sum"] == pytest.approx(sum(neg))
    assert result.negative_weights["share"] == pytest.approx(
        len(neg) / len(result.treated_cell_weights)
    )


# ---------------------------------------------------------------- group-time effects


@pytest.mark.parametrize("comparison", ["never", "not_yet"])
def test_group_time_effects_are_differences_of_mean_changes(comparison: str) -> None:
    """Callaway & Sant'Anna (2021) Theorem 1, no covariates, computed with pandas."""
    df = simulate(11, cohorts=(2, 5), shares=(0.3, 0.4), effect=(1.0, 0.3))
    result = audit(df, comparison=comparison)
    wide = df.pivot(index="unit", columns="period", values="y")
    g = df.groupby("unit")["g"].first()
    assert len(result.group_time) > 0
    for cell in result.group_time:
        a = int(cell["cohort"]) - 2001
        t = int(cell["period"])
        base = 2001 + a - 1
        change = wide[t] - wide[base]
        never = comparison == "never"
        control = (g == NEVER) if never else (g > max(t, base) - 2001) & (g != a)
        expected = change[g == a].mean() - change[control].mean()
        assert cell["estimate"] == pytest.approx(expected, abs=1e-12)
        assert cell["event_time"] == t - int(cell["cohort"])


def test_group_time_standard_error_matches_statsmodels_cluster_up_to_its_factor() -> None:
    """statsmodels cluster-robust SE of the two-period regression with unit dummies.

    The influence-function variance has no small-sample factor; statsmodels multiplies
    by G/(G-1)·(N-1)/(N-K) (G units, N = 2G rows, K = G + 2 columns). The ratio of
    the two standard errors is the square root of that factor, exactly.
    """
    df = simulate(13, cohorts=(2, 5), shares=(0.3, 0.4), effect=(1.0, 0.3))
    result = audit(df, comparison="never")
    checked = 0
    for cell in result.group_time:
        if cell["cohort"] != "2003" or cell["period"] not in ("2004", "2006"):
            continue
        t, base = int(cell["period"]), 2002
        sub = df[df["period"].isin([base, t]) & df["g"].isin([2, NEVER])].copy()
        sub["treat_post"] = ((sub["g"] == 2) & (sub["period"] == t)).astype(float)
        fit = smf.ols("y ~ treat_post + C(unit) + C(period)", data=sub).fit(
            cov_type="cluster", cov_kwds={"groups": pd.factorize(sub["unit"])[0]}
        )
        n_units, n_rows, k = sub["unit"].nunique(), len(sub), fit.df_model + 1
        factor = n_units / (n_units - 1) * (n_rows - 1) / (n_rows - k)
        assert fit.params["treat_post"] == pytest.approx(cell["estimate"], abs=1e-10)
        assert fit.bse["treat_post"] == pytest.approx(cell["std_error"] * np.sqrt(factor), rel=1e-8)
        checked += 1
    assert checked == 2


# ---------------------------------------------------------------- known truth


def test_two_way_sign_flips_while_the_cohort_estimates_recover_the_truth() -> None:
    """Effects growing with time since adoption, a small never-treated group.

    Goodman-Bacon (2021) Section 3 and de Chaisemartin & D'Haultfœuille (2020)
    Section 2 describe this case: already-treated units with growing effects serve
    as controls and pull the two-way estimate down, here below zero. True effect at
    event time e: 0.2 + 1.0·e.
    """
    df = simulate(
        1, n_units=600, n_periods=10, cohorts=(1, 5), shares=(0.45, 0.45), effect=(0.2, 1.0)
    )
    result = audit(df, comparison="never")
    assert result.two_way_estimate < 0
    truth = {e: 0.2 + 1.0 * e for e in range(10)}
    cells = [c for c in result.group_time if c["event_time"] >= 0]
    sizes = df.groupby("g")["unit"].nunique() / 10
    per_cohort = {
        c: np.mean([truth[x["event_time"]] for x in cells if x["cohort"] == c])
        for c in {x["cohort"] for x in cells}
    }
    w = {c: sizes[int(c) - 2001] for c in per_cohort}
    overall_truth = sum(w[c] * per_cohort[c] for c in w) / sum(w.values())
    ov = result.overall
    assert abs(ov["estimate"] - overall_truth) < 3 * ov["std_error"]
    for row in result.event_study:
        expected = truth.get(row["event_time"], 0.0) if row["event_time"] >= 0 else 0.0
        assert row["band_low"] <= expected <= row["band_high"], row
    diagnostic = result.diagnostic()
    assert diagnostic["status"] == "problem"
    assert diagnostic["p_value"] < 0.001


def test_homogeneous_effect_leaves_the_diagnostic_quiet() -> None:
    """A constant effect: both estimates target it; negative weights do no harm."""
    df = simulate(19, n_units=400, cohorts=(2, 5), shares=(0.25, 0.25), effect=(1.5, 0.0))
    result = audit(df)
    assert result.negative_weights["sum"] > -0.2
    diagnostic = result.diagnostic()
    assert diagnostic["status"] == "ok", diagnostic
    assert abs(result.two_way_estimate - 1.5) < 3 * result.two_way_std_error


@pytest.mark.slow
def test_band_and_interval_coverage_and_pre_trend_size_over_replications() -> None:
    """Monte Carlo, 500 replications of 150 units (8 s alone, 40 s on a busy machine).

    Simultaneous bands over all event times (Callaway & Sant'Anna 2021, Section
    4.1) cover the whole true profile, the overall interval covers its truth, and the
    pre-adoption Wald test rejects near 5% under parallel trends. Measured once with
    1000 replications: bands 93.7%, overall 95.5%, pre-test size 7.4% (6.5% with 500
    units: the chi-squared reference is asymptotic and the earliest event times rest
    on one cohort of about 37 units). The Monte Carlo standard error of a 95% rate
    at 500 replications is 1 point; the bounds allow 3.5 points below nominal.
    """
    reps, band_hits, overall_hits, pre_rejects = 500, 0, 0, 0
    for rep in range(reps):
        df = simulate(
            1000 + rep, n_units=150, cohorts=(2, 4, 6), shares=(0.25, 0.25, 0.25), effect=(1.0, 0.5)
        )
        result = audit(df, seed=rep, draws=499)
        band_hits += all(
            r["band_low"]
            <= (1.0 + 0.5 * r["event_time"] if r["event_time"] >= 0 else 0.0)
            <= r["band_high"]
            for r in result.event_study
        )
        # the overall effect weights cohorts by their realised sizes
        sizes = df.groupby("g")["unit"].nunique().drop(NEVER)
        per = {a: np.mean([1.0 + 0.5 * (t - a) for t in range(a, 8)]) for a in (2, 4, 6)}
        truth = sum(sizes[a] * per[a] for a in per) / sizes.sum()
        ov = result.overall
        overall_hits += ov["ci_low"] <= truth <= ov["ci_high"]
        assert result.pre_trends is not None
        pre_rejects += result.pre_trends["p_value"] < 0.05
    assert 0.915 <= band_hits / reps <= 0.985
    assert 0.915 <= overall_hits / reps <= 0.985
    assert pre_rejects / reps <= 0.095


def test_pre_trend_test_detects_planted_anticipation() -> None:
    """Outcomes move the period before adoption: the long differences to that base
    (Callaway & Sant'Anna's universal base) shift every earlier estimate, and the
    joint test rejects; the diagnostic says caution (Roth et al. 2023, Section 3).
    """
    df = simulate(23, n_units=400, cohorts=(3, 5), shares=(0.3, 0.3), anticipation=0.6)
    result = audit(df)
    assert result.pre_trends is not None
    assert result.pre_trends["df"] == 4
    assert result.pre_trends["p_value"] < 0.001
    assert result.diagnostic()["status"] in ("caution", "problem")


# ---------------------------------------------------------------- detection and bad inputs


def _frame(rows: dict[str, list[float]], periods: list[int] | None = None) -> pd.DataFrame:
    periods = periods or [2001, 2002, 2003, 2004]
    out = [
        {"unit": u, "period": p, "y": float(i), "d": v}
        for u, values in rows.items()
        for i, (p, v) in enumerate(zip(periods, values, strict=True))
        if not np.isnan(v)
    ]
    return pd.DataFrame(out)


@pytest.mark.parametrize(
    ("rows", "fragment"),
    [
        ({"a": [0, 1, 0, 1], "b": [0, 0, 1, 1]}, "switches off in unit a at period 2003"),
        ({"a": [0, 1, 1, 1], "b": [0, 1, 1, 1], "c": [0, 0, 0, 0]}, "in one period (2002)"),
        ({"a": [0, 0.5, 1, 1], "b": [0, 0, 1, 1]}, "other than 0 and 1 (e.g. 0.5 in unit a"),
        ({"a": [1, 1, 1, 1], "b": [1, 1, 1, 1], "c": [0, 0, 0, 0]}, "treated from its first"),
        ({"a": [0, 0, 0, 0], "b": [0, 0, 0, 0]}, "no unit is ever treated"),
    ],
    ids=["switch-off", "single-cohort", "not-binary", "all-treated-at-start", "never-treated"],
)
def test_detection_says_why_staggered_adoption_is_absent(
    rows: dict[str, list[float]], fragment: str
) -> None:
    df = _frame(rows)
    found = detect(df["unit"], df["period"], df["d"])
    assert not found.present
    assert fragment in found.reason
    skipped = timing_audit(df["unit"], df["period"], df["y"], df["d"])
    assert isinstance(skipped, TimingSkipped)
    assert skipped.to_dict() is None
    assert skipped.diagnostic()["status"] == "not_run"


def test_detection_lists_cohorts_and_units_of_unknown_adoption() -> None:
    nan = float("nan")
    df = _frame(
        {
            "a": [0, 1, 1, 1],
            "b": [0, 0, 1, 1],
            "c": [1, 1, 1, 1],  # treated in the first period
            "d": [0, nan, 1, 1],  # a gap just before adoption
            "e": [0, 0, 0, 0],
        }
    )
    found = detect(df["unit"], df["period"], df["d"])
    assert found.present
    assert found.cohorts == {"2002": 1, "2003": 1}
    assert found.never_treated == 1
    assert set(found.excluded) == {"c", "d"}
    assert "gap just before" in found.excluded["d"]


def test_unbalanced_panel_is_audited_on_its_balanced_part_and_says_so() -> None:
    """Units with a missing period leave; the identity holds on what remains."""
    df = simulate(29, cohorts=(2, 5), shares=(0.35, 0.35), effect=(1.0, 0.5))
    gone = df["unit"].isin(["r001", "r002", "r003"]) & (df["period"] == 2004)
    short = df[~gone]
    result = audit(short)
    assert result.sample["units_left_out"] == 3
    balanced = df[~df["unit"].isin(["r001", "r002", "r003"])]
    assert result.two_way_estimate == pytest.approx(two_way_ols(balanced).params["d"], abs=1e-10)
    weights = np.array([r["weight"] for r in result.decomposition])
    estimates = np.array([r["estimate"] for r in result.decomposition])
    assert weights @ estimates == pytest.approx(result.two_way_estimate, abs=1e-10)


def test_no_never_treated_units_with_never_comparison_is_skipped_with_the_reason() -> None:
    df = simulate(31, cohorts=(2, 5), shares=(0.5, 0.5))
    skipped = timing_audit(df["unit"], df["period"], df["y"], df["d"], comparison="never")
    assert isinstance(skipped, TimingSkipped)
    assert "no never-treated units" in skipped.reason


def test_duplicate_rows_and_unknown_comparison_are_refused() -> None:
    df = simulate(37)
    twice = pd.concat([df, df.iloc[[5]]])
    with pytest.raises(PanelpipeError, match=r"unit r000 has two rows for period 2006"):
        timing_audit(twice["unit"], twice["period"], twice["y"], twice["d"])
    with pytest.raises(PanelpipeError, match="use never or not_yet"):
        timing_audit(df["unit"], df["period"], df["y"], df["d"], comparison="later")  # type: ignore[arg-type]
    with pytest.raises(PanelpipeError, match="level 95 must lie between"):
        timing_audit(df["unit"], df["period"], df["y"], df["d"], level=95)


def test_results_keys_follow_the_contract() -> None:
    """CONTRACT.md, "Treatment switched on at different times"."""
    result = audit(simulate(41))
    out = result.to_dict()
    for key in (
        "cohorts",
        "decomposition",
        "two_way_estimate",
        "negative_weights",
        "group_time",
        "event_study",
        "overall",
        "pre_trends",
    ):
        assert key in out
    assert set(out["decomposition"][0]) >= {"treated", "comparison", "weight", "estimate"}
    assert set(out["group_time"][0]) >= {"cohort", "period", "estimate", "std_error"}
    assert set(out["event_study"][0]) >= {
        "event_time",
        "estimate",
        "std_error",
        "ci_low",
        "ci_high",
    }
    assert set(out["overall"]) == {"estimate", "std_error", "ci_low", "ci_high"}
    assert set(out["pre_trends"]) == {"statistic", "df", "p_value"}
    assert set(result.diagnostic()) == {"status", "statistic", "p_value", "message", "details"}


def test_clusters_coarser_than_units_and_clusters_that_split_a_unit() -> None:
    """Clustering by the unit itself changes nothing; a cluster must contain whole
    units (the influence functions are summed by cluster, Callaway & Sant'Anna
    2021, Section 4.1), else a clear refusal naming the unit."""
    df = simulate(43)
    plain = audit(df)
    by_unit = audit(df, cluster=df["unit"])
    assert by_unit.overall == plain.overall
    region = df["unit"].str[-1]  # ten regions of whole units
    coarse = audit(df, cluster=region)
    assert coarse.overall["estimate"] == plain.overall["estimate"]
    assert coarse.overall["std_error"] != plain.overall["std_error"]
    split = np.where(df["period"] > 2004, "north", "south")
    with pytest.raises(PanelpipeError, match=r"unit r000 belongs to more than one cluster"):
        timing_audit(df["unit"], df["period"], df["y"], df["d"], cluster=split)
