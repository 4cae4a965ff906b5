"""Diagnose: audit the fixed-effects estimate against the threats to internal validity.

Every check in the table below becomes a `Diagnostic`: a status
(``ok``, ``caution``, ``problem`` or ``not_run`` with the reason), the statistic
and p-value where a test applies, the effect on the headline (focus) coefficient
where one can be computed, and one plain sentence on what it means for the
estimate. Every threshold is in `THRESHOLDS`.

=========================== ==================================================
check                       method (flags when)
=========================== ==================================================
omitted_variables           coefficient path pooled -> unit -> unit and period
                            effects; Oster's delta and bias-adjusted estimate
                            with unit effects as the baseline (caution: the
                            estimate is significant and abs(delta) < 1 or the
                            identified set holds zero)
strict_exogeneity           leads of the regressors added to the FE model, Wald
                            F(q, G-1) (problem: rejects)
functional_form             squares and cubes of the fitted index added to the
                            FE model, Wald F(2, G-1) (caution: rejects)
measurement_error           within share of each regressor's variance; FE minus
                            FD over its jackknife SE, t(G-1) (caution: share
                            below 0.10 or the difference is significant)
attrition                   exits, late entries, gaps; next-period presence
                            added to the FE model, t(G-1) confirmed by a wild
                            cluster bootstrap (problem: both reject)
missing_data                rows and units lost to missing values, per reason;
                            dropped vs used rows on the observed regressors
                            and on the outcome, and the next row's loss added
                            to the FE model, Bonferroni over the tests run
                            (caution: the rows differ; problem: the FE test
                            rejects)
serial_correlation          FD residuals on their lag, coefficient -0.5 under
                            the null, t(G-1) (caution if the headline is
                            clustered, else problem)
cross_sectional_dependence  CD test in O(NT) on residuals before period effects
                            (problem; caution when period effects are in the
                            model)
heteroskedasticity          studentised groupwise LM, chi2(n-1) (caution if the
                            headline is clustered, else problem)
few_clusters                count and sizes (problem below 30, caution below 50
                            or one cluster above 20% of rows); wild bootstrap
influential_clusters        leave-one-cluster-out from cluster sums, CV3
                            (caution: a shift above one SE, CV3 > 1.5 CR1, or
                            significance lost; problem: one cluster flips the
                            sign of a significant estimate)
=========================== ==================================================

Tests use the CV3 jackknife covariance (`_Fit`) with F(q, G-1) and t(G-1)
references. The audit fits nothing more often than it must: the within
(unit-demeaned) data of the estimation sample are computed once, and the
RESET-type test, the one-way residuals and the leave-one-cluster-out estimates
reuse them. The lead and next-period-presence tests need a sub-sample, whose raw
columns are demeaned again (O(NK)) because unit means depend on the rows kept.
First differences are formed once and serve both the comparison with fixed
effects and the serial-correlation test.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from functools import cached_property
from types import MappingProxyType
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
import pandas as pd
import scipy.linalg
import scipy.linalg.lapack

from .bootstrap import wild_cluster_bootstrap
from .distributions import chi2_sf, f_sf, norm_sf, t_ppf, t_sf
from .estimate import (
    INFERENCE_LABELS,
    Design,
    ModelResult,
    first_difference_rows,
    period_codes,
    period_ordinals,
)
from .fit import constant_within, covariance, demean, group_sums, least_squares, ls_coefficients
from .validate import FEW_CLUSTERS

__all__ = [
    "DIAGNOSTIC_KEYS",
    "THRESHOLDS",
    "CrossSectionalDependence",
    "Diagnostic",
    "Status",
    "groupwise_heteroskedasticity",
    "leave_one_cluster_out",
    "missing_data_audit",
    "oster_beta_star",
    "oster_delta",
    "pesaran_cd",
    "run_audit",
]

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.intp]

Status = Literal["ok", "caution", "problem", "not_run"]

DIAGNOSTIC_KEYS = (
    "omitted_variables",
    "strict_exogeneity",
    "functional_form",
    "measurement_error",
    "attrition",
    "missing_data",
    "serial_correlation",
    "cross_sectional_dependence",
    "heteroskedasticity",
    "few_clusters",
    "influential_clusters",
)
"""The keys of ``results.json['diagnostics']``, in the order of the audit table."""

THRESHOLDS: Mapping[str, float] = MappingProxyType(
    {
        # Size of every test in the audit; a p-value below it flags the check.
        "alpha": 0.05,
        # Oster (2019): R_max = min(1, 1.3 * R-squared of the controlled regression).
        "oster_rmax_multiplier": 1.3,
        # Oster (2019): |delta| below 1 means unobservables less important than the
        # observed controls could explain the estimate away.
        "oster_delta": 1.0,
        # Within-unit share of the focus regressor's variance below which
        # measurement error is strongly amplified by fixed effects (Griliches &
        # Hausman 1986). Judgement, no single source.
        "within_share_low": 0.10,
        # Fewer clusters than this: cluster-robust inference is unreliable
        # (common practice; the same constant as validation's warning).
        "few_clusters": float(FEW_CLUSTERS),
        # From few_clusters up to this count: still worth a bootstrap check.
        "clusters_caution": 50.0,
        # One cluster holding more than this share of the rows dominates the
        # cluster-robust variance. Judgement, no single source.
        "dominant_cluster_share": 0.20,
        # Dropping one cluster moves the focus estimate by more than this many
        # cluster-robust standard errors: the cluster is influential.
        "influence_shift_se": 1.0,
        # The jackknife (CV3) standard error exceeds the CR1 one by this factor.
        "cv3_ratio": 1.5,
        # Draws of the wild cluster bootstraps the audit runs itself (few clusters,
        # confirmation of the attrition test).
        "bootstrap_draws": 999.0,
    }
)
"""Every threshold the audit uses, in one place (see the comments in the source)."""


@dataclass(frozen=True)
class Diagnostic:
    """One check of the validity audit.

    Parameters
    ----------
    key
        One of `DIAGNOSTIC_KEYS`.
    status
        ``ok``, ``caution``, ``problem``, or ``not_run`` (then ``reason`` says why).
    message
        One plain sentence on what the result means for the estimate.
    statistic, p_value, df
        The test statistic, its p-value and (numerator) degrees of freedom, where
        a test applies; ``details['reference']`` names the reference distribution.
    effect
        The effect on the headline estimate: a bound, a range, estimates under
        alternatives, standard-error ratios.
    details
        Everything else computed on the way.
    reason
        Why the check did not run.
    """

    key: str
    status: Status
    message: str
    statistic: float | None = None
    p_value: float | None = None
    df: float | None = None
    effect: dict[str, Any] = field(default_factory=dict)
    details: dict[str, Any] = field(default_factory=dict)
    reason: str = ""

    def to_dict(self) -> dict[str, Any]:
        """The ``diagnostics.<key>`` entry of results.json (plain JSON values)."""
        return {
            "status": self.status,
            "statistic": _plain(self.statistic),
            "p_value": _plain(self.p_value),
            "df": _plain(self.df),
            "message": self.message,
            "effect": _plain(self.effect),
            "details": _plain(self.details),
            "reason": self.reason,
        }


def _plain(value: Any) -> Any:
    """Python scalars, lists and dicts only; NaN and infinities become None."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple | np.ndarray):
        return [_plain(v) for v in value]
    if isinstance(value, bool | np.bool_):
        return bool(value)
    if isinstance(value, int | np.integer):
        return int(value)
    if isinstance(value, float | np.floating):
        return float(value) if np.isfinite(value) else None
    return value


def _not_run(key: str, reason: str) -> Diagnostic:
    return Diagnostic(key, "not_run", f"Not run: {reason}.", reason=reason)


# ---------------------------------------------------------------- regression helpers


@dataclass(frozen=True)
class _Fit:
    r"""Least squares with cluster-robust covariances.

    ``cov`` is CR1, as in the estimation stage. The tests of the audit use the
    CV3 jackknife, :math:`\hat V_3 = \frac{G-1}{G}\sum_g(\hat\beta^{(g)}-\hat\beta)
    (\hat\beta^{(g)}-\hat\beta)'`, which MacKinnon, Nielsen & Webb (2023)
    find far more reliable than CR1 when some observations have high leverage
    (the cubes of the RESET-type test, an indicator that changes in a few
    clusters); CR1 is the fallback when a leave-one-out fit is singular.
    """

    coef: FloatArray
    resid: FloatArray
    cov: FloatArray
    clusters: int
    codes: IntArray
    X: FloatArray
    y: FloatArray

    @property
    def nobs(self) -> int:
        return len(self.y)

    def se(self, j: int) -> float:
        """The CR1 standard error of coefficient ``j``."""
        return float(np.sqrt(self.cov[j, j]))

    @cached_property
    def loo(self) -> FloatArray:
        """Coefficients with each cluster left out in turn (G x K; NaN rows if singular)."""
        return leave_one_cluster_out(self.y, self.X, self.codes, self.clusters)

    @cached_property
    def cov_cv3(self) -> FloatArray | None:
        if not np.isfinite(self.loo).all():
            return None
        dev = self.loo - self.coef
        out: FloatArray = (self.clusters - 1) / self.clusters * (dev.T @ dev)
        return out

    @property
    def test_covariance(self) -> str:
        return "CV3 jackknife" if self.cov_cv3 is not None else "CR1"

    def _test_cov(self) -> FloatArray:
        return self.cov if self.cov_cv3 is None else self.cov_cv3

    def t_test(self, j: int, null: float = 0.0) -> tuple[float, float]:
        """t statistic (CV3, else CR1) and its two-sided p-value from t(G-1)."""
        t = (float(self.coef[j]) - null) / float(np.sqrt(self._test_cov()[j, j]))
        return t, float(2.0 * t_sf(abs(t), self.clusters - 1))

    def wald(self, cols: list[int]) -> tuple[float, float]:
        """Wald F that the coefficients ``cols`` are zero (CV3, else CR1); F(q, G-1)."""
        b = self.coef[cols]
        v = self._test_cov()[np.ix_(cols, cols)]
        f = float(b @ np.linalg.solve(v, b)) / len(cols)
        return f, float(f_sf(f, len(cols), self.clusters - 1))


def _cluster_fit(y: FloatArray, X: FloatArray, clusters: IntArray) -> _Fit:
    r"""OLS of ``y`` on ``X`` with the CR1 cluster-robust covariance.

    Notes
    -----
    :math:`\hat V = c\,(X'X)^{-1}\left(\sum_g X_g'\hat u_g\hat u_g'X_g\right)(X'X)^{-1}`
    with :math:`c = \frac{G}{G-1}\frac{N-1}{N-K}` (Liang & Zeger 1986; Cameron &
    Miller 2015), computed by the estimation stage's `fit.least_squares` and
    `fit.covariance`. Effects absorbed by demeaning within clusters are not
    counted in K, as in the estimation stage.
    """
    codes_raw, uniques = pd.factorize(clusters)
    codes = codes_raw.astype(np.intp)
    g = len(uniques)
    n, k = X.shape
    if g < 2 or n <= k:
        raise np.linalg.LinAlgError(f"{n} rows, {k} columns and {g} cluster(s) are too few")
    try:
        reg = least_squares(
            y, X, tuple(map(str, range(k))), time=np.zeros(n, dtype=np.intp), rows=np.arange(n)
        )
    except np.linalg.LinAlgError:
        # The columns are this check's own construction, not names a reader knows.
        raise np.linalg.LinAlgError(
            "in this check's regression some regressors are combinations of the others"
        ) from None
    coef, resid = reg.params, reg.resid
    cov = covariance(reg, "cluster", clusters=codes)
    return _Fit(coef, resid, cov, g, codes, X, y)


def _independent(base: FloatArray, extra: FloatArray) -> IntArray:
    """Columns of ``extra`` that are linearly independent of ``base`` and each other.

    What is left of ``extra`` after least squares on ``base`` is formed
    explicitly; a pivoted Cholesky decomposition of its cross-products (LAPACK
    dpstrf) keeps the columns whose remainder exceeds 1e-6 of the largest
    column norm. The remainder of an exactly collinear column is rounding
    noise, far below that.
    """
    if extra.shape[1] == 0:
        return np.zeros(0, dtype=np.intp)
    scale = float(np.sqrt((extra**2).sum(axis=0)).max())
    if scale == 0.0:
        return np.zeros(0, dtype=np.intp)
    rest = extra - base @ ls_coefficients(base, extra) if base.shape[1] else extra
    gram = rest.T @ rest
    _, piv, rank, _ = scipy.linalg.lapack.dpstrf((gram + gram.T) / 2, tol=(1e-6 * scale) ** 2)
    return np.sort(piv[:rank] - 1).astype(np.intp)


def _ssr(y: FloatArray, X: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Coefficients and residuals of OLS of ``y`` on ``X`` (no covariance)."""
    coef = ls_coefficients(X, y)
    return coef, y - X @ coef


# ---------------------------------------------------------------- the audit context


@dataclass(frozen=True)
class _Index:
    """Integer codes of the estimation sample's units, periods and clusters.

    ``period`` codes the observed periods 0..T-1 (for dummies); ``ordinal`` is the
    calendar period, which "the next period" and "the previous period" follow.
    """

    unit: IntArray
    period: IntArray
    ordinal: npt.NDArray[np.int64]
    cluster: IntArray
    cluster_labels: pd.Index
    n_units: int
    n_periods: int

    @classmethod
    def of(cls, design: Design) -> _Index:
        period = period_codes(design)
        col = design.clusters.columns[0]
        cluster, codes = pd.factorize(design.clusters[col].to_numpy())
        cluster = cluster.astype(np.intp)
        labels = pd.Index([str(design.cluster_names[col][c]) for c in codes])
        return cls(
            design.unit_codes.astype(np.intp),
            period,
            period_ordinals(design),
            cluster,
            labels,
            len(design.unit_names),
            int(period.max()) + 1 if len(period) else 0,
        )

    @property
    def n_clusters(self) -> int:
        return len(self.cluster_labels)

    def shifted(self, step: int) -> IntArray:
        """Row of the same unit ``step`` calendar periods later (earlier if negative), or -1.

        A period missing for everybody still counts as a step.
        """
        found, code = self._period_code(step)
        key = self.unit.astype(np.int64) * self.n_periods + self.period
        target = self.unit.astype(np.int64) * self.n_periods + code
        order = np.argsort(key, kind="stable")
        at = np.minimum(np.searchsorted(key, target, sorter=order), len(key) - 1)
        hit = found & (key[order[at]] == target)
        return np.where(hit, order[at], -1).astype(np.intp)

    def has_period(self, step: int) -> npt.NDArray[np.bool_]:
        """Whether the period ``step`` calendar periods from each row's is observed at all."""
        return self._period_code(step)[0]

    def _period_code(self, step: int) -> tuple[npt.NDArray[np.bool_], IntArray]:
        levels = np.unique(self.ordinal)
        target = self.ordinal + step
        code = np.minimum(np.searchsorted(levels, target), max(len(levels) - 1, 0))
        return levels[code] == target, code.astype(np.intp)

    @cached_property
    def period_dummies(self) -> FloatArray:
        """A dummy for every period but the first (as in the estimation stage)."""
        d = np.zeros((len(self.period), max(self.n_periods - 1, 0)))
        rows = np.flatnonzero(self.period > 0)
        d[rows, self.period[rows] - 1] = 1.0
        return d

    def nested(self) -> bool:
        """Whether every unit lies in a single cluster."""
        return constant_within(self.cluster, self.unit)


@dataclass(frozen=True)
class _Within:
    """The fixed-effects model on unit-demeaned data (period dummies as columns)."""

    terms: tuple[str, ...]
    focus: int
    y_raw: FloatArray
    x_raw: FloatArray
    d_raw: FloatArray
    y: FloatArray
    x: FloatArray
    d: FloatArray
    fit: _Fit

    @property
    def w(self) -> FloatArray:
        """The fit's regressors, [x, d] (the array the fit holds, not a copy)."""
        return self.fit.X


@dataclass(frozen=True)
class _FirstDiff:
    """First differences of consecutive periods; ``rows`` are the later rows."""

    rows: IntArray
    fit: _Fit


@dataclass(frozen=True)
class _Context:
    design: Design
    models: Mapping[str, ModelResult]
    focus: str
    index: _Index
    within: _Within | None
    first_diff: _FirstDiff | None
    missing: str
    fd_missing: str
    panel: pd.DataFrame | None = None
    """The validated panel before rows with missing values were dropped, if given."""

    @property
    def alpha(self) -> float:
        return THRESHOLDS["alpha"]

    @cached_property
    def loss(self) -> _Loss | None:
        """Rows of ``panel`` dropped for a missing outcome or regressor (None: no panel)."""
        return None if self.panel is None else _Loss.of(self.panel, self.design)

    def ran(self, *keys: str) -> list[str]:
        """Those of the inference ``keys`` the fixed-effects model was estimated with."""
        inference = self.models["fixed_effects"].inference if "fixed_effects" in self.models else {}
        return [k for k in keys if k in inference]

    def remedy(self, *keys: str) -> str:
        """Advice to use inference ``keys``: read them if the run has them, else add one."""
        ran = self.ran(*keys)
        if ran:
            labels = " or ".join(INFERENCE_LABELS[k] for k in ran)
            return f"read the {labels} standard errors in the estimates instead"
        return f"add {' or '.join(keys)} to inference"

    @property
    def fe(self) -> ModelResult:
        return self.models["fixed_effects"]

    @property
    def headline(self) -> str:
        return self.fe.headline_inference

    @property
    def clustered(self) -> bool:
        """Whether the headline inference is robust to errors correlated within clusters."""
        return self.headline in {"cluster", "wild_bootstrap"}

    def headline_p(self) -> float:
        return float(self.fe.inference[self.headline].p_values[self.focus])

    def se_ratio(self, num: str, den: str) -> float | None:
        """Ratio of two standard errors of the focus in the fixed-effects model."""
        inf = self.fe.inference
        if num not in inf or den not in inf:
            return None
        return float(inf[num].std_errors[self.focus] / inf[den].std_errors[self.focus])


def _within(design: Design, fe: ModelResult, focus: str, index: _Index) -> _Within:
    terms = tuple(fe.terms)
    x_raw = design.x[list(terms)].to_numpy(dtype=float)
    y_raw = design.y.to_numpy(dtype=float)
    d_all = index.period_dummies if design.settings.period_effects else np.zeros((len(y_raw), 0))
    x = demean(x_raw, index.unit)
    d = demean(d_all, index.unit) if d_all.shape[1] else d_all
    keep = _independent(x, d)
    d, d_raw = d[:, keep], d_all[:, keep]
    y = demean(y_raw[:, None], index.unit)[:, 0]
    fit = _cluster_fit(y, np.hstack([x, d]), index.cluster)
    return _Within(terms, terms.index(focus), y_raw, x_raw, d_raw, y, x, d, fit)


def _first_diff(design: Design, within: _Within, index: _Index) -> _FirstDiff:
    prev = index.shifted(-1)
    rows = np.flatnonzero(prev >= 0)
    if len(rows) == 0:
        raise np.linalg.LinAlgError("no unit is observed in two consecutive periods")
    before = prev[rows]
    dy = within.y_raw[rows] - within.y_raw[before]
    dx = within.x_raw[rows] - within.x_raw[before]
    if design.settings.period_effects:
        d_all = index.period_dummies
        dd = d_all[rows] - d_all[before]
        dd = dd[:, _independent(dx, dd)]
    else:
        dd = np.zeros((len(rows), 0))
    return _FirstDiff(rows, _cluster_fit(dy, np.hstack([dx, dd]), index.cluster[rows]))


def _context(
    design: Design,
    models: Mapping[str, ModelResult],
    focus: str,
    panel: pd.DataFrame | None = None,
) -> _Context:
    index = _Index.of(design)
    within: _Within | None = None
    first_diff: _FirstDiff | None = None
    missing = fd_missing = ""
    fe = models.get("fixed_effects")
    if design.absorb_periods:
        # The audit refits the fixed-effects model with period dummies as columns (and
        # its jackknife refits them without each cluster); absorbed once over the whole
        # sample they would not be re-estimated, so the checks are not guessed.
        missing = (
            f"with {index.n_periods} periods the period effects are absorbed rather than "
            "estimated as dummies, and the audit's refits need the dummies"
        )
    elif fe is None:
        missing = (
            "fixed effects were not estimated, and this check audits the fixed-effects estimate"
        )
    elif focus not in fe.terms:
        missing = (
            f"the fixed-effects model cannot estimate {focus!r} "
            f"({fe.omitted.get(focus, 'it was left out')})"
        )
    else:
        try:
            within = _within(design, fe, focus, index)
        except np.linalg.LinAlgError as exc:
            missing = f"the fixed-effects model could not be rebuilt from the within data ({exc})"
    if within is not None:
        try:
            first_diff = _first_diff(design, within, index)
        except np.linalg.LinAlgError as exc:
            fd_missing = f"first differences cannot be estimated ({exc})"
    return _Context(design, models, focus, index, within, first_diff, missing, fd_missing, panel)


def _subsample_fit(
    ctx: _Context, rows: IntArray, extra_raw: FloatArray
) -> tuple[_Fit, list[int], IntArray] | None:
    """The fixed-effects model on ``rows`` plus the columns ``extra_raw``.

    Everything is demeaned within units over ``rows`` only. Returns the fit, the
    fit's columns of the extra regressors, and which of ``extra_raw``'s columns
    they are (one without variation within units is dropped); None when no extra
    column is left. The focus keeps its column of the full model.
    """
    w = ctx.within
    assert w is not None
    unit = pd.factorize(ctx.index.unit[rows])[0].astype(np.intp)
    x = demean(w.x_raw[rows], unit)
    d = demean(w.d_raw[rows], unit) if w.d_raw.shape[1] else w.d_raw[rows]
    d = d[:, _independent(x, d)]
    e = demean(extra_raw, unit)
    keep = _independent(np.hstack([x, d]), e)
    if len(keep) == 0:
        return None
    y = demean(w.y_raw[rows][:, None], unit)[:, 0]
    X = np.hstack([x, d, e[:, keep]])
    fit = _cluster_fit(y, X, ctx.index.cluster[rows])
    first = x.shape[1] + d.shape[1]
    return fit, list(range(first, first + len(keep))), keep


def _fmt(value: float) -> str:
    return f"{value:.3g}"


# ---------------------------------------------------------------- omitted variables


def oster_delta(
    beta: float,
    *,
    beta_short: float,
    r2_short: float,
    beta_long: float,
    r2_long: float,
    r2_max: float,
    var_y: float,
    var_x: float,
    tau_x: float,
) -> float:
    r"""Oster's delta: how much selection on unobservables yields coefficient ``beta``.

    Parameters
    ----------
    beta
        The coefficient value to be explained (0 asks "what explains it away").
    beta_short, r2_short
        Coefficient and R-squared of the regression of the outcome on the focus
        regressor alone (plus whatever baseline both regressions share).
    beta_long, r2_long
        The same with every observed control added.
    r2_max
        R-squared of a hypothetical regression that also held the unobservables.
    var_y, var_x
        Variances of the outcome and of the focus regressor.
    tau_x
        Variance of the focus regressor left after the observed controls.

    Notes
    -----
    With :math:`b = \tilde\beta - \beta`, :math:`m = \mathring\beta - \tilde\beta`,
    :math:`A = \tilde R - \mathring R` and :math:`D = R_{max} - \tilde R`
    (Oster 2019, *JBES* 37(2), 187-204, Proposition 2 and its appendix):

    .. math:: \delta = \frac{b A\sigma_y^2\tau_x + b\sigma_x^2\tau_x m^2
              + 2b^2\tau_x m\sigma_x^2 + b^3(\tau_x\sigma_x^2 - \tau_x^2)}
              {D\sigma_y^2 m\sigma_x^2 + bD\sigma_y^2(\sigma_x^2 - \tau_x)
              + b^2\tau_x m\sigma_x^2 + b^3(\tau_x\sigma_x^2 - \tau_x^2)}.

    Returns ``inf`` when the denominator is zero.
    """
    b = beta_long - beta
    m = beta_short - beta_long
    a = r2_long - r2_short
    d = r2_max - r2_long
    cubic = b**3 * (tau_x * var_x - tau_x**2)
    num = b * a * var_y * tau_x + b * var_x * tau_x * m**2 + 2 * b**2 * tau_x * m * var_x + cubic
    den = d * var_y * m * var_x + b * d * var_y * (var_x - tau_x) + b**2 * tau_x * m * var_x + cubic
    return float(num / den) if den != 0 else float("inf")


def oster_beta_star(
    *,
    beta_short: float,
    r2_short: float,
    beta_long: float,
    r2_long: float,
    r2_max: float,
    var_y: float,
    var_x: float,
    tau_x: float,
) -> float:
    r"""Oster's bias-adjusted coefficient at :math:`\delta = 1`.

    Notes
    -----
    Setting :math:`\delta = 1` in `oster_delta` cancels the cubic terms and
    leaves a quadratic in :math:`b = \tilde\beta - \beta^*`,

    .. math:: \tau_x m\sigma_x^2\, b^2 + [A\sigma_y^2\tau_x + \sigma_x^2\tau_x m^2
              - D\sigma_y^2(\sigma_x^2-\tau_x)]\, b - D\sigma_y^2 m\sigma_x^2 = 0.

    The product of its roots is :math:`-D\sigma_y^2/\tau_x < 0`, so exactly one
    root has the sign of :math:`m`: the one for which the unobservables push the
    coefficient the same way as the observed controls did, as positive
    proportional selection implies (Oster 2019, Proposition 2). With no movement
    (:math:`m = 0`) or no room left (:math:`D = 0`), :math:`\beta^* = \tilde\beta`.
    """
    m = beta_short - beta_long
    a = r2_long - r2_short
    d = r2_max - r2_long
    qa = tau_x * m * var_x
    qb = a * var_y * tau_x + var_x * tau_x * m**2 - d * var_y * (var_x - tau_x)
    qc = -d * var_y * m * var_x
    if qa == 0.0 or qc == 0.0:
        return beta_long
    roots = np.roots([qa, qb, qc])
    real = roots[np.isreal(roots)].real
    same = real[np.sign(real) == np.sign(m)]
    return float(beta_long - same[0]) if len(same) else float("nan")


def _omitted_variables(ctx: _Context) -> Diagnostic:
    r"""Coefficient path and Oster's bound for the fixed-effects estimate.

    Notes
    -----
    The unit effects are the baseline of both of Oster's regressions, because
    the threat left for a fixed-effects estimate is a time-varying omitted
    variable: the "uncontrolled" regression is the within regression of the
    outcome on the focus regressor alone, the "controlled" one is the headline
    fixed-effects model (other regressors and, if configured, period effects as
    the observed controls), and every R-squared and variance is a within one.
    Computed in the usual way with the unit effects counted as controls, the
    bound would read the movement that fixed effects remove (unit-level
    confounding) as a sign of time-varying confounding and caution on designs
    that have none.
    """
    key = "omitted_variables"
    w = ctx.within
    assert w is not None
    x_all = ctx.design.x.to_numpy(dtype=float)
    j_all = list(ctx.design.x.columns).index(ctx.focus)
    y = w.y_raw
    pooled = _ssr(y, np.hstack([np.ones((len(y), 1)), x_all]))[0][1 + j_all]
    one_way = _ssr(w.y, w.x)[0][w.focus]
    d_all = ctx.index.period_dummies
    d_w = demean(d_all, ctx.index.unit) if d_all.shape[1] else d_all
    d_w = d_w[:, _independent(w.x, d_w)]
    two_way = _ssr(w.y, np.hstack([w.x, d_w]))[0][w.focus]
    path = {"pooled_ols": pooled, "unit_effects": one_way, "unit_and_period_effects": two_way}
    se = w.fit.se(w.focus)
    beta_long = float(w.fit.coef[w.focus])
    movement = {
        "coefficient_path": path,
        "movement_pooled_to_fixed_effects_in_se": (pooled - beta_long) / se,
    }
    others = np.delete(w.w, w.focus, axis=1)
    if others.shape[1] == 0:
        reason = (
            "the fixed-effects model has no control besides the unit effects (no other "
            "regressor, no period effects), so no coefficient movement scales the bound"
        )
        return Diagnostic(key, "not_run", f"Not run: {reason}.", effect=movement, reason=reason)
    n = len(w.y)
    xf = w.x[:, w.focus]
    tss = float(w.y @ w.y)
    short_coef, short_resid = _ssr(w.y, xf[:, None])
    tau_resid = xf - others @ _ssr(xf, others)[0]
    r2_long = 1.0 - float(w.fit.resid @ w.fit.resid) / tss
    inputs = {
        "beta_short": float(short_coef[0]),
        "r2_short": 1.0 - float(short_resid @ short_resid) / tss,
        "beta_long": beta_long,
        "r2_long": r2_long,
        "r2_max": min(1.0, THRESHOLDS["oster_rmax_multiplier"] * r2_long),
        "var_y": tss / n,
        "var_x": float(xf @ xf) / n,
        "tau_x": float(tau_resid @ tau_resid) / n,
    }
    delta = oster_delta(0.0, **inputs)
    beta_star = oster_beta_star(**inputs)
    bounds = sorted([beta_long, beta_star]) if np.isfinite(beta_star) else [beta_long, beta_star]
    crosses_zero = bool(np.isfinite(beta_star) and bounds[0] <= 0.0 <= bounds[1])
    fragile = abs(delta) < THRESHOLDS["oster_delta"] or crosses_zero
    controls = "the other regressors" if len(w.terms) > 1 else ""
    if w.d.shape[1]:
        controls = f"{controls} and the period effects" if controls else "the period effects"
    effect = {
        "estimate": beta_long,
        "beta_star": beta_star,
        "identified_set": bounds,
        "delta_for_zero": delta,
        "r2_max": inputs["r2_max"],
    } | movement
    details = inputs | {
        "controls": controls,
        "baseline": "unit effects in both regressions; R-squared and variances are within",
    }
    sentence = (
        f"time-varying unobservables would need {_fmt(abs(delta))} times the pull of "
        f"{controls} to explain the estimate of {ctx.focus} away, and with equal pull it "
        f"would be {_fmt(beta_star)} instead of {_fmt(beta_long)}"
    )
    if ctx.headline_p() >= ctx.alpha:
        status: Status = "ok"
        message = (
            f"The estimate of {ctx.focus} is not distinguishable from zero, so there is nothing "
            f"for omitted variables to explain away; with unobservables as important as "
            f"{controls} it would be {_fmt(beta_star)}."
        )
    elif fragile:
        status = "caution"
        message = f"Fragile to omitted variables: {sentence}."
    else:
        status = "ok"
        message = f"Robust to omitted variables by Oster's bound: {sentence}."
    return Diagnostic(key, status, message, statistic=delta, effect=effect, details=details)


# ---------------------------------------------------------------- exogeneity and form


def _strict_exogeneity(ctx: _Context) -> Diagnostic:
    key = "strict_exogeneity"
    w = ctx.within
    assert w is not None
    nxt = ctx.index.shifted(1)
    rows = np.flatnonzero(nxt >= 0)
    if len(rows) == 0:
        return _not_run(key, "no unit is observed in two consecutive periods")
    leads = w.x_raw[nxt[rows]]
    try:
        out = _subsample_fit(ctx, rows, leads)
    except np.linalg.LinAlgError as exc:
        return _not_run(key, f"the panel is too short for a lead of the regressors ({exc})")
    if out is None:
        return _not_run(key, "the next-period regressors do not vary within units")
    fit, cols, kept = out
    stat, p = fit.wald(cols)
    q = len(cols)
    effect = {
        "estimate": float(w.fit.coef[w.focus]),
        "estimate_with_leads": float(fit.coef[w.focus]),
    }
    details = {
        "reference": f"F({q}, {fit.clusters - 1})",
        "df_denominator": fit.clusters - 1,
        "covariance": fit.test_covariance,
        "nobs": fit.nobs,
        "lead_coefficients": {
            w.terms[i]: float(fit.coef[c]) for i, c in zip(kept, cols, strict=True)
        },
    }
    if p < ctx.alpha:
        status: Status = "problem"
        message = (
            "Next-period values of the regressors help predict today's outcome, so shocks to "
            "the outcome appear to feed back into later regressors and the fixed-effects "
            "estimate may be biased (strict exogeneity fails)."
        )
    else:
        status = "ok"
        message = (
            "Next-period values of the regressors do not help predict today's outcome, so "
            "the test finds no feedback from outcome shocks to later regressors."
        )
    return Diagnostic(key, status, message, stat, p, q, effect, details)


def _functional_form(ctx: _Context) -> Diagnostic:
    key = "functional_form"
    w = ctx.within
    assert w is not None
    index = w.x_raw @ w.fit.coef[: w.x.shape[1]]
    sd = float(index.std())
    if sd == 0.0:
        return _not_run(key, "the fitted values do not vary")
    z = (index - index.mean()) / sd
    powers = demean(np.column_stack([z**2, z**3]), ctx.index.unit)
    keep = _independent(w.w, powers)
    if len(keep) == 0:
        return _not_run(key, "powers of the fitted values add nothing within units")
    try:
        fit = _cluster_fit(w.y, np.hstack([w.w, powers[:, keep]]), ctx.index.cluster)
    except np.linalg.LinAlgError as exc:
        return _not_run(key, f"the augmented model cannot be fitted ({exc})")
    cols = list(range(w.w.shape[1], w.w.shape[1] + len(keep)))
    stat, p = fit.wald(cols)
    q = len(cols)
    effect = {
        "estimate": float(w.fit.coef[w.focus]),
        "estimate_with_powers": float(fit.coef[w.focus]),
    }
    details = {
        "reference": f"F({q}, {fit.clusters - 1})",
        "df_denominator": fit.clusters - 1,
        "covariance": fit.test_covariance,
        "powers": [int(2 + k) for k in keep],
    }
    if p < ctx.alpha:
        status: Status = "caution"
        message = (
            "The outcome bends with the fitted values in a way the linear model misses, so the "
            f"coefficient of {ctx.focus} is an average slope that may differ across its range; "
            "consider transformations or interactions."
        )
    else:
        status = "ok"
        message = "Squares and cubes of the fitted values add nothing, so the linear form fits."
    return Diagnostic(key, status, message, stat, p, q, effect, details)


# ---------------------------------------------------------------- measurement error


def _within_shares(design: Design, unit: IntArray) -> dict[str, float]:
    x = design.x.to_numpy(dtype=float)
    total = ((x - x.mean(axis=0)) ** 2).sum(axis=0)
    within = (demean(x, unit) ** 2).sum(axis=0)
    shares = np.divide(within, total, out=np.zeros_like(total), where=total > 0)
    return {str(c): float(s) for c, s in zip(design.x.columns, shares, strict=True)}


def _measurement_error(ctx: _Context) -> Diagnostic:
    key = "measurement_error"
    w = ctx.within
    assert w is not None
    shares = _within_shares(ctx.design, ctx.index.unit)
    share = shares[ctx.focus]
    low = share < THRESHOLDS["within_share_low"]
    b_fe, se_fe = float(w.fit.coef[w.focus]), w.fit.se(w.focus)
    effect: dict[str, Any] = {"fixed_effects": b_fe}
    details: dict[str, Any] = {
        "within_share": shares,
        "reference": f"t({ctx.index.n_clusters - 1})",
        "covariance": "CV3 jackknife of the difference",
    }
    z = p = None
    diverge = False
    if ctx.first_diff is not None:
        fd = ctx.first_diff.fit
        b_fd, se_fd = float(fd.coef[w.focus]), fd.se(w.focus)
        # Both estimates move with the same cluster shocks, so the variance of
        # their difference is the jackknife variance of the difference itself;
        # adding the two variances would be conservative.
        g = ctx.index.n_clusters
        drop_fe = w.fit.loo[:, w.focus]
        drop_fd = np.full(g, b_fd)  # a cluster with no differences leaves FD unchanged
        drop_fd[pd.unique(ctx.index.cluster[ctx.first_diff.rows])] = fd.loo[:, w.focus]
        gap = (drop_fe - drop_fd) - (b_fe - b_fd)
        se_diff = float(np.sqrt((g - 1) / g * np.nansum(gap**2)))
        z = (b_fe - b_fd) / se_diff
        p = float(2.0 * t_sf(abs(z), g - 1))
        diverge = p < ctx.alpha
        effect |= {"first_difference": b_fd, "difference": b_fe - b_fd}
        details |= {
            "se_fixed_effects": se_fe,
            "se_first_difference": se_fd,
            "se_difference": se_diff,
            "z_conservative": (b_fe - b_fd) / float(np.hypot(se_fe, se_fd)),
        }
    else:
        details["first_difference"] = ctx.fd_missing
    share_text = f"{share:.0%} of the variance of {ctx.focus} is within units"
    if diverge:
        status: Status = "caution"
        message = (
            f"Fixed effects ({_fmt(b_fe)}) and first differences "
            f"({_fmt(effect['first_difference'])}) disagree beyond sampling error "
            f"(z = {_fmt(float(z or 0))}) and {share_text}; "
            "measurement error in the regressor attenuates the two differently, though feedback "
            "or dynamics can do the same."
        )
    elif low:
        status = "caution"
        message = (
            f"Only {share_text}, so any measurement error in it is magnified by the fixed-effects "
            "transformation and may bias the estimate towards zero."
        )
    elif z is None:
        status = "ok"
        message = (
            f"{share_text[0].upper()}{share_text[1:]}, enough that measurement error is not "
            "unduly magnified by fixed effects (first differences could not be compared)."
        )
    else:
        status = "ok"
        message = (
            f"{share_text[0].upper()}{share_text[1:]} and fixed effects and first differences "
            "agree within sampling error, so there is no sign of attenuation from measurement "
            "error."
        )
    return Diagnostic(key, status, message, z, p, None, effect, details)


# ---------------------------------------------------------------- attrition


def _attrition(ctx: _Context) -> Diagnostic:
    key = "attrition"
    w = ctx.within
    assert w is not None
    ix = ctx.index
    t = ix.n_periods
    frame = pd.DataFrame({"u": ix.unit, "t": ix.period}).groupby("u")["t"]
    first, last, count = frame.min().to_numpy(), frame.max().to_numpy(), frame.size().to_numpy()
    pattern = {
        "units": ix.n_units,
        "periods": t,
        "complete_units": int((count == t).sum()),
        "units_dropping_out": int((last < t - 1).sum()),
        "units_entering_late": int((first > 0).sum()),
        "units_with_gaps": int((count < last - first + 1).sum()),
        "missing_unit_periods": int(ix.n_units * t - len(ix.unit)),
    }
    details: dict[str, Any] = {"pattern": pattern, "presence": "in the estimation sample"}
    loss = ctx.loss
    lost = ""
    if loss is not None and loss.dropped.any():
        c = loss.counts()
        lost = (
            f"{c['rows_dropped']} rows of {c['units_with_dropped_rows']} units were dropped for "
            "missing values"
        )
    if pattern["complete_units"] == ix.n_units:
        if lost:
            message = (
                f"Each of the {ix.n_units} units used is in every period of the rows used, so no "
                f"unit leaves them; {lost} before estimation (see the missing-data check)."
            )
        else:
            message = (
                "The panel is balanced: every unit is observed in every period, so there is no "
                "attrition to test."
            )
        return Diagnostic(key, "ok", message, details=details)
    # Rows whose next calendar period is observed for somebody: presence in a
    # period nobody has says nothing about this unit.
    rows = np.flatnonzero(ix.has_period(1))
    present = (ix.shifted(1)[rows] >= 0).astype(float)[:, None]
    parts = [
        f"{n} unit(s) {what}"
        for n, what in (
            (pattern["units_dropping_out"], "drop out"),
            (pattern["units_entering_late"], "enter late"),
            (pattern["units_with_gaps"], "have gaps"),
        )
        if n
    ]
    summary = ", ".join(parts[:-1]) + (" and " if len(parts) > 1 else "") + parts[-1]
    if lost:
        summary = f"After {lost}, {summary} in the rows used"
    try:
        out = _subsample_fit(ctx, rows, present)
    except np.linalg.LinAlgError as exc:
        return _not_run(key, f"{summary}, but the selection test cannot be fitted ({exc})")
    if out is None:
        return Diagnostic(
            key,
            "ok",
            f"{summary}, but presence in the next period never changes within a unit, so the "
            "selection test does not apply.",
            details=details,
        )
    fit, cols, _ = out
    tstat, p_test = fit.t_test(cols[0])
    changing = int(np.unique(ix.unit[rows][present[:, 0] == 0]).size)
    details |= {
        "presence_coefficient": float(fit.coef[cols[0]]),
        "nobs": fit.nobs,
        "units_with_presence_change": changing,
        "reference": f"t({fit.clusters - 1})",
        "covariance": fit.test_covariance,
        "p_value_t_test": p_test,
    }
    # Presence often changes in a handful of clusters only, where cluster-robust
    # t-tests reject too often; the restricted wild bootstrap errs on the safe
    # side (MacKinnon & Webb 2017). The test rejects only when both reject, so
    # the bootstrap runs only when the t-test does.
    p = p_test
    if p_test < ctx.alpha and ix.nested():
        try:
            boot = wild_cluster_bootstrap(
                fit.y,
                fit.X,
                fit.codes,
                term_index=cols[0],
                term="present_next_period",
                draws=int(THRESHOLDS["bootstrap_draws"]),
                seed=ctx.design.settings.bootstrap.seed,
            )
        except ValueError as exc:
            details["wild_bootstrap"] = f"not run: {exc}"
        else:
            p = max(p_test, boot.p_value)
            details["p_value_wild_bootstrap"] = boot.p_value
    effect = {
        "estimate": float(w.fit.coef[w.focus]),
        "estimate_with_presence": float(fit.coef[w.focus]),
    }
    if p < ctx.alpha:
        status: Status = "problem"
        message = (
            f"{summary}, and whether a unit is still observed next period is related to its "
            "outcome shocks, so selective attrition may bias the fixed-effects estimate."
        )
    else:
        status = "ok"
        message = (
            f"{summary}, but presence next period is unrelated to the outcome shocks, so the "
            "attrition looks ignorable for the fixed-effects estimate."
        )
    return Diagnostic(key, status, message, tstat, p, fit.clusters - 1, effect, details)


# ---------------------------------------------------------------- missing values


@dataclass(frozen=True)
class _Loss:
    """The rows loaded, which of them estimation dropped, and why.

    ``gone`` marks, per row of the validated panel, a missing value in each of
    ``columns`` (the outcome first, then the regressors); a row with any is
    dropped by every estimator (`panelpipe.estimate.make_design`).
    """

    columns: tuple[str, ...]
    gone: npt.NDArray[np.bool_]
    unit: IntArray
    period: IntArray
    cluster: IntArray
    n_periods: int
    rows_used: int
    units_used: int

    @classmethod
    def of(cls, panel: pd.DataFrame, design: Design) -> _Loss:
        s = design.settings
        columns = (s.outcome, *s.regressors)
        unit = pd.factorize(panel[s.unit].astype(str).to_numpy(dtype=object), sort=True)[0]
        period, levels = pd.factorize(panel[s.period].to_numpy(), sort=True)
        return cls(
            columns,
            panel[list(columns)].isna().to_numpy(),
            unit.astype(np.intp),
            period.astype(np.intp),
            pd.factorize(panel[s.cluster_by[0]].astype(str).to_numpy(dtype=object))[0].astype(
                np.intp
            ),
            len(levels),
            design.nobs,
            len(design.unit_names),
        )

    @cached_property
    def dropped(self) -> npt.NDArray[np.bool_]:
        return np.asarray(self.gone.any(axis=1), dtype=bool)

    def units_of(self, rows: npt.NDArray[np.bool_]) -> int:
        return int(np.unique(self.unit[rows]).size)

    def counts(self) -> dict[str, int]:
        return {
            "rows_loaded": len(self.unit),
            "units_loaded": self.units_of(np.ones(len(self.unit), dtype=bool)),
            "rows_dropped": int(self.dropped.sum()),
            "units_with_dropped_rows": self.units_of(self.dropped),
            "rows_used": self.rows_used,
            "units_used": self.units_used,
        }

    def by_reason(self) -> dict[str, dict[str, int]]:
        """Rows and units missing each column (a row may miss several)."""
        return {
            c: {"rows": int(self.gone[:, j].sum()), "units": self.units_of(self.gone[:, j])}
            for j, c in enumerate(self.columns)
        }

    def next_row(self) -> IntArray:
        """Row of the same unit in the panel's next period, or -1."""
        t = self.n_periods
        table = np.full((int(self.unit.max()) + 1) * t, -1, dtype=np.intp)
        key = self.unit * t + self.period
        table[key] = np.arange(len(key))
        out = np.full(len(key), -1, dtype=np.intp)
        ok = self.period + 1 < t
        out[ok] = table[key[ok] + 1]
        return out

    def sentence(self) -> str:
        """How many rows were dropped and why, and what was left."""
        c = self.counts()
        reasons = ", ".join(
            f"{r['rows']} for a missing {col}" for col, r in self.by_reason().items() if r["rows"]
        )
        return (
            f"{c['rows_dropped']} of {c['rows_loaded']} rows were dropped for missing values "
            f"({reasons}), leaving {c['rows_used']} rows of {c['units_used']} of the "
            f"{c['units_loaded']} units"
        )


def _period_dummies(period: IntArray) -> FloatArray:
    """A dummy for every period code but the lowest one present."""
    codes = pd.factorize(period, sort=True)[0]
    d = np.zeros((len(codes), max(int(codes.max(initial=0)), 0)))
    rows = np.flatnonzero(codes > 0)
    d[rows, codes[rows] - 1] = 1.0
    return d


def _indicator_test(
    indicator: FloatArray,
    covariates: FloatArray,
    controls: FloatArray,
    clusters: IntArray,
) -> tuple[float, float, int, _Fit] | None:
    """Wald F that ``covariates`` do not predict ``indicator`` given ``controls``.

    A linear probability model with a cluster-robust (CV3, else CR1) covariance.
    The Wald statistic W/q is scaled by (G-q)/(G-1) and referred to F(q, G-q),
    Hotelling's T-squared correction for a covariance estimated from G cluster
    sums (common practice for cluster-robust Wald tests, e.g. Cameron & Miller
    2015); with one covariate it is the t-test against t(G-1). None when the
    indicator does not vary or nothing is testable.
    """
    if indicator.min() == indicator.max():
        return None
    keep = _independent(controls, covariates)
    if len(keep) == 0:
        return None
    first, q = controls.shape[1], len(keep)
    try:
        fit = _cluster_fit(indicator, np.hstack([controls, covariates[:, keep]]), clusters)
    except np.linalg.LinAlgError:
        return None
    g = fit.clusters
    if g <= q:
        return None
    wald, _ = fit.wald(list(range(first, first + q)))
    stat = wald * (g - q) / (g - 1)
    return stat, float(f_sf(stat, q, g - q)), q, fit


def _selection_tests(ctx: _Context, loss: _Loss) -> dict[str, dict[str, Any]]:
    """The three tests of `_missing_data` that apply, by name."""
    s = ctx.design.settings
    panel = ctx.panel
    assert panel is not None
    values = panel[list(loss.columns)].to_numpy(dtype=float)
    out: dict[str, dict[str, Any]] = {}

    def controls(rows: npt.NDArray[np.bool_], within: bool) -> FloatArray:
        d = _period_dummies(loss.period[rows]) if s.period_effects else np.zeros((rows.sum(), 0))
        if within:
            return demean(d, pd.factorize(loss.unit[rows])[0].astype(np.intp)) if d.size else d
        return np.hstack([np.ones((int(rows.sum()), 1)), d])

    # Rows with every regressor observed: does missing the outcome go with the
    # regressors' values? Pooled (no unit effects), so that units whose regressors
    # are high throughout and whose outcome goes missing more often are compared too.
    rows = np.asarray(~loss.gone[:, 1:].any(axis=1), dtype=bool)
    if rows.any():
        res = _indicator_test(
            loss.gone[rows, 0].astype(float),
            values[rows, 1:],
            controls(rows, False),
            loss.cluster[rows],
        )
        if res is not None:
            out["outcome_missing_on_regressors"] = _test_entry(res, "pooled, period effects")
    # Rows with the outcome observed: does missing a regressor go with the outcome?
    # Unit effects where the indicator varies within units, pooled otherwise.
    rows = np.asarray(~loss.gone[:, 0], dtype=bool)
    if rows.any() and loss.gone[rows, 1:].any():
        flag = loss.gone[rows, 1:].any(axis=1).astype(float)
        unit = pd.factorize(loss.unit[rows])[0].astype(np.intp)
        within = not constant_within(flag, unit)
        y = values[rows, :1]
        res = _indicator_test(
            demean(flag[:, None], unit)[:, 0] if within else flag,
            demean(y, unit) if within else y,
            controls(rows, within),
            loss.cluster[rows],
        )
        if res is not None:
            how = "unit and period effects" if within else "pooled, period effects"
            out["regressor_missing_on_outcome"] = _test_entry(res, how)
    # Wooldridge (2010, §19.9): in the fixed-effects model on the rows used, is
    # losing the unit's next row to a missing value related to today's shock?
    if ctx.within is not None:
        key = pd.MultiIndex.from_arrays(
            [panel[s.unit].astype(str).to_numpy(dtype=object), panel[s.period].to_numpy()]
        )
        position = key.get_indexer(
            pd.MultiIndex.from_arrays([ctx.design.units, ctx.design.periods])
        )
        nxt = loss.next_row()[position]
        used = np.flatnonzero(nxt >= 0)
        if len(used):
            lost_next = loss.dropped[nxt[used]].astype(float)[:, None]
            try:
                fitted = _subsample_fit(ctx, used, lost_next)
            except np.linalg.LinAlgError:
                fitted = None
            if fitted is not None:
                fit, cols, _ = fitted
                t, p = fit.t_test(cols[0])
                out["next_row_lost_in_fixed_effects"] = {
                    "statistic": t,
                    "p_value": p,
                    "df": 1,
                    "reference": f"t({fit.clusters - 1})",
                    "covariance": fit.test_covariance,
                    "model": "fixed effects on the rows used",
                    "nobs": fit.nobs,
                    "coefficient": float(fit.coef[cols[0]]),
                    "estimate_with_indicator": float(fit.coef[ctx.within.focus]),
                }
    return out


def _test_entry(res: tuple[float, float, int, _Fit], model: str) -> dict[str, Any]:
    stat, p, q, fit = res
    return {
        "statistic": stat,
        "p_value": p,
        "df": q,
        "reference": f"F({q}, {fit.clusters - q})",
        "covariance": fit.test_covariance,
        "model": f"linear probability, {model}",
        "nobs": fit.nobs,
    }


def _by_estimator(design: Design, loss: _Loss) -> dict[str, dict[str, Any]]:
    """Rows each configured estimator uses, and why it lost the others."""
    dropped = int(loss.dropped.sum())
    why_missing = f"{dropped} rows with a missing outcome or regressor"
    out: dict[str, dict[str, Any]] = {}
    for key in design.settings.estimators:
        if key == "first_difference":
            out[key] = {
                "rows_used": len(first_difference_rows(design)),
                "lost": f"{why_missing}, and each row whose previous period is not among the "
                "rows used (a difference needs both)",
            }
        elif key == "between":
            out[key] = {
                "rows_used": len(design.unit_names),
                "lost": f"{why_missing}; one mean per unit",
            }
        else:
            out[key] = {"rows_used": design.nobs, "lost": why_missing}
    return out


def _missing_data(ctx: _Context) -> Diagnostic:
    r"""Rows lost to missing values, and whether the lost rows differ from those used.

    Notes
    -----
    Missing values inside the span are a selection problem like exit
    (Wooldridge 2010, §19.9; Wooldridge 2007, *J. Econometrics* 141, on
    selection on observables and inverse-probability weighting). Up to three
    tests, each a regression with a cluster-robust (CV3, else CR1) covariance:

    1. rows with every regressor observed: an indicator of a missing outcome on
       the regressors (linear probability, period effects, no unit effects),
       Wald F(K, G-1): do the dropped rows differ in their regressors?
    2. rows with the outcome observed: an indicator of a missing regressor on the
       outcome, with unit effects when the indicator varies within units, F(1, G-1):
       do they differ in their outcome path?
    3. the variable-addition test of Wooldridge (2010, §19.9) and Nijman & Verbeek
       (1992): the fixed-effects model on the rows used with an indicator that
       the unit's next row was dropped, t(G-1): is losing rows related to the
       outcome shocks, which biases fixed effects?

    Each test is judged at alpha/m for the m tests run (Bonferroni), so the check
    flags about alpha of the panels whose values are missing at random. Test 3
    rejecting is a ``problem``; tests 1 or 2 rejecting a ``caution`` (selection on
    what is observed leaves fixed effects consistent when the effect is the same
    for every row, but the estimate then describes the rows used).
    """
    key = "missing_data"
    loss = ctx.loss
    if loss is None:
        return _not_run(key, "the audit was given the estimation sample only, not the rows loaded")
    design = ctx.design
    periods = design.periods
    details: dict[str, Any] = {
        "loss": loss.counts(),
        "by_reason": loss.by_reason(),
        "by_estimator": _by_estimator(design, loss),
        "sample_used": {
            "rows": design.nobs,
            "units": len(design.unit_names),
            "periods": int(periods.nunique()),
            "first_period": str(periods.min()) if len(periods) else None,
            "last_period": str(periods.max()) if len(periods) else None,
        },
    }
    if not loss.dropped.any():
        reason = "no row has a missing outcome or regressor, so no row was dropped"
        return Diagnostic(key, "not_run", f"Not run: {reason}.", details=details, reason=reason)
    tests = _selection_tests(ctx, loss)
    details["tests"] = tests
    lost = loss.sentence()
    if not tests:
        return Diagnostic(
            key,
            "caution",
            f"{lost}; no test of whether they differ from the rows used could be fitted, so "
            "treat the estimate as describing the rows used only.",
            details=details,
        )
    m = len(tests)
    adjusted = {k: min(1.0, m * float(t["p_value"])) for k, t in tests.items()}
    details["p_value_adjustment"] = f"Bonferroni over {m} test(s)"
    lowest = min(adjusted, key=lambda k: adjusted[k])
    rejects = {k for k, p in adjusted.items() if p < ctx.alpha}
    differs = [
        what
        for k, what in (
            ("outcome_missing_on_regressors", "their regressors"),
            ("regressor_missing_on_outcome", "their outcome"),
        )
        if k in rejects
    ]
    if "next_row_lost_in_fixed_effects" in rejects:
        status: Status = "problem"
        message = (
            f"{lost}; losing a unit's next row is related to its outcome shocks, so the missing "
            "values may bias the fixed-effects estimate (weighting the rows used by the inverse "
            "of their chance of being observed is one remedy)."
        )
    elif differs:
        status = "caution"
        message = (
            f"{lost}; the dropped rows differ from the rows used in {' and '.join(differs)}, so "
            "the estimate describes the rows used rather than every row loaded."
        )
    else:
        status = "ok"
        message = (
            f"{lost}; the dropped rows do not differ detectably from the rows used, so the "
            "missing values look ignorable for the estimate."
        )
    best = tests[lowest]
    effect = {"rows_used_share": loss.rows_used / len(loss.unit)}
    if "next_row_lost_in_fixed_effects" in tests:
        effect["estimate_with_indicator"] = tests["next_row_lost_in_fixed_effects"][
            "estimate_with_indicator"
        ]
    details["reference"] = best["reference"]
    return Diagnostic(
        key, status, message, best["statistic"], adjusted[lowest], best["df"], effect, details
    )


def missing_data_audit(
    panel: pd.DataFrame,
    design: Design,
    models: Mapping[str, ModelResult],
    *,
    focus: str | None = None,
) -> Diagnostic:
    """The ``missing_data`` check alone (see `run_audit`).

    Parameters
    ----------
    panel
        The validated panel, before rows with missing values were dropped.
    design, models, focus
        As for `run_audit`.
    """
    focus = design.settings.regressors[0] if focus is None else focus
    return _missing_data(_context(design, models, focus, panel))


# ---------------------------------------------------------------- error structure


def _se_consequence(
    ctx: _Context, what: str, remedy: str, *, also_handled_by: str = "", effect: str = "unreliable"
) -> tuple[Status, str]:
    """Status and the sentence on standard errors, given the headline inference.

    ``caution`` when the headline inference already allows for the problem
    (clustered, or ``also_handled_by``), ``problem`` otherwise.
    """
    if ctx.clustered or ctx.headline == also_handled_by:
        return "caution", (
            f"{what}, so classical standard errors are {effect}; the headline's "
            f"{INFERENCE_LABELS.get(ctx.headline, ctx.headline)} inference allows for this."
        )
    return "problem", (
        f"{what}, so the headline's {INFERENCE_LABELS.get(ctx.headline, ctx.headline)} "
        f"standard errors are {effect}; {remedy}."
    )


def _bounded(
    details: dict[str, Any], name: str, value: float, bounds: tuple[float, float], reason: str
) -> float | None:
    """``value`` when it lies within ``bounds``; else None, with ``reason`` in details.

    A statistic outside its possible range (a correlation above one, a share
    below zero) comes from a model that does not fit the data; it is reported as
    not computable, never printed.
    """
    if np.isfinite(value) and bounds[0] <= value <= bounds[1]:
        return value
    details.setdefault("not_computable", {})[name] = reason
    return None


def _serial_correlation(ctx: _Context) -> Diagnostic:
    key = "serial_correlation"
    if ctx.first_diff is None:
        return _not_run(key, ctx.fd_missing)
    ix = ctx.index
    fd = ctx.first_diff
    position = np.full(len(ix.unit), -1, dtype=np.intp)
    position[fd.rows] = np.arange(len(fd.rows))
    prev = ix.shifted(-1)[fd.rows]
    lag = np.where(prev >= 0, position[np.maximum(prev, 0)], -1)
    ok = lag >= 0
    if ok.sum() < 3:
        return _not_run(key, "it needs units observed in three consecutive periods")
    r = fd.fit.resid
    X = np.column_stack([np.ones(int(ok.sum())), r[lag[ok]]])
    try:
        fit = _cluster_fit(r[ok], X, ix.cluster[fd.rows[ok]])
    except np.linalg.LinAlgError as exc:
        return _not_run(key, f"the residual regression cannot be fitted ({exc})")
    rho = float(fit.coef[1])
    tstat, p = fit.t_test(1, null=-0.5)
    details: dict[str, Any] = {
        "reference": f"t({fit.clusters - 1})",
        "covariance": fit.test_covariance,
        "null": -0.5,
        "nobs": fit.nobs,
    }
    # Errors u_t = phi u_(t-1) + e_t with |phi| <= 1 give differences whose
    # autocorrelation is -(1 - phi)/2, between -1 and 0; phi = 1 + 2 rho.
    implied = _bounded(
        details,
        "implied_ar1_of_errors",
        1.0 + 2.0 * rho,
        (-1.0, 1.0),
        f"the differenced residuals' autocorrelation {_fmt(rho)} is not between -1 and 0, "
        "the range errors with first-order autocorrelation give, so it implies no "
        "autocorrelation of the errors",
    )
    effect: dict[str, Any] = {
        "fd_residual_autocorrelation": rho,
        "implied_ar1_of_errors": implied,
        "se_ratio_cluster_to_classical": ctx.se_ratio("cluster", "classical"),
    }
    if p < ctx.alpha:
        size = (
            f"implied autocorrelation {_fmt(implied)}"
            if implied is not None
            else f"the differenced residuals' autocorrelation is {_fmt(rho)}, against -0.5 "
            "for independent errors"
        )
        status, message = _se_consequence(
            ctx,
            f"Errors are correlated over time within units ({size})",
            ctx.remedy("cluster", "driscoll_kraay"),
            effect="too small" if rho > -0.5 else "too large",
        )
    else:
        status = "ok"
        message = (
            "No sign that errors are correlated over time within units, so classical and "
            "clustered standard errors should agree in this respect."
        )
    return Diagnostic(key, status, message, tstat, p, fit.clusters - 1, effect, details)


@dataclass(frozen=True)
class CrossSectionalDependence:
    """The CD test of `pesaran_cd`.

    Parameters
    ----------
    statistic
        The pair sum standardised by its exact null standard deviation; N(0, 1)
        when errors are independent across units. This is the one tested.
    pesaran
        Pesaran's CD itself (exact on balanced panels, the pair-weighted
        approximation on unbalanced ones); its null variance is about
        T/(T-1), so it rejects a little too often in short panels.
    units
        Units used: observed in at least two periods, residuals not all zero.
    pair_periods
        :math:`\\sum_{i<j} T_{ij}`, the unit pairs times the periods they share.
    mean_correlation
        Average residual correlation over pairs, each weighted by its shared periods.
    """

    statistic: float
    pesaran: float
    units: int
    pair_periods: int
    mean_correlation: float


def _pair_sum(f: FloatArray, g: FloatArray, period: IntArray) -> float:
    r""":math:`\sum_{i \ne j} f_i g_j T_{ij}` from period sums, O(NT) (f, g per row)."""
    sf = np.bincount(period, weights=f)
    sg = np.bincount(period, weights=g)
    sfg = np.bincount(period, weights=f * g)
    return float((sf * sg - sfg).sum())


def pesaran_cd(resid: FloatArray, unit: IntArray, period: IntArray) -> CrossSectionalDependence:
    r"""Pesaran's CD test of cross-sectional dependence in O(NT), balanced or not.

    Parameters
    ----------
    resid
        Residuals with mean zero within each unit (fixed-effects residuals).
    unit, period
        Integer codes (0, 1, ...) of each residual's unit and period.

    Notes
    -----
    Pesaran (2004; 2015, *Econometric Reviews* 34(6-10)) defines
    :math:`CD = \sqrt{2/(N(N-1))}\sum_{i<j}\sqrt{T_{ij}}\,\hat\rho_{ij}`.
    Standardise each unit's residuals over its own :math:`T_i` periods,
    :math:`z_{it} = e_{it}/s_i` with :math:`s_i^2 = T_i^{-1}\sum_t e_{it}^2`, and let
    :math:`S_t = \sum_i z_{it}`, :math:`Q_t = \sum_i z_{it}^2` and :math:`n_t` the
    number of units in period t. Then

    .. math:: C = \sum_{i<j}\sum_{t\in T_{ij}} z_{it}z_{jt} = \tfrac12\sum_t(S_t^2-Q_t),
              \qquad \sum_{i<j}T_{ij} = \tfrac12\sum_t(n_t^2-n_t),

    both O(NT). On a balanced panel :math:`\hat\rho_{ij} = T^{-1}\sum_t z_{it}z_{jt}`
    and :math:`CD = C/\sqrt{\sum_{i<j}T_{ij}}` exactly. On an unbalanced panel a
    pair is formed over the periods both units share, each unit standardised over
    all its own periods (not recentred on the shared ones), and pairs are weighted
    by :math:`T_{ij}` instead of :math:`\sqrt{T_{ij}}`: an approximation of
    Pesaran's unbalanced CD, reported as ``pesaran``.

    The tested ``statistic`` divides C by its exact null standard deviation
    instead. Demeaning makes :math:`E[z_{it}z_{is}] = k_i(\delta_{ts} - 1/T_i)`
    with :math:`k_i = T_i/(T_i-1)`, so for independent units

    .. math:: V = \sum_{i<j} k_ik_j\Big[T_{ij}\big(1-\tfrac1{T_i}-\tfrac1{T_j}\big)
              + \tfrac{T_{ij}^2}{T_iT_j}\Big],

    :math:`N(N-1)T^2/(2(T-1))` when balanced, where Pesaran's CD assumes
    :math:`N(N-1)T/2`. Each sum over pairs is a sum over periods of unit weights,
    O(NT); the last term uses :math:`T_{ij}^2/(T_iT_j) \le T_{ij}/\sqrt{T_iT_j}`,
    exact when balanced and slightly conservative otherwise.
    """
    t_i = np.bincount(unit).astype(float)
    ss = np.bincount(unit, weights=resid**2, minlength=len(t_i))
    usable = (t_i >= 2) & (ss > 0)
    rows = usable[unit]
    u, per = unit[rows], period[rows]
    z = resid[rows] / np.sqrt(ss[u] / t_i[u])
    total = 0.5 * _pair_sum(z, z, per)
    ones = np.ones(len(u))
    pairs_t = 0.5 * _pair_sum(ones, ones, per)
    if pairs_t <= 0:
        nan = float("nan")
        return CrossSectionalDependence(nan, nan, int(usable.sum()), 0, nan)
    k = (t_i / np.maximum(t_i - 1, 1))[u]
    a = k / t_i[u]
    b = k / np.sqrt(t_i[u])
    variance = 0.5 * _pair_sum(k, k, per) - _pair_sum(a, k, per) + 0.5 * _pair_sum(b, b, per)
    return CrossSectionalDependence(
        statistic=total / float(np.sqrt(variance)),
        pesaran=total / float(np.sqrt(pairs_t)),
        units=int(usable.sum()),
        pair_periods=round(pairs_t),
        mean_correlation=total / pairs_t,
    )


def _cross_sectional_dependence(ctx: _Context) -> Diagnostic:
    key = "cross_sectional_dependence"
    w = ctx.within
    assert w is not None
    # After period effects the residuals sum to zero in every period, which pins
    # the average correlation at -1/(N-1) and leaves CD with no power and a bias
    # of about -sqrt(T/2) (Juodis & Reese 2022); the test therefore looks at
    # the residuals before period effects are removed.
    period_effects = w.d.shape[1] > 0
    resid = _ssr(w.y, w.x)[1] if period_effects else w.fit.resid
    cd = pesaran_cd(resid, ctx.index.unit, ctx.index.period)
    if not np.isfinite(cd.statistic):
        return _not_run(key, "no two units share a period")
    p = float(2.0 * norm_sf(abs(cd.statistic)))
    details: dict[str, Any] = {
        "reference": "N(0, 1)",
        "pesaran_cd": cd.pesaran,
        "units": cd.units,
        "pair_periods": cd.pair_periods,
        "residuals": "fixed effects with unit effects only" if period_effects else "fixed effects",
    }
    effect = {
        "mean_correlation": _bounded(
            details,
            "mean_correlation",
            cd.mean_correlation,
            (-1.0, 1.0),
            f"the pair-weighted average {_fmt(cd.mean_correlation)} is not between -1 and 1 "
            "(units standardised over their own periods share too few of them)",
        ),
        "se_ratio_driscoll_kraay_to_cluster": ctx.se_ratio("driscoll_kraay", "cluster"),
    }
    if p >= ctx.alpha:
        return Diagnostic(
            key,
            "ok",
            "No sign that errors are correlated across units within periods, so clustering by "
            "unit is adequate in this respect.",
            cd.statistic,
            p,
            None,
            effect,
            details,
        )
    remedy = ctx.remedy("driscoll_kraay")
    if period_effects:
        status: Status = "caution"
        message = (
            "Errors share shocks across units within periods; the period effects absorb the part "
            "that hits all units alike, but if units respond unequally, standard errors "
            f"clustered by unit are too small ({remedy})."
        )
    else:
        status = "problem"
        message = (
            "Errors share shocks across units within periods, so standard errors clustered by "
            f"unit are too small; add period effects and {remedy}."
        )
    return Diagnostic(key, status, message, cd.statistic, p, None, effect, details)


def groupwise_heteroskedasticity(resid: FloatArray, unit: IntArray) -> tuple[float, int]:
    r"""LM statistic that every unit has the same error variance, and its df.

    Parameters
    ----------
    resid
        Fixed-effects residuals (mean zero within each unit).
    unit
        Integer code of each residual's unit.

    Notes
    -----
    Greene's LM test for groupwise heteroskedasticity (*Econometric Analysis*,
    section on groupwise heteroscedasticity),
    :math:`LM = \sum_i \tfrac{T_i}{2}(s_i^2/s^2 - 1)^2 \sim \chi^2_{n-1}`, assumes
    normal errors and unit means that are known. Two changes make it fit
    fixed-effects residuals: each unit loses one degree of freedom to its
    effect, so :math:`\tilde e_{it}^2 = e_{it}^2 T_i/(T_i-1)`,
    :math:`s_i^2 = T_i^{-1}\sum_t \tilde e_{it}^2`, weights :math:`\nu_i = T_i-1`
    and :math:`\bar s^2 = \sum_i\nu_i s_i^2/\sum_i\nu_i`; and the factor
    :math:`2\bar s^4` (the variance of a squared normal error) is replaced by the
    sample variance :math:`\hat v` of :math:`\tilde e_{it}^2`, a studentisation in
    the spirit of Koenker (1981) that drops the normality assumption:

    .. math:: LM = \sum_i \nu_i (s_i^2 - \bar s^2)^2 / \hat v \sim \chi^2_{n-1}.

    Units observed once carry no residual and are left out.
    """
    t_i = np.bincount(unit).astype(float)
    usable = t_i >= 2
    rows = usable[unit]
    nu = t_i - 1
    scaled = resid[rows] ** 2 * (t_i / np.where(usable, nu, 1.0))[unit[rows]]
    s2 = np.bincount(unit[rows], weights=scaled, minlength=len(t_i))[usable] / t_i[usable]
    nu_u = nu[usable]
    mean = float((nu_u * s2).sum() / nu_u.sum())
    v = float(scaled.var())
    lm = float((nu_u * (s2 - mean) ** 2).sum() / v) if v > 0 else 0.0
    return lm, int(usable.sum()) - 1


def _heteroskedasticity(ctx: _Context) -> Diagnostic:
    key = "heteroskedasticity"
    w = ctx.within
    assert w is not None
    lm, df = groupwise_heteroskedasticity(w.fit.resid, ctx.index.unit)
    if df < 1:
        return _not_run(key, "it needs at least two units observed in two or more periods")
    p = float(chi2_sf(lm, df))
    effect = {
        "se_ratio_robust_to_classical": ctx.se_ratio("robust", "classical"),
        "se_ratio_cluster_to_classical": ctx.se_ratio("cluster", "classical"),
    }
    details = {"reference": f"chi2({df})"}
    if p < ctx.alpha:
        status, message = _se_consequence(
            ctx,
            "The error variance differs across units",
            ctx.remedy("robust", "cluster"),
            also_handled_by="robust",
        )
    else:
        status = "ok"
        message = (
            "No sign that the error variance differs across units, so classical standard "
            "errors are not distorted by it."
        )
    return Diagnostic(key, status, message, lm, p, df, effect, details)


# ---------------------------------------------------------------- clusters


def _few_clusters(ctx: _Context) -> Diagnostic:
    key = "few_clusters"
    clusters = ctx.design.clusters
    counts = {str(c): int(clusters[c].nunique()) for c in clusters.columns}
    ix = ctx.index
    g = min(counts.values())
    sizes = np.bincount(ix.cluster, minlength=ix.n_clusters)
    largest = int(sizes.argmax())
    share = float(sizes[largest] / sizes.sum())
    details: dict[str, Any] = {
        "clusters": counts,
        "size_min": int(sizes.min()),
        "size_median": float(np.median(sizes)),
        "size_max": int(sizes.max()),
        "largest_cluster": str(ix.cluster_labels[largest]),
        "largest_share": share,
        "sizes_of": str(clusters.columns[0]),
    }
    dominant = share > THRESHOLDS["dominant_cluster_share"]
    effect: dict[str, Any] = {}
    if g < THRESHOLDS["few_clusters"] or g < THRESHOLDS["clusters_caution"] or dominant:
        effect = _bootstrap_effect(ctx, details)
    if g < THRESHOLDS["few_clusters"]:
        status: Status = "problem"
        message = (
            f"Only {g} clusters: cluster-robust standard errors and tests are unreliable with "
            f"so few; {_bootstrap_advice(ctx, effect, details)}."
        )
    elif g < THRESHOLDS["clusters_caution"] or dominant:
        status = "caution"
        message = (
            f"{g} clusters"
            + (f", the largest holding {share:.0%} of the rows" if dominant else "")
            + ": cluster-robust inference may be somewhat optimistic; "
            + f"{_bootstrap_advice(ctx, effect, details)}."
        )
    else:
        status = "ok"
        message = (
            f"{g} clusters, the largest holding {share:.0%} of the rows: enough for "
            "cluster-robust standard errors."
        )
    return Diagnostic(key, status, message, float(g), None, None, effect, details)


def _p_text(p: float) -> str:
    """A p-value as text: "< 0.001" below that (a bootstrap p-value of 0 is not exact)."""
    return "< 0.001" if p < 0.001 else f"= {_fmt(p)}"


def _bootstrap_advice(ctx: _Context, effect: Mapping[str, Any], details: Mapping[str, Any]) -> str:
    """What to read instead of the clustered p-value: only a bootstrap that was run."""
    if not effect:
        why = str(details.get("wild_bootstrap", "")).removeprefix("not run: ")
        return f"add wild_bootstrap to inference (the audit could not run one: {why})"
    p, cp = (_p_text(effect[k]) for k in ("wild_bootstrap_p_value", "cluster_p_value"))
    quoted = f"p {p} for {ctx.focus} against {cp} clustered"
    if details.get("wild_bootstrap") == "from the estimation stage":
        return f"compare the wild cluster bootstrap of the estimates ({quoted})"
    draws = int(THRESHOLDS["bootstrap_draws"])
    return (
        f"the audit's own wild cluster bootstrap ({draws} draws) gives {quoted}; add "
        "wild_bootstrap to inference to report it beside the estimates"
    )


def _bootstrap_effect(ctx: _Context, details: dict[str, Any]) -> dict[str, Any]:
    """The wild cluster bootstrap of the focus: the estimation stage's, or B=999 here."""
    w = ctx.within
    if w is None:
        details["wild_bootstrap"] = f"not run: {ctx.missing}"
        return {}
    cluster_p = (
        float(ctx.fe.inference["cluster"].p_values[ctx.focus])
        if "cluster" in ctx.fe.inference
        else w.fit.t_test(w.focus)[1]
    )
    done = ctx.fe.inference.get("wild_bootstrap")
    if done is not None:
        details["wild_bootstrap"] = "from the estimation stage"
        return {
            "estimate": float(w.fit.coef[w.focus]),
            "wild_bootstrap_p_value": float(done.p_values[ctx.focus]),
            "wild_bootstrap_ci": [float(done.ci_low[ctx.focus]), float(done.ci_high[ctx.focus])],
            "cluster_p_value": cluster_p,
        }
    if not ctx.index.nested():
        details["wild_bootstrap"] = (
            "not run: units are not nested in clusters, so the within data cannot be used"
        )
        return {}
    try:
        boot = wild_cluster_bootstrap(
            w.y,
            w.w,
            ctx.index.cluster,
            term_index=w.focus,
            term=ctx.focus,
            draws=int(THRESHOLDS["bootstrap_draws"]),
            level=ctx.design.settings.level,
            seed=ctx.design.settings.bootstrap.seed,
        )
    except ValueError as exc:
        details["wild_bootstrap"] = f"not run: {exc}"
        return {}
    details["wild_bootstrap"] = boot.to_dict()
    return {
        "estimate": boot.estimate,
        "wild_bootstrap_p_value": boot.p_value,
        "wild_bootstrap_ci": [boot.ci_low, boot.ci_high],
        "cluster_p_value": cluster_p,
    }


def leave_one_cluster_out(
    y: FloatArray, X: FloatArray, clusters: IntArray, n_clusters: int
) -> FloatArray:
    r"""Coefficients with each cluster left out in turn, from cluster-level sums.

    Returns a ``n_clusters x K`` array; a row is NaN when the regressors are
    singular without that cluster.

    Notes
    -----
    With :math:`A = X'X`, :math:`b = X'y` and the cluster sums :math:`A_g =
    X_g'X_g`, :math:`b_g = X_g'y_g`,
    :math:`\hat\beta^{(g)} = (A - A_g)^{-1}(b - b_g)`: O(NK^2) for the sums and
    O(GK^3) for the solves, no refit. On within-demeaned data this equals a refit
    of the fixed-effects model without cluster g whenever every unit lies in one
    cluster, because removing a cluster leaves the other units' demeaned rows
    unchanged (MacKinnon, Nielsen & Webb 2023, section on the CV3 jackknife).
    """
    k = X.shape[1]
    codes = np.asarray(clusters, dtype=np.intp)
    if np.any(codes[1:] < codes[:-1]):
        order = np.argsort(codes, kind="stable")
        codes, X, y = codes[order], X[order], y[order]
    starts = np.searchsorted(codes, np.arange(n_clusters))
    sizes = np.diff(np.r_[starts, len(codes)])
    full = X.T @ X
    full_rhs = X.T @ y
    out = np.full((n_clusters, k), np.nan)
    # Without cluster g a column may lose all its variation (a period observed only
    # there); those rows stay NaN. Other singular cases are caught one by one.
    kept_diag = np.diag(full)[None, :] - group_sums(X**2, codes, n_clusters)
    leavable = (kept_diag > 1e-10 * np.diag(full)[None, :]).all(axis=1)
    try:
        inverse = np.linalg.inv(full)
    except np.linalg.LinAlgError:
        return out
    beta = inverse @ full_rhs
    resid = y - X @ beta
    xa = X @ inverse
    # Clusters of equal size are stacked (m x size x K) and solved together, in chunks
    # of bounded memory. A cluster with at most K rows uses the deletion formula
    # beta - (X'X)^{-1} X_g' (I - H_g)^{-1} e_g (size x size systems); a larger one
    # solves (A - A_g) beta_g = b - b_g (K x K systems).
    budget = 4_000_000
    for size in np.unique(sizes[sizes > 0]):
        same = np.flatnonzero((sizes == size) & leavable)
        per_chunk = max(1, budget // (int(size) * (k + int(size)) + k * k))
        for first in range(0, len(same), per_chunk):
            chunk = same[first : first + per_chunk]
            rows = starts[chunk][:, None] + np.arange(size)[None, :]
            xb = X[rows]
            if size <= k:
                xab = xa[rows]
                lhs = np.eye(int(size))[None] - np.matmul(xb, xab.transpose(0, 2, 1))
                rhs = resid[rows]
            else:
                lhs = full[None] - np.matmul(xb.transpose(0, 2, 1), xb)
                rhs = full_rhs[None] - np.einsum("msk,ms->mk", xb, y[rows])
            try:
                solved = np.linalg.solve(lhs, rhs[..., None])[..., 0]
            except np.linalg.LinAlgError:
                solved = np.full(rhs.shape, np.nan)
                for i, (a, b) in enumerate(zip(lhs, rhs, strict=True)):
                    try:
                        solved[i] = np.linalg.solve(a, b)
                    except np.linalg.LinAlgError:
                        continue
            if size <= k:
                out[chunk] = beta[None, :] - np.einsum("msk,ms->mk", xab, solved)
            else:
                out[chunk] = solved
    return out


def _influential_clusters(ctx: _Context) -> Diagnostic:
    key = "influential_clusters"
    w = ctx.within
    assert w is not None
    ix = ctx.index
    if not ix.nested():
        return _not_run(
            key,
            "units are not nested in clusters, so leaving a cluster out changes other units' "
            "within data and cluster-level sums do not give the refit",
        )
    g = ix.n_clusters
    loo = w.fit.loo[:, w.focus]
    finite = np.isfinite(loo)
    if finite.sum() < 2:
        return _not_run(key, "the estimate cannot be recomputed without single clusters")
    b = float(w.fit.coef[w.focus])
    se = w.fit.se(w.focus)
    shift = loo - b
    worst = int(np.nanargmax(np.abs(shift)))
    cv3 = float(np.sqrt((g - 1) / g * np.nansum(shift**2)))
    t_cv3 = b / cv3 if cv3 > 0 else float("inf")
    p_cv3 = float(2.0 * t_sf(abs(t_cv3), g - 1))
    crit = float(t_ppf(0.5 + ctx.design.settings.level / 2, g - 1))
    stat = float(abs(shift[worst]) / se)
    labels = [str(c) for c in ix.cluster_labels]
    # Every cluster's estimate when there are few; else the 30 lowest and highest.
    ranked = np.argsort(np.where(finite, loo, np.inf))[: int(finite.sum())]
    order = ranked if len(ranked) <= 60 else np.concatenate([ranked[:30], ranked[-30:]])
    effect = {
        "estimate": b,
        "range": [float(np.nanmin(loo)), float(np.nanmax(loo))],
        "max_change": float(shift[worst]),
        "most_influential_cluster": labels[worst],
        "estimate_without_it": float(loo[worst]),
        "cv3_se": cv3,
        "cr1_se": se,
        "cr1_interval": [b - crit * se, b + crit * se],
        "cv3_p_value": p_cv3,
        "leave_one_out": {labels[i]: float(loo[i]) for i in order},
    }
    details = {
        "reference": f"t({g - 1})",
        "clusters_not_recomputed": [labels[i] for i in np.flatnonzero(~finite)],
        "statistic": "largest change from leaving one cluster out, in CR1 standard errors",
    }
    significant = ctx.headline_p() < ctx.alpha
    flips = significant and bool(np.any(np.sign(loo[finite]) != np.sign(b)))
    unstable = stat > THRESHOLDS["influence_shift_se"] or cv3 > THRESHOLDS["cv3_ratio"] * se
    lost = significant and p_cv3 >= ctx.alpha
    without = f"without cluster {labels[worst]} the estimate is {_fmt(float(loo[worst]))}"
    if flips:
        status: Status = "problem"
        message = (
            f"A single cluster decides the sign of the estimate: {without} instead of {_fmt(b)}."
        )
    elif unstable or lost:
        status = "caution"
        message = (
            f"The estimate leans on a few clusters: {without} instead of {_fmt(b)}, and the "
            f"jackknife standard error is {_fmt(cv3)} against {_fmt(se)} clustered"
            + ("; with it the estimate is not significant." if lost else ".")
        )
    else:
        status = "ok"
        message = (
            f"No single cluster drives the estimate: leaving any one out moves it by at most "
            f"{_fmt(stat)} standard errors."
        )
    return Diagnostic(key, status, message, stat, None, None, effect, details)


# ---------------------------------------------------------------- the audit

_Check = Callable[[_Context], Diagnostic]

_CHECKS: dict[str, tuple[_Check, bool]] = {
    "omitted_variables": (_omitted_variables, True),
    "strict_exogeneity": (_strict_exogeneity, True),
    "functional_form": (_functional_form, True),
    "measurement_error": (_measurement_error, True),
    "attrition": (_attrition, True),
    "missing_data": (_missing_data, False),
    "serial_correlation": (_serial_correlation, True),
    "cross_sectional_dependence": (_cross_sectional_dependence, True),
    "heteroskedasticity": (_heteroskedasticity, True),
    "few_clusters": (_few_clusters, False),
    "influential_clusters": (_influential_clusters, True),
}


def run_audit(
    design: Design,
    models: Mapping[str, ModelResult],
    *,
    focus: str | None = None,
    panel: pd.DataFrame | None = None,
) -> dict[str, Diagnostic]:
    """Audit the fixed-effects estimate against every threat to internal validity.

    Parameters
    ----------
    design
        The common estimation sample (`panelpipe.estimate.make_design`).
    models
        The fitted estimators (`panelpipe.estimate.estimate_all`); every check but
        ``few_clusters`` audits ``models['fixed_effects']``.
    focus
        The headline regressor; defaults to the first configured regressor.
    panel
        The validated panel before rows with missing values were dropped; without
        it ``missing_data`` is ``not_run``.

    Returns
    -------
    dict
        One `Diagnostic` per key of `DIAGNOSTIC_KEYS`, in that order; a check
        that cannot run is present with status ``not_run`` and the reason.

    Raises
    ------
    ValueError
        When ``focus`` is not one of the regressors.

    Notes
    -----
    Sources, one per check: Oster (2019, *JBES*) for omitted variables;
    Wooldridge (2010, §10.7.1) for strict exogeneity; Ramsey (1969) for the
    functional form; Griliches & Hausman (1986, *J. Econometrics*) for
    measurement error; Nijman & Verbeek (1992) and Wooldridge (2010, §19.9) for
    attrition and missing values (with Wooldridge 2007, *J. Econometrics*);
    Wooldridge (2010, §10.6.3) for serial correlation; Pesaran (2004,
    2015) for cross-sectional dependence; Greene, *Econometric Analysis*, for
    groupwise heteroskedasticity; MacKinnon, Nielsen & Webb (2023, *J.
    Econometrics*) for few and influential clusters. Wald and t tests use the
    CV3 jackknife covariance (CR1 when a leave-one-cluster-out fit is singular)
    with F(q, G-1) and t(G-1) references (Cameron & Miller 2015; MacKinnon,
    Nielsen & Webb 2023).

    The fixed-effects model is refitted once, on the within data, because the
    estimation stage keeps coefficients and covariances but not residuals; the
    refit reproduces its coefficients and CR1 standard errors. Clusters are
    those of the first ``cluster_by`` column.
    """
    regressors = list(design.settings.regressors)
    focus = regressors[0] if focus is None else focus
    if focus not in regressors:
        raise ValueError(
            f"focus {focus!r} is not one of the {len(regressors)} regressors "
            f"({', '.join(regressors)})"
        )
    ctx = _context(design, models, focus, panel)
    out: dict[str, Diagnostic] = {}
    for key, (check, needs_fe) in _CHECKS.items():
        if needs_fe and ctx.within is None:
            out[key] = _not_run(key, ctx.missing)
            continue
        try:
            out[key] = check(ctx)
        except np.linalg.LinAlgError as exc:
            out[key] = _not_run(key, f"a matrix in the computation is singular ({exc})")
    return out
