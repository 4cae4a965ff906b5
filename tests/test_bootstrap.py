"""Tests of the restricted wild cluster bootstrap (panelpipe.bootstrap).

The fast cluster-level algorithm is checked against a naive bootstrap written
here (refit every bootstrap sample with numpy's least squares), the CR1 t
statistic against statsmodels, and the rejection rates against a Monte Carlo
with a true null.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from panelpipe.bootstrap import (
    WEBB_WEIGHTS,
    BootstrapResult,
    _cluster_sums,
    _draw_moments,
    _p_value,
    _weight_batches,
    wild_cluster_bootstrap,
)

UNEQUAL_SIZES = (2, 3, 5, 10, 20, 50, 100, 200)


def simulate(
    seed: int | np.random.Generator,
    sizes: Sequence[int],
    *,
    beta: float = 0.0,
    rho_x: float = 0.8,
    rho_u: float = 0.6,
    extra_columns: int = 1,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """y = 1 + beta x + u with cluster components in x (share rho_x) and u (rho_u).

    Returns y, X = [1, x, extra noise columns], and string cluster labels.
    """
    rng = np.random.default_rng(seed)
    codes = np.repeat(np.arange(len(sizes)), sizes)
    n = codes.size
    x = np.sqrt(rho_x) * rng.standard_normal(len(sizes))[codes] + np.sqrt(
        1 - rho_x
    ) * rng.standard_normal(n)
    u = np.sqrt(rho_u) * rng.standard_normal(len(sizes))[codes] + np.sqrt(
        1 - rho_u
    ) * rng.standard_normal(n)
    X = np.column_stack([np.ones(n), x, rng.standard_normal((n, extra_columns))])
    labels = np.array([f"c{g:02d}" for g in codes])
    return 1.0 + beta * x + u, X, labels


def cr1_t(X: np.ndarray, y: np.ndarray, codes: np.ndarray, k: int, beta0: float) -> float:
    n, K = X.shape
    G = codes.max() + 1
    b = np.linalg.lstsq(X, y, rcond=None)[0]
    u = y - X @ b
    bread = np.linalg.inv(X.T @ X)
    scores = np.array([X[codes == g].T @ u[codes == g] for g in range(G)])
    cov = G / (G - 1) * (n - 1) / (n - K) * bread @ scores.T @ scores @ bread
    return float((b[k] - beta0) / np.sqrt(cov[k, k]))


def naive_t_stars(
    y: np.ndarray, X: np.ndarray, codes: np.ndarray, k: int, beta0: float, V: np.ndarray
) -> np.ndarray:
    """One explicit restricted bootstrap sample and refit per row of weights V."""
    others = [j for j in range(X.shape[1]) if j != k]
    y0 = y - beta0 * X[:, k]
    gamma = np.linalg.lstsq(X[:, others], y0, rcond=None)[0]
    u_restricted = y0 - X[:, others] @ gamma
    fitted = y - u_restricted
    return np.array([cr1_t(X, fitted + v[codes] * u_restricted, codes, k, beta0) for v in V])


def fast_t_stars(
    y: np.ndarray, X: np.ndarray, codes: np.ndarray, k: int, beta0: float, V: np.ndarray
) -> np.ndarray:
    sums = _cluster_sums(y, X, codes, int(codes.max()) + 1, k)
    moments = _draw_moments(sums, iter([V]), V.shape[0], None)
    return moments.t_star(sums.theta(beta0))


def codes_of(labels: np.ndarray) -> np.ndarray:
    return np.unique(labels, return_inverse=True)[1]


@pytest.fixture(scope="module")
def small() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return simulate(7, (4, 6, 9, 12, 15, 20, 25, 30, 40), extra_columns=2)


@pytest.mark.parametrize("kind", ["rademacher", "webb"])
@pytest.mark.parametrize("beta0", [0.0, 0.35], ids=["null0", "null035"])
def test_fast_matches_naive_refit(
    small: tuple[np.ndarray, np.ndarray, np.ndarray], kind: str, beta0: float
) -> None:
    y, X, labels = small
    codes = codes_of(labels)
    G, B, seed = int(codes.max()) + 1, 300, 11
    V = np.vstack(list(_weight_batches(np.random.default_rng(seed), G, B, kind, False)))
    assert V.shape == (B, G)
    naive = naive_t_stars(y, X, codes, 1, beta0, V)
    np.testing.assert_allclose(fast_t_stars(y, X, codes, 1, beta0, V), naive, rtol=1e-8, atol=1e-8)

    # The public function draws exactly these weights for this seed.
    res = wild_cluster_bootstrap(
        y, X, labels, term_index=1, null_value=beta0, draws=B, weights=kind, seed=seed
    )
    t = cr1_t(X, y, codes, 1, beta0)
    assert res.t_stat == pytest.approx(t, rel=1e-10)
    assert res.p_value == pytest.approx(_p_value(t, naive, "symmetric"), abs=1e-12)
    assert not res.enumerated


def test_webb_weights_have_mean_zero_and_unit_variance() -> None:
    # Webb (2023): six points, each with probability 1/6.
    assert WEBB_WEIGHTS.size == 6
    assert WEBB_WEIGHTS.mean() == pytest.approx(0.0, abs=1e-15)
    assert np.mean(WEBB_WEIGHTS**2) == pytest.approx(1.0)
    assert np.mean(WEBB_WEIGHTS**4) == pytest.approx(7 / 6)


@pytest.mark.parametrize("null_value", [0.0, 0.25, -1.0], ids=["zero", "pos", "neg"])
def test_t_stat_matches_statsmodels_cluster(
    small: tuple[np.ndarray, np.ndarray, np.ndarray], null_value: float
) -> None:
    y, X, labels = small
    codes = codes_of(labels)
    # statsmodels' cov_type="cluster" applies G/(G-1)*(N-1)/(N-K) by default
    # (use_correction=True, df_correction=True): the same CR1 factor.
    ols = sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": codes})
    expected = (ols.params[1] - null_value) / ols.bse[1]
    res = wild_cluster_bootstrap(
        y, X, labels, term_index=1, null_value=null_value, draws=99, seed=1
    )
    assert res.estimate == pytest.approx(ols.params[1], rel=1e-12)
    assert res.t_stat == pytest.approx(expected, rel=1e-10)


def test_term_index_other_than_slope_matches_statsmodels(
    small: tuple[np.ndarray, np.ndarray, np.ndarray],
) -> None:
    y, X, labels = small
    ols = sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": codes_of(labels)})
    for k in range(X.shape[1]):
        res = wild_cluster_bootstrap(y, X, labels, term_index=k, draws=99)
        assert res.t_stat == pytest.approx(ols.tvalues[k], rel=1e-10)


def test_same_seed_reproduces_and_other_seeds_differ_slightly() -> None:
    y, X, labels = simulate(3, [30] * 20, beta=0.1)
    first = wild_cluster_bootstrap(y, X, labels, term_index=1, seed=5)
    again = wild_cluster_bootstrap(y, X, labels, term_index=1, seed=5)
    other = wild_cluster_bootstrap(y, X, labels, term_index=1, seed=6)
    assert first == again
    assert first.weights == "rademacher" and first.draws == 9999
    assert other.p_value != first.p_value
    # 9,999 draws: the Monte Carlo s.e. of a p-value near 0.1 is about 0.003.
    assert abs(other.p_value - first.p_value) < 0.02
    assert other.ci_low == pytest.approx(first.ci_low, rel=0.05)
    assert other.ci_high == pytest.approx(first.ci_high, rel=0.05)


def test_enumeration_with_8_clusters_gives_multiples_of_1_over_256() -> None:
    y, X, labels = simulate(4, UNEQUAL_SIZES)
    codes = codes_of(labels)
    all_signs = np.array(list(itertools.product([1.0, -1.0], repeat=8)))
    for null_value in (0.0, 0.1, -0.3, 0.5):
        res = wild_cluster_bootstrap(
            y, X, labels, term_index=1, null_value=null_value, weights="rademacher", draws=999
        )
        assert res.enumerated and res.draws == 256 and res.weights == "rademacher"
        assert any("2^8 = 256" in note for note in res.notes)
        count = res.p_value * 256
        assert count == pytest.approx(round(count), abs=1e-9)
        # The sign vectors of +1 and -1 everywhere reproduce |t|, so p >= 2/256.
        assert res.p_value >= 2 / 256
        naive = naive_t_stars(y, X, codes, 1, null_value, all_signs)
        assert res.p_value == _p_value(res.t_stat, naive, "symmetric")


def test_enumeration_ignores_the_seed() -> None:
    y, X, labels = simulate(4, UNEQUAL_SIZES)
    a = wild_cluster_bootstrap(y, X, labels, term_index=1, weights="rademacher", seed=1)
    b = wild_cluster_bootstrap(y, X, labels, term_index=1, weights="rademacher", seed=2)
    assert a.p_value == b.p_value and a.ci_low == b.ci_low


@pytest.mark.parametrize(
    ("sizes", "few_clusters", "expected"),
    [
        ((10,) * 8, 12, "webb"),
        ((10,) * 12, 12, "webb"),
        ((10,) * 20, 12, "rademacher"),
        ((10,) * 20, 25, "webb"),
    ],
    ids=["G8", "G12-threshold", "G20", "G20-threshold25"],
)
def test_auto_weights_follow_cluster_count(
    sizes: tuple[int, ...], few_clusters: int, expected: str
) -> None:
    y, X, labels = simulate(5, sizes)
    res = wild_cluster_bootstrap(y, X, labels, term_index=1, few_clusters=few_clusters, draws=199)
    assert res.weights == expected
    assert not res.enumerated
    assert any(f"{len(sizes)} clusters" in note for note in res.notes)


def test_notes_state_the_cr1_factor() -> None:
    y, X, labels = simulate(5, (10,) * 8)
    res = wild_cluster_bootstrap(y, X, labels, term_index=1, draws=99)
    assert "G/(G-1)*(N-1)/(N-K) = 8/7*79/77" in res.notes[0]
    assert res.to_dict()["notes"] == list(res.notes)
    assert res.to_dict()["clusters"] == 8


@pytest.mark.parametrize("p_value_kind", ["symmetric", "equal_tail"])
@pytest.mark.parametrize("weights", ["rademacher", "webb"])
def test_interval_bounds_are_where_the_p_value_equals_alpha(
    p_value_kind: str, weights: str
) -> None:
    y, X, labels = simulate(8, (5, 8, 12, 20, 30, 40, 60, 80, 100, 120, 150, 200, 250, 300))
    B, level, seed = 999, 0.9, 3
    res = wild_cluster_bootstrap(
        y,
        X,
        labels,
        term_index=1,
        draws=B,
        level=level,
        weights=weights,
        seed=seed,
        p_value_kind=p_value_kind,
    )
    alpha = 1 - level
    assert res.ci_low < res.estimate < res.ci_high
    width = res.ci_high - res.ci_low

    def p_at(beta0: float) -> float:
        # Same seed, hence the same weight draws as the interval search used.
        return wild_cluster_bootstrap(
            y,
            X,
            labels,
            term_index=1,
            null_value=beta0,
            draws=B,
            level=level,
            weights=weights,
            seed=seed,
            p_value_kind=p_value_kind,
        ).p_value

    for bound, inward in ((res.ci_low, 1.0), (res.ci_high, -1.0)):
        step = inward * 1e-7 * width
        assert abs(p_at(bound) - alpha) <= 2.0 / B
        assert p_at(bound + step) >= alpha
        assert p_at(bound - step) < alpha


def test_interval_is_near_the_cluster_robust_one_with_many_clusters() -> None:
    y, X, labels = simulate(9, [25] * 60, rho_u=0.3)
    res = wild_cluster_bootstrap(y, X, labels, term_index=1, draws=1999)
    ols = sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": codes_of(labels)})
    half = stats.t.ppf(0.975, 59) * ols.bse[1]
    assert res.ci_low == pytest.approx(ols.params[1] - half, abs=0.15 * half)
    assert res.ci_high == pytest.approx(ols.params[1] + half, abs=0.15 * half)


def test_too_few_sign_vectors_give_an_unbounded_interval() -> None:
    y, X, labels = simulate(10, (20, 30, 40))
    res = wild_cluster_bootstrap(y, X, labels, term_index=1, weights="rademacher")
    assert res.enumerated and res.draws == 8
    assert res.ci_low == -np.inf and res.ci_high == np.inf
    assert any("unbounded" in note for note in res.notes)


def test_demeaned_data_give_the_same_test_as_dummies_for_effects_nested_in_clusters() -> None:
    rng = np.random.default_rng(12)
    units, periods = 30, 6
    unit = np.repeat(np.arange(units), periods)
    cluster = unit // 3  # 10 clusters, each holding 3 whole units
    x = rng.standard_normal(units)[unit] + rng.standard_normal(unit.size)
    y = 2.0 * rng.standard_normal(units)[unit] + 0.2 * x + rng.standard_normal(unit.size)
    dummies = (unit[:, None] == np.arange(units)).astype(float)

    def demean(v: np.ndarray) -> np.ndarray:
        return v - (np.bincount(unit, v) / periods)[unit]

    with_dummies = wild_cluster_bootstrap(
        y, np.column_stack([x, dummies]), cluster, term_index=0, draws=999
    )
    demeaned = wild_cluster_bootstrap(
        demean(y), demean(x)[:, None], cluster, term_index=0, draws=999
    )
    # Only the CR1 factor differs (K = 31 vs 1), which scales t and every t* alike.
    assert demeaned.estimate == pytest.approx(with_dummies.estimate, rel=1e-10)
    assert demeaned.p_value == with_dummies.p_value
    assert demeaned.ci_low == pytest.approx(with_dummies.ci_low, rel=1e-6)
    assert demeaned.ci_high == pytest.approx(with_dummies.ci_high, rel=1e-6)
    n = unit.size
    ratio = np.sqrt(((n - 1) / (n - 31)) / ((n - 1) / (n - 1)))
    assert demeaned.t_stat == pytest.approx(with_dummies.t_stat * ratio, rel=1e-8)


def test_progress_reports_every_batch_up_to_the_total() -> None:
    y, X, labels = simulate(5, (10,) * 8)
    calls: list[tuple[int, int]] = []
    wild_cluster_bootstrap(
        y, X, labels, term_index=1, draws=500, progress=lambda d, t: calls.append((d, t))
    )
    assert calls and calls[-1] == (500, 500)


def test_result_is_immutable() -> None:
    y, X, labels = simulate(5, (10,) * 8)
    res = wild_cluster_bootstrap(y, X, labels, term_index=1, draws=99)
    assert isinstance(res, BootstrapResult)
    with pytest.raises(AttributeError):
        res.p_value = 0.0  # type: ignore[misc]


@pytest.mark.slow
def test_monte_carlo_bootstrap_rejects_near_nominal_where_cluster_t_over_rejects() -> None:
    # 8 clusters of very unequal size, strong within-cluster correlation of x and u,
    # and a true null: the setting where the cluster-robust t-test over-rejects
    # (Cameron, Gelbach & Miller 2008; MacKinnon, Nielsen & Webb 2023).
    reps, B = 400, 399
    rng = np.random.default_rng(20240)
    crit = stats.t.ppf(0.975, len(UNEQUAL_SIZES) - 1)
    cluster_t = bootstrap = 0
    for rep in range(reps):
        y, X, labels = simulate(rng, UNEQUAL_SIZES, extra_columns=0)
        res = wild_cluster_bootstrap(y, X, labels, term_index=1, draws=B, seed=rep)
        cluster_t += abs(res.t_stat) > crit
        bootstrap += res.p_value <= 0.05
    rate_t, rate_boot = cluster_t / reps, bootstrap / reps
    print(
        f"\nMonte Carlo, {reps} replications, G={len(UNEQUAL_SIZES)} clusters of sizes "
        f"{UNEQUAL_SIZES}, B={B}, {res.weights} weights, nominal 5%: cluster-robust t "
        f"(t({len(UNEQUAL_SIZES) - 1}) critical value) rejects {rate_t:.3f}, wild "
        f"cluster bootstrap rejects {rate_boot:.3f}"
    )
    assert 0.01 <= rate_boot <= 0.10
    assert rate_t >= rate_boot + 0.05


@pytest.mark.slow
def test_large_problem_matches_statsmodels_and_covers_the_estimate() -> None:
    y, X, labels = simulate(13, [2000] * 50, beta=0.3, extra_columns=8)
    res = wild_cluster_bootstrap(y, X, labels, term_index=1, null_value=0.3)
    ols = sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": codes_of(labels)})
    assert res.t_stat == pytest.approx((ols.params[1] - 0.3) / ols.bse[1], rel=1e-9)
    assert res.ci_low < 0.3 < res.ci_high or res.p_value <= 0.05


def _valid() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return simulate(5, (6, 7, 8, 9))


def _case(**changes: object) -> dict[str, object]:
    y, X, labels = _valid()
    args: dict[str, object] = {"y": y, "X": X, "clusters": labels, "term_index": 1}
    args.update(changes)
    return args


def _nan_at(a: np.ndarray, index: tuple[int, ...] | int) -> np.ndarray:
    out = a.copy()
    out[index] = np.nan
    return out


def _missing_labels(labels: np.ndarray, count: int) -> np.ndarray:
    out = labels.astype(object)
    out[:count] = None
    return out


_Y, _X, _LABELS = _valid()
_N = _Y.size  # 30 rows, 3 columns


@pytest.mark.parametrize(
    ("changes", "match"),
    [
        ({"y": _Y[:, None]}, r"y must be 1-D; got an array with 2 dimensions"),
        ({"X": _X[:, 1]}, r"X must be 2-D \(rows x columns\); got 1 dimensions"),
        ({"clusters": _LABELS[:, None]}, r"clusters must be 1-D; got an array with 2"),
        ({"y": _Y[:-2]}, rf"same number of rows; got {_N - 2}, {_N} and {_N}"),
        ({"clusters": _LABELS[1:]}, rf"same number of rows; got {_N}, {_N} and {_N - 1}"),
        (
            {"y": _Y[:3], "X": _X[:3], "clusters": _LABELS[:3]},
            r"X has 3 rows and 3 columns; the regression needs more rows than columns",
        ),
        ({"term_index": 3}, r"term_index=3 is outside X's 3 columns"),
        ({"term_index": -1}, r"term_index=-1 is outside X's 3 columns"),
        ({"y": _nan_at(_Y, 4)}, rf"y has 1 of {_N} values that are NaN or infinite"),
        ({"X": _nan_at(_nan_at(_X, (2, 1)), (5, 2))}, rf"X has 2 of {_N} rows with NaN"),
        (
            {"clusters": _missing_labels(_LABELS, 3)},
            rf"clusters has 3 of {_N} missing labels",
        ),
        ({"weights": "normal"}, r"weights='normal' is not one of auto, rademacher, webb"),
        ({"p_value_kind": "upper"}, r"p_value_kind='upper' is not one of symmetric, equal_tail"),
        ({"level": 1.0}, r"level=1.0 must lie strictly between 0 and 1"),
        ({"draws": 0}, r"draws=0 must be at least 1"),
        (
            {"clusters": np.full(_N, "only")},
            r"clusters has 1 distinct label; the wild cluster bootstrap needs at least 2",
        ),
        (
            {"X": np.column_stack([_X, 2 * _X[:, 1]])},
            r"X has 4 columns but rank 3; drop collinear columns",
        ),
        (
            {"y": _X @ np.array([1.0, 2.0, 3.0])},
            r"standard error of x1 is zero across 4 clusters",
        ),
    ],
    ids=[
        "y-2d",
        "X-1d",
        "clusters-2d",
        "y-short",
        "clusters-short",
        "too-few-rows",
        "term-index-high",
        "term-index-negative",
        "y-nan",
        "X-nan",
        "clusters-missing",
        "weights-unknown",
        "p-value-kind-unknown",
        "level-out-of-range",
        "draws-zero",
        "one-cluster",
        "rank-deficient",
        "exact-fit",
    ],
)
def test_invalid_input_raises(changes: dict[str, object], match: str) -> None:
    with pytest.raises(ValueError, match=match):
        wild_cluster_bootstrap(**_case(**changes))  # type: ignore[arg-type]
