"""Fit: the numerical core of the estimators (transformations, least squares, covariances).

Written by hand with numpy because measured speed demanded it: on 1,000,000 rows
x 10 regressors linearmodels spent about 40 s fitting pooled OLS, two-way fixed
effects and random effects (model set-up, pandas group-bys, an SVD least squares
per fit, post-estimation statistics the pipeline does not use, and a Python loop
over clusters in its clustered covariance); this module does the same
arithmetic in a few seconds. It follows linearmodels' conventions exactly
(degrees of freedom, small-sample factors, Swamy-Arora variance components with
the ranks of the within and between regressions), and
tests/test_fit_linearmodels.py checks every estimator under every covariance
against linearmodels fits of the same model.

Every covariance is a sandwich ``B M B`` with ``B = (X'X)^{-1}`` of the
transformed regressors and ``M`` a sum of outer products of scores, scaled by
``N / (N - K - effects)`` (effects not counted when the clusters nest them).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import scipy.linalg
import scipy.sparse

__all__ = [
    "Regression",
    "constant_within",
    "covariance",
    "demean",
    "demean_two_way",
    "group_means",
    "group_sums",
    "least_squares",
    "ls_coefficients",
    "random_effects_components",
    "triangular_factor",
]

FloatArray = np.ndarray
IntArray = np.ndarray


def group_sums(values: FloatArray, codes: IntArray, groups: int) -> FloatArray:
    """Sums of ``values`` (rows, or rows x K) within each of ``groups`` integer codes.

    A sparse groups x rows indicator matrix, built directly in compressed-row
    form (rows already sorted by code need no sort), times ``values``: one pass,
    about ten times faster than ``np.add.reduceat`` or a ``np.bincount`` per
    column at 1,000,000 x 20 (measured).
    """
    values = np.asarray(values, dtype=np.float64)
    codes = np.asarray(codes)
    n = len(codes)
    counts = np.bincount(codes, minlength=groups)
    if n and np.all(codes[1:] >= codes[:-1]):
        order = np.arange(n)
    else:
        order = np.argsort(codes, kind="stable")
    indicator = scipy.sparse.csr_matrix(
        (np.ones(n), order, np.r_[0, np.cumsum(counts)]), shape=(groups, n)
    )
    out: FloatArray = np.asarray(indicator @ values, dtype=np.float64)
    return out


def group_means(values: FloatArray, codes: IntArray, groups: int | None = None) -> FloatArray:
    """Means of ``values`` within each integer code (one row per code)."""
    g = int(codes.max()) + 1 if groups is None else groups
    counts = np.bincount(codes, minlength=g).astype(np.float64)
    sums = group_sums(values, codes, g)
    return sums / (counts if sums.ndim == 1 else counts[:, None])


def constant_within(values: FloatArray, codes: IntArray) -> bool:
    """Whether ``values`` never change within a code (e.g. a regressor within units)."""
    codes = np.asarray(codes)
    values = np.asarray(values)
    if not len(codes):
        return True
    present, first_row = np.unique(codes, return_index=True)
    first = np.zeros(int(codes.max()) + 1, dtype=np.intp)
    first[present] = first_row
    return bool(np.all(values == values[first[codes]]))


def demean(values: FloatArray, codes: IntArray) -> FloatArray:
    """``values`` minus their means within each integer code (1-D or 2-D)."""
    return values - group_means(values, codes)[codes]


def demean_two_way(values: FloatArray, unit: IntArray, period: IntArray) -> tuple[FloatArray, int]:
    """``values`` with unit and period effects removed exactly, and the period effects' rank.

    The values are demeaned by the factor with more levels and projected off the
    indicators of the other, so that the N x T (or N x G) indicator matrix is never
    formed: with ``A`` the factor demeaned first and ``B`` the other, the effects
    of ``B`` solve the normal equations ``(B'M_A B) b = B'M_A v``, whose matrix is
    ``diag(counts of B) - C diag(1 / counts of A) C'`` with ``C`` the B-by-A counts
    (Frisch-Waugh-Lovell; the same algebra as a regression with a dummy per unit
    and per period). Memory O(N K + m^2), time O(N K + m^3), m = min(G, T). The
    effects' joint rank is G + T minus the connected parts of the unit-period
    graph; the period effects' share of it, T minus those parts, is returned.
    """
    values = np.asarray(values, dtype=np.float64)
    g, t = int(unit.max()) + 1, int(period.max()) + 1
    first, other, n_first, n_other = (unit, period, g, t) if g >= t else (period, unit, t, g)
    counts = scipy.sparse.csr_matrix(
        (np.ones(len(unit)), (other, first)), shape=(n_other, n_first)
    )  # duplicates sum
    per_first = np.asarray(counts.sum(axis=0)).ravel()
    normal = np.diag(np.asarray(counts.sum(axis=1)).ravel()) - np.asarray(
        (counts @ scipy.sparse.diags(1.0 / per_first) @ counts.T).todense()
    )
    within = demean(values, first)
    rhs = group_sums(within, other, n_other)
    effects, _, rank, _ = scipy.linalg.lstsq(normal, rhs, cond=1e-10, lapack_driver="gelsy")
    out: FloatArray = within - demean(effects[other], first)
    parts = n_other - int(rank)
    return out, t - parts


@dataclass(frozen=True)
class Regression:
    """A least-squares fit on transformed panel data, ready for any covariance.

    ``y`` and ``x`` are the data as the estimator transformed them; ``time`` and
    ``rows`` give each transformed row's period code (for Driscoll-Kraay) and
    position among the estimation sample's rows (for clusters); ``time`` holds
    calendar ordinals, so that a period nobody has still counts as one lag.
    ``effects_df`` counts the effects the transformation removed (the unit effects
    under fixed effects), which the degrees of freedom include unless clusters nest
    them; ``absorbed_df`` counts effects partialled out that every covariance counts
    as coefficients (absorbed period effects, as their dummies would be).
    """

    names: tuple[str, ...]
    params: FloatArray
    y: FloatArray
    x: FloatArray
    r: FloatArray = field(repr=False)
    time: IntArray = field(repr=False)
    rows: IntArray = field(repr=False)
    effects_df: int = 0
    absorbed_df: int = 0

    @property
    def nobs(self) -> int:
        return int(self.x.shape[0])

    @property
    def df_resid(self) -> int:
        return self.nobs - self.x.shape[1] - self.absorbed_df - self.effects_df

    @cached_property
    def resid(self) -> FloatArray:
        out: FloatArray = self.y - self.x @ self.params
        return out

    @cached_property
    def ssr(self) -> float:
        return float(self.resid @ self.resid)

    @cached_property
    def bread(self) -> FloatArray:
        """(X'X)^{-1} from the triangular factor R with R'R = X'X."""
        k = self.r.shape[0]
        inv_r = scipy.linalg.solve_triangular(self.r, np.eye(k))
        out: FloatArray = inv_r @ inv_r.T
        return out


def triangular_factor(a: FloatArray) -> FloatArray:
    """R of the QR decomposition of ``a`` (Householder, LAPACK; Q is not formed)."""
    return np.asarray(np.linalg.qr(a, mode="r"), dtype=np.float64)


def ls_coefficients(x: FloatArray, y: FloatArray) -> FloatArray:
    """Least-squares coefficients of ``y`` (a vector or columns) on ``x``.

    Corrected semi-normal equations as in `least_squares`; when X'X is singular
    (collinear columns) the minimum-norm solution from an SVD (``np.linalg.lstsq``).
    """
    norms = np.sqrt(np.einsum("ij,ij->j", x, x))
    norms[norms == 0.0] = 1.0
    gram = (x.T @ x) / np.outer(norms, norms)
    scale = norms if np.ndim(y) == 1 else norms[:, None]
    try:
        factor = scipy.linalg.cholesky(gram, lower=False)
        if np.abs(np.diag(factor)).min() <= 1e-7:
            raise np.linalg.LinAlgError("nearly collinear")
    except np.linalg.LinAlgError:
        out: FloatArray = np.linalg.lstsq(x, y, rcond=None)[0]
        return out
    scaled = scipy.linalg.cho_solve((factor, False), (x.T @ y) / scale)
    resid = y - x @ (scaled / scale)
    scaled = scaled + scipy.linalg.cho_solve((factor, False), (x.T @ resid) / scale)
    out = scaled / scale
    return out


def least_squares(
    y: FloatArray,
    x: FloatArray,
    names: tuple[str, ...],
    *,
    time: IntArray,
    rows: IntArray,
    effects_df: int = 0,
    absorbed_df: int = 0,
) -> Regression:
    """OLS of ``y`` on ``x``: Cholesky of the column-scaled X'X, one refinement step.

    The corrected semi-normal equations (Björck 1996, *Numerical Methods for
    Least Squares Problems*, §2.9): solve with the Cholesky factor, then solve
    once more for the coefficients of the residual. One pass over the data for
    X'X instead of a QR decomposition (measured: 0.05 s against 0.7 s at
    1,000,000 x 20), with the accuracy of QR for the well-conditioned problems
    of a panel design. A regressor that is (numerically) a combination of the
    others raises ``LinAlgError``.
    """
    x = np.ascontiguousarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    k = x.shape[1]
    if x.shape[0] <= k:
        raise np.linalg.LinAlgError(f"{x.shape[0]} rows are too few for {k} coefficients")
    norms = np.sqrt(np.einsum("ij,ij->j", x, x))
    norms[norms == 0.0] = 1.0
    gram = (x.T @ x) / np.outer(norms, norms)
    try:
        factor = scipy.linalg.cholesky(gram, lower=False)
    except np.linalg.LinAlgError:
        factor = np.zeros_like(gram)
    bad = np.abs(np.diag(factor)) <= 1e-7
    if bad.any():
        which = ", ".join(names[j] for j in np.flatnonzero(bad))
        raise np.linalg.LinAlgError(f"collinear regressors: {which}")
    scaled = scipy.linalg.cho_solve((factor, False), (x.T @ y) / norms)
    resid = y - x @ (scaled / norms)
    scaled = scaled + scipy.linalg.cho_solve((factor, False), (x.T @ resid) / norms)
    return Regression(
        names, scaled / norms, y, x, factor * norms[None, :], time, rows, effects_df, absorbed_df
    )


def _cluster_meat(scores: FloatArray, codes: IntArray) -> FloatArray:
    """Sum over clusters of the outer products of score sums, with G/(G-1)(N-1)/N."""
    codes = np.unique(codes, return_inverse=True)[1].ravel()
    g = int(codes.max()) + 1
    if g < 2:
        raise np.linalg.LinAlgError("a clustered covariance needs at least two clusters")
    sums = group_sums(scores, codes, g)
    n = scores.shape[0]
    out: FloatArray = (sums.T @ sums) * (g / (g - 1) * (n - 1) / n)
    return out


def bartlett_weights(bandwidth: float) -> FloatArray:
    """Bartlett kernel weights for lags 0..floor(bandwidth): 1 - j / (bandwidth + 1)."""
    lags = np.arange(int(bandwidth) + 1)
    out: FloatArray = 1.0 - lags / (bandwidth + 1.0)
    return out


def covariance(
    reg: Regression,
    kind: str,
    *,
    clusters: IntArray | None = None,
    bandwidth: float | None = None,
    count_effects: bool = True,
) -> FloatArray:
    """Covariance of ``reg.params`` under ``kind``.

    ``kind``: ``classical`` (error variance over N - K - effects), ``robust``
    (White), ``cluster`` (``clusters`` with one or two columns of codes per
    transformed row; two-way as in Cameron, Gelbach & Miller 2011, each part
    with its own G/(G-1)(N-1)/N), ``driscoll_kraay`` (Bartlett kernel over
    period sums of the scores, Driscoll & Kraay 1998). The factor N/(N - K -
    effects) multiplies every kind, as linearmodels' ``debiased=True`` does.
    """
    n, k = reg.x.shape
    extra = (reg.effects_df if count_effects else 0) + reg.absorbed_df
    if n - k - extra <= 0:
        raise np.linalg.LinAlgError("no residual degrees of freedom")
    scale = n / (n - k - extra)
    bread = reg.bread
    e = reg.resid
    if kind == "classical":
        out: FloatArray = (scale * float(e @ e) / n) * bread
        return (out + out.T) / 2
    scores = reg.x * e[:, None]
    if kind == "robust":
        meat = scores.T @ scores
    elif kind == "cluster":
        if clusters is None:
            raise ValueError("cluster covariance needs clusters")
        c = np.asarray(clusters)
        if c.ndim == 1 or c.shape[1] == 1:
            meat = _cluster_meat(scores, c.reshape(n))
        else:
            pair = np.unique(c[:, :2], axis=0, return_inverse=True)[1].ravel()
            meat = (
                _cluster_meat(scores, c[:, 0])
                + _cluster_meat(scores, c[:, 1])
                - _cluster_meat(scores, pair)
            )
    elif kind == "driscoll_kraay":
        if bandwidth is None:
            raise ValueError("Driscoll-Kraay covariance needs a bandwidth")
        periods, codes = np.unique(reg.time, return_inverse=True)
        sums = group_sums(scores, codes.ravel(), len(periods))
        weights = bartlett_weights(bandwidth)
        if len(weights) > len(sums):
            raise np.linalg.LinAlgError("bandwidth not below the number of periods")
        meat = sums.T @ sums
        for lag in range(1, len(weights)):
            # Lags count calendar periods: the pair (t, t - lag) only where both exist.
            before = np.minimum(np.searchsorted(periods, periods - lag), len(periods) - 1)
            pair = periods[before] == periods - lag
            cross = sums[pair].T @ sums[before[pair]]
            meat = meat + weights[lag] * (cross + cross.T)
    else:
        raise ValueError(f"unknown covariance {kind!r}")
    out = bread @ (scale * meat) @ bread
    return (out + out.T) / 2


@dataclass(frozen=True)
class VarianceComponents:
    """Swamy-Arora variance components and the per-unit quasi-demeaning weights."""

    sigma2_idiosyncratic: float
    sigma2_unit: float
    theta: FloatArray  # one per unit code


def _rank_and_resid(x: FloatArray, y: FloatArray) -> tuple[int, FloatArray]:
    coef, _, rank, _ = np.linalg.lstsq(x, y, rcond=None)
    return int(rank), y - x @ coef


def random_effects_components(y: FloatArray, x: FloatArray, unit: IntArray) -> VarianceComponents:
    r"""Swamy-Arora components (Swamy & Arora 1972; Baltagi, ch. 2), unbalanced form.

    :math:`\hat\sigma^2_e` is the within regression's residual variance with
    N - G - rank(within) degrees of freedom; :math:`\hat\sigma^2_u = \max(0,
    SSR_b / (G - rank(between)) - \hat\sigma^2_e / \bar T)` with the harmonic mean
    :math:`\bar T`; :math:`\theta_i = 1 - \sqrt{\sigma^2_e / (T_i \sigma^2_u +
    \sigma^2_e)}`. Ranks count only the coefficients each regression can
    estimate, as linearmodels 7.1 does (columns scaled by their norms before
    the within rank is taken).
    """
    g = int(unit.max()) + 1
    counts = np.bincount(unit, minlength=g).astype(np.float64)
    norms = np.sqrt((x**2).sum(axis=0))
    norms[norms == 0.0] = 1.0
    rank_within, within_resid = _rank_and_resid(demean(x, unit) / norms, demean(y, unit))
    rank_between, between_resid = _rank_and_resid(group_means(x, unit, g), group_means(y, unit, g))
    n = len(y)
    df_within = n - g - rank_within
    df_between = g - rank_between
    if df_within <= 0 or df_between <= 0:
        raise np.linalg.LinAlgError(
            "the within or the between regression has no residual degrees of freedom"
        )
    sigma2_e = float(within_resid @ within_resid) / df_within
    t_bar = g / float((1.0 / counts).sum())
    sigma2_u = max(0.0, float(between_resid @ between_resid) / df_between - sigma2_e / t_bar)
    theta = 1.0 - np.sqrt(sigma2_e / (counts * sigma2_u + sigma2_e))
    return VarianceComponents(sigma2_e, sigma2_u, theta)
