"""Monte Carlo checks of panelpipe's inference against a known truth.

Each test simulates panels whose data-generating process we wrote ourselves,
runs them through panelpipe's own API (``make_design`` + ``estimate_all``, and
``run_comparisons`` for the Hausman tests) and measures how often an interval
covers the true slope or how often a test rejects a true null. The rates are
printed (visible with ``pytest -s``); the values measured when the tests were
written are quoted in each test with the replication count.

Every replication has its own seed, ``numpy.random.default_rng((design seed,
replication))``, so the rates do not depend on the order in which replications
run. To stay within a few minutes the replications are spread over (at most) two
worker processes when the platform can fork; otherwise they run one after the
other with the same result. The whole file takes about 190 CPU-seconds, most of
it in the Hausman design (about two minutes on two idle cores, nearly four on a
busy machine); lower the ``*_REPS`` constants if CI needs it faster.

Designs and what they check:

1. AR(1) errors and a persistent AR(1) regressor within units, fixed effects:
   classical intervals are too narrow, clustered ones are not (Arellano 1987;
   Cameron & Miller 2015).
2. Ten clusters of very unequal size with strong within-cluster correlation of
   the regressor and the error, true null: the cluster-robust t-test over-rejects
   even with the t(G−1) reference; the restricted wild cluster bootstrap does not
   (Cameron, Gelbach & Miller 2008; MacKinnon, Nielsen & Webb 2023).
3. Random effects consistent (unit effects independent of the regressor) but
   heteroskedastic unit effects and serially correlated errors: the classical
   Hausman test over-rejects, the cluster-robust Mundlak test keeps its size
   (Wooldridge 2010, §10.7.3).
"""

from __future__ import annotations

import multiprocessing
import os
import time
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor
from typing import Any

import numpy as np
import pandas as pd
import pytest

from _support import panel_settings
from panelpipe.compare import run_comparisons
from panelpipe.config import AnalysisSettings, BootstrapSettings
from panelpipe.estimate import estimate_all, make_design

FIRST_PERIOD = 2001
BETA = 1.0
MAX_WORKERS = 2


# ---------------------------------------------------------------- helpers


def _settings(
    estimators: tuple[str, ...],
    inference: tuple[str, ...],
    bootstrap: dict[str, Any] | None = None,
) -> AnalysisSettings:
    return panel_settings(
        name="montecarlo",
        regressors=("x",),
        period_effects=False,
        estimators=estimators,
        inference=inference,
        bootstrap=BootstrapSettings.from_mapping(bootstrap or {}),
    )


def _layout(lengths: Sequence[int]) -> tuple[np.ndarray, np.ndarray]:
    """Unit code and period position (0, 1, ...) of every row, units of given lengths."""
    unit = np.repeat(np.arange(len(lengths)), lengths)
    period = np.concatenate([np.arange(n) for n in lengths])
    return unit, period


def _panel(unit: np.ndarray, period: np.ndarray, y: np.ndarray, x: np.ndarray) -> pd.DataFrame:
    return pd.DataFrame(
        {
            "unit": [f"u{u:03d}" for u in unit],
            "period": FIRST_PERIOD + period,
            "y": y,
            "x": x,
        }
    )


def _ar1(rng: np.random.Generator, lengths: Sequence[int], rho: float) -> np.ndarray:
    """A stationary AR(1) series with unit variance for each unit, concatenated."""
    out = []
    scale = np.sqrt(1.0 - rho**2)
    for n in lengths:
        e = rng.standard_normal(n)
        v = np.empty(n)
        v[0] = e[0]
        for t in range(1, n):
            v[t] = rho * v[t - 1] + scale * e[t]
        out.append(v)
    return np.concatenate(out)


def _workers() -> int:
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        cores = os.cpu_count() or 1
    return max(1, min(MAX_WORKERS, cores))


def _replicate(one: Callable[[int], tuple[float, ...]], reps: int) -> np.ndarray:
    """``one(rep)`` for rep = 0 .. reps-1 as a (reps x k) array, on up to two processes."""
    workers = _workers()
    if workers > 1 and "fork" in multiprocessing.get_all_start_methods():
        context = multiprocessing.get_context("fork")
        with ProcessPoolExecutor(workers, mp_context=context) as pool:
            rows = list(pool.map(one, range(reps), chunksize=max(1, reps // (8 * workers))))
    else:
        rows = [one(rep) for rep in range(reps)]
    return np.asarray(rows, dtype=float)


# ---------------------------------------------------------------- 1. serial correlation

AR1_SEED = 41
AR1_UNITS, AR1_PERIODS = 50, 12
AR1_RHO_X, AR1_RHO_U = 0.8, 0.8
AR1_REPS = 300


def _coverage_rep(rep: int) -> tuple[float, ...]:
    """FE slope, and whether its classical / clustered 95% intervals cover BETA."""
    rng = np.random.default_rng((AR1_SEED, rep))
    lengths = [AR1_PERIODS] * AR1_UNITS
    unit, period = _layout(lengths)
    effect = rng.standard_normal(AR1_UNITS)[unit]
    x = effect + _ar1(rng, lengths, AR1_RHO_X)  # correlated with the unit effect
    y = effect + BETA * x + _ar1(rng, lengths, AR1_RHO_U)
    settings = _settings(("fixed_effects",), ("classical", "cluster"))
    design, _ = make_design(_panel(unit, period, y, x), settings)
    fe = estimate_all(design)[0]["fixed_effects"]
    covers = [
        float(fe.inference[k].ci_low["x"] <= BETA <= fe.inference[k].ci_high["x"])
        for k in ("classical", "cluster")
    ]
    return (float(fe.params["x"]), *covers)


@pytest.mark.slow
def test_serial_correlation_classical_intervals_undercover_clustered_ones_do_not() -> None:
    # Measured when written (300 replications, 50 units x 12 periods, rho_x = rho_u = 0.8):
    # classical coverage 0.773, clustered coverage 0.947, mean slope 1.0030 (truth 1).
    start = time.perf_counter()
    out = _replicate(_coverage_rep, AR1_REPS)
    slope, classical, cluster = out.mean(axis=0)
    print(
        f"\nAR(1) errors and regressor, fixed effects, {AR1_UNITS} units x {AR1_PERIODS} "
        f"periods, rho_x={AR1_RHO_X}, rho_u={AR1_RHO_U}, {AR1_REPS} replications: "
        f"coverage of the 95% interval: classical {classical:.3f}, clustered {cluster:.3f}; "
        f"mean slope {slope:.4f} (truth {BETA}); {time.perf_counter() - start:.0f}s"
    )
    # The within estimator is unbiased here; only its standard errors are at stake.
    assert abs(slope - BETA) < 4 * out[:, 0].std() / np.sqrt(AR1_REPS)
    assert classical < 0.85
    # Binomial band: sd of a 0.95 rate over 300 replications is 0.013.
    assert 0.90 <= cluster <= 0.98


# ---------------------------------------------------------------- 2. few clusters

FEW_SEED = 42
FEW_SIZES = (3, 4, 5, 6, 8, 10, 15, 25, 40, 60)  # periods observed per unit (= cluster)
FEW_SHARE_X, FEW_SHARE_U = 0.8, 0.6  # variance shares of the unit-level components
FEW_DRAWS = 399
FEW_REPS = 300


def _few_clusters_rep(rep: int) -> tuple[float, ...]:
    """p-values of the true null slope = 0: cluster-robust t, wild cluster bootstrap."""
    rng = np.random.default_rng((FEW_SEED, rep))
    unit, period = _layout(FEW_SIZES)
    g, n = len(FEW_SIZES), unit.size

    def clustered(share: float) -> np.ndarray:
        """Unit variance; a unit-level component carries ``share`` of it."""
        common = rng.standard_normal(g)[unit]
        return np.sqrt(share) * common + np.sqrt(1.0 - share) * rng.standard_normal(n)

    x = clustered(FEW_SHARE_X)
    y = 1.0 + 0.0 * x + clustered(FEW_SHARE_U)
    settings = _settings(
        ("pooled_ols",), ("cluster", "wild_bootstrap"), {"draws": FEW_DRAWS, "seed": rep}
    )
    design, _ = make_design(_panel(unit, period, y, x), settings)
    model = estimate_all(design)[0]["pooled_ols"]
    return (
        float(model.inference["cluster"].p_values["x"]),
        float(model.inference["wild_bootstrap"].p_values["x"]),
    )


@pytest.mark.slow
def test_few_clusters_cluster_t_over_rejects_wild_bootstrap_does_not() -> None:
    # Measured when written (300 replications, 10 clusters of 3 to 60 periods, 399 draws):
    # cluster-robust t (t(9) reference) rejects 0.190, wild cluster bootstrap 0.050.
    start = time.perf_counter()
    p = _replicate(_few_clusters_rep, FEW_REPS)
    cluster, wild = (p <= 0.05).mean(axis=0)
    print(
        f"\nFew clusters, pooled OLS, G={len(FEW_SIZES)} units of {FEW_SIZES} periods, "
        f"unit-level variance shares x {FEW_SHARE_X}, u {FEW_SHARE_U}, true null, "
        f"{FEW_REPS} replications, B={FEW_DRAWS}: rejection at 5%: cluster-robust t "
        f"(t({len(FEW_SIZES) - 1})) {cluster:.3f}, wild cluster bootstrap {wild:.3f}; "
        f"{time.perf_counter() - start:.0f}s"
    )
    assert cluster > 0.10
    assert cluster >= wild + 0.05
    assert 0.01 <= wild <= 0.10


# ---------------------------------------------------------------- 3. Hausman, heteroskedastic

HAUSMAN_SEED = 43
HAUSMAN_UNITS, HAUSMAN_PERIODS = 100, 6
HAUSMAN_RHO = 0.5
HAUSMAN_REPS = 300


def _hausman_rep(rep: int) -> tuple[float, ...]:
    """Classical Hausman p-value (NaN when invalid) and cluster-robust Mundlak p-value."""
    rng = np.random.default_rng((HAUSMAN_SEED, rep))
    lengths = [HAUSMAN_PERIODS] * HAUSMAN_UNITS
    unit, period = _layout(lengths)
    level = rng.standard_normal(HAUSMAN_UNITS)  # the unit's mean level of x
    x = level[unit] + _ar1(rng, lengths, HAUSMAN_RHO)
    # The unit effect has mean zero whatever x is (random effects consistent) but a
    # standard deviation of level**2; the idiosyncratic error is AR(1) with a standard
    # deviation of 1 + |level|.
    effect = (level**2 * rng.standard_normal(HAUSMAN_UNITS))[unit]
    u = (1.0 + np.abs(level))[unit] * _ar1(rng, lengths, HAUSMAN_RHO)
    y = 1.0 + BETA * x + effect + u
    settings = _settings(("fixed_effects", "random_effects"), ("classical",))
    design, _ = make_design(_panel(unit, period, y, x), settings)
    tests = run_comparisons(design, estimate_all(design)[0])

    def p_value(key: str) -> float:
        test = tests[key]
        return float(test.p_value) if test.valid and test.p_value is not None else np.nan

    return p_value("hausman"), p_value("hausman_robust")


@pytest.mark.slow
def test_heteroskedasticity_classical_hausman_over_rejects_robust_keeps_size() -> None:
    # Measured when written (300 replications, 100 units x 6 periods): classical Hausman
    # rejects 0.240 (invalid 0 times), cluster-robust (Mundlak) 0.063 (invalid 0 times).
    start = time.perf_counter()
    p = _replicate(_hausman_rep, HAUSMAN_REPS)
    invalid = np.isnan(p).sum(axis=0)
    classical, robust = (np.nan_to_num(p, nan=1.0) <= 0.05).mean(axis=0)  # invalid: no rejection
    print(
        f"\nHausman, random effects true, heteroskedastic unit effects (sd = level^2) and "
        f"AR({HAUSMAN_RHO}) heteroskedastic errors, {HAUSMAN_UNITS} units x "
        f"{HAUSMAN_PERIODS} periods, {HAUSMAN_REPS} replications: rejection at 5%: "
        f"classical {classical:.3f} (invalid {invalid[0]} times), cluster-robust "
        f"{robust:.3f} (invalid {invalid[1]} times); {time.perf_counter() - start:.0f}s"
    )
    assert invalid[1] == 0
    assert classical > 0.12
    assert 0.01 <= robust <= 0.10
