"""Bootstrap: restricted wild cluster bootstrap-t for one regression coefficient.

The caller passes the outcome and the regressors as plain arrays, already
transformed as the estimator requires (within-demeaned for fixed effects, first
differences, ...). Everything the bootstrap needs is reduced to cluster-level
sums once, so the cost of the draws does not grow with the number of rows.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
import scipy.linalg
from scipy import optimize

from .distributions import t_ppf

__all__ = ["WEBB_WEIGHTS", "BootstrapResult", "wild_cluster_bootstrap"]

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.intp]

WEBB_WEIGHTS: FloatArray = np.array(
    [-np.sqrt(1.5), -1.0, -np.sqrt(0.5), np.sqrt(0.5), 1.0, np.sqrt(1.5)]
)
"""Webb's six-point weights; each is drawn with probability 1/6 (mean 0, variance 1)."""

_WEIGHT_KINDS = ("auto", "rademacher", "webb")
_P_VALUE_KINDS = ("symmetric", "equal_tail")
# Bounds the memory of one batch of draws: (draws in batch) x (clusters) floats.
_BATCH_ELEMENTS = 1 << 21
# Ties are structural, not accidental: with all weights equal to 1 the bootstrap
# sample is the actual sample, so t* = t up to rounding and must be counted.
_TIE_RTOL = 1e-10
# The confidence bounds are searched out to this many cluster-robust half-widths.
_MAX_WIDTH_SE = 1e8
# Below this multiple of ||y|| the standard error is rounding noise of an exact fit.
_EXACT_FIT_RTOL = 1e-10


@dataclass(frozen=True)
class BootstrapResult:
    """The wild cluster bootstrap test of one coefficient and its interval.

    Parameters
    ----------
    term
        Name of the tested coefficient.
    estimate
        Least-squares estimate of the coefficient.
    t_stat
        Cluster-robust (CR1) t statistic for ``coefficient = null_value``.
    p_value
        Bootstrap p-value of that test.
    ci_low, ci_high
        Bootstrap confidence interval at ``level``, found by test inversion;
        ``-inf``/``inf`` when the p-value never falls below ``1 - level`` (a note
        says so).
    draws
        Number of bootstrap samples actually used (``2**clusters`` when enumerated).
    weights
        ``"rademacher"`` or ``"webb"``: the weights actually used.
    enumerated
        True when all ``2**clusters`` Rademacher sign vectors were used instead of
        random draws; the p-value is then exact for this bootstrap.
    clusters
        Number of clusters G.
    level
        Confidence level of the interval.
    seed
        Seed of ``numpy.random.default_rng`` that generated the weights.
    null_value
        Value of the coefficient under the null hypothesis.
    p_value_kind
        ``"symmetric"`` (compares ``|t*|`` with ``|t|``) or ``"equal_tail"``.
    notes
        Plain sentences stating the choices made: weights, enumeration, the CR1
        factor, an unbounded interval.
    """

    term: str
    estimate: float
    t_stat: float
    p_value: float
    ci_low: float
    ci_high: float
    draws: int
    weights: str
    enumerated: bool
    clusters: int
    level: float
    seed: int
    null_value: float = 0.0
    p_value_kind: str = "symmetric"
    notes: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        out = asdict(self)
        out["notes"] = list(self.notes)
        return out


@dataclass(frozen=True)
class _ClusterSums:
    """The regression reduced to cluster-level sums.

    Columns are reordered so that the tested one is last and orthonormalised,
    ``X[:, perm] = Q R``. In the coordinates ``theta = R beta`` the tested
    coefficient is ``theta_K = scale * beta_k`` and ``(Q'Q)^{-1} = I``.
    """

    n_obs: int
    n_params: int
    scale: float
    theta_hat: float
    cr1: float
    # Row g: Q_g' u_y,g with u_y the residual of the model without the tested column.
    score_y: FloatArray
    # Row g: Q_g' q_g with q the last column of Q.
    score_q: FloatArray

    def theta(self, beta: float) -> float:
        return self.scale * beta

    def scores(self, theta0: float) -> FloatArray:
        """Cluster scores ``q_g' u_g`` of the residuals restricted at ``theta0``."""
        return self.score_y[:, -1] - theta0 * self.score_q[:, -1]

    @property
    def se_theta(self) -> float:
        return float(np.sqrt(self.cr1 * np.sum(self.scores(self.theta_hat) ** 2)))

    def t_stat(self, theta0: float) -> float:
        return (self.theta_hat - theta0) / self.se_theta


@dataclass(frozen=True)
class _DrawMoments:
    """Per-draw sums that make ``t*`` a closed-form function of the null value.

    For draw b, ``t*_b(theta0) = (n_y - theta0 n_q) /
    sqrt(cr1 (q00 - 2 theta0 q01 + theta0^2 q11))``, so every candidate null value
    is tested with the same weight draws at O(B) cost.
    """

    num_y: FloatArray
    num_q: FloatArray
    q00: FloatArray
    q01: FloatArray
    q11: FloatArray
    cr1: float

    def t_star(self, theta0: float) -> FloatArray:
        num = self.num_y - theta0 * self.num_q
        var = self.cr1 * (self.q00 - 2.0 * theta0 * self.q01 + theta0**2 * self.q11)
        # Rounding can push a zero variance slightly below zero; 0/0 draws are never
        # counted as at least as extreme as t.
        with np.errstate(divide="ignore", invalid="ignore"):
            return num / np.sqrt(np.maximum(var, 0.0))


def _validate(
    y: np.ndarray,
    X: np.ndarray,
    clusters: np.ndarray,
    term_index: int,
    draws: int,
    weights: str,
    level: float,
    p_value_kind: str,
) -> tuple[FloatArray, FloatArray, IntArray, int]:
    y_arr = np.asarray(y, dtype=np.float64)
    X_arr = np.asarray(X, dtype=np.float64)
    labels = np.asarray(clusters)
    if y_arr.ndim != 1:
        raise ValueError(f"y must be 1-D; got an array with {y_arr.ndim} dimensions")
    if X_arr.ndim != 2:
        raise ValueError(f"X must be 2-D (rows x columns); got {X_arr.ndim} dimensions")
    if labels.ndim != 1:
        raise ValueError(f"clusters must be 1-D; got an array with {labels.ndim} dimensions")
    n_obs, n_params = X_arr.shape
    if y_arr.shape[0] != n_obs or labels.shape[0] != n_obs:
        raise ValueError(
            f"y, X and clusters must have the same number of rows; got {y_arr.shape[0]}, "
            f"{n_obs} and {labels.shape[0]}"
        )
    if n_obs <= n_params:
        raise ValueError(
            f"X has {n_obs} rows and {n_params} columns; the regression needs more rows "
            "than columns"
        )
    if not 0 <= term_index < n_params:
        raise ValueError(f"term_index={term_index} is outside X's {n_params} columns")
    bad_y = int(np.count_nonzero(~np.isfinite(y_arr)))
    if bad_y:
        raise ValueError(f"y has {bad_y} of {n_obs} values that are NaN or infinite")
    bad_x = int(np.count_nonzero(~np.isfinite(X_arr).all(axis=1)))
    if bad_x:
        raise ValueError(f"X has {bad_x} of {n_obs} rows with NaN or infinite values")
    missing = int(np.count_nonzero(pd.isna(labels)))
    if missing:
        raise ValueError(f"clusters has {missing} of {n_obs} missing labels")
    if weights not in _WEIGHT_KINDS:
        raise ValueError(f"weights={weights!r} is not one of {', '.join(_WEIGHT_KINDS)}")
    if p_value_kind not in _P_VALUE_KINDS:
        raise ValueError(f"p_value_kind={p_value_kind!r} is not one of {', '.join(_P_VALUE_KINDS)}")
    if not 0.0 < level < 1.0:
        raise ValueError(f"level={level} must lie strictly between 0 and 1")
    if draws < 1:
        raise ValueError(f"draws={draws} must be at least 1")
    _, codes = np.unique(labels, return_inverse=True)
    n_clusters = int(codes.max()) + 1
    if n_clusters < 2:
        raise ValueError(
            f"clusters has {n_clusters} distinct label; the wild cluster bootstrap needs at least 2"
        )
    return y_arr, X_arr, codes.astype(np.intp).ravel(), n_clusters


def _cluster_sums(
    y: FloatArray, X: FloatArray, codes: IntArray, n_clusters: int, term_index: int
) -> _ClusterSums:
    n_obs, n_params = X.shape
    perm = [j for j in range(n_params) if j != term_index] + [term_index]
    Q, R = scipy.linalg.qr(X[:, perm], mode="economic", check_finite=False)
    diag = np.diag(R)
    rank_tol = max(n_obs, n_params) * np.finfo(np.float64).eps * np.abs(diag).max()
    rank = int(np.count_nonzero(np.abs(diag) > rank_tol))
    if rank < n_params:
        raise ValueError(
            f"X has {n_params} columns but rank {rank}; drop collinear columns "
            f"(the tested column {term_index} may be one of them)"
        )
    # A positive diagonal makes theta_K = R_KK beta_k increase with beta_k.
    signs = np.sign(diag)
    Q *= signs
    theta = Q.T @ y
    q = Q[:, -1]
    resid_restricted = y - Q[:, :-1] @ theta[:-1]

    def by_cluster(v: FloatArray) -> FloatArray:
        return np.column_stack(
            [np.bincount(codes, weights=Q[:, j] * v, minlength=n_clusters) for j in range(n_params)]
        )

    cr1 = n_clusters / (n_clusters - 1) * (n_obs - 1) / (n_obs - n_params)
    return _ClusterSums(
        n_obs=n_obs,
        n_params=n_params,
        scale=float(abs(diag[-1])),
        theta_hat=float(theta[-1]),
        cr1=cr1,
        score_y=by_cluster(resid_restricted),
        score_q=by_cluster(q),
    )


def _weight_batches(
    rng: np.random.Generator, n_clusters: int, draws: int, kind: str, enumerated: bool
) -> Iterator[FloatArray]:
    """Yield the weights as (draws in batch) x (clusters) arrays, in a fixed order."""
    batch = max(1, _BATCH_ELEMENTS // n_clusters)
    bits = np.arange(n_clusters, dtype=np.int64)
    for start in range(0, draws, batch):
        size = min(batch, draws - start)
        if enumerated:
            rows = np.arange(start, start + size, dtype=np.int64)[:, None]
            yield np.where((rows >> bits) & 1, -1.0, 1.0)
        elif kind == "rademacher":
            yield np.where(rng.integers(0, 2, size=(size, n_clusters), dtype=np.int8), 1.0, -1.0)
        else:
            yield WEBB_WEIGHTS[rng.integers(0, 6, size=(size, n_clusters), dtype=np.int8)]


def _draw_moments(
    sums: _ClusterSums,
    batches: Iterator[FloatArray],
    total: int,
    progress: Callable[[int, int], None] | None,
) -> _DrawMoments:
    """Reduce every draw to the five numbers of ``_DrawMoments``: O(G K) per draw."""
    S, W = sums.score_y, sums.score_q
    c_y, c_q = S[:, -1], W[:, -1]
    parts: list[tuple[FloatArray, ...]] = []
    done = 0
    for V in batches:
        VS, VW = V @ S, V @ W
        P0 = V * c_y - VS @ W.T
        P1 = V * c_q - VW @ W.T
        parts.append(
            (
                VS[:, -1],
                VW[:, -1],
                np.einsum("bg,bg->b", P0, P0),
                np.einsum("bg,bg->b", P0, P1),
                np.einsum("bg,bg->b", P1, P1),
            )
        )
        done += V.shape[0]
        if progress is not None:
            progress(done, total)
    num_y, num_q, q00, q01, q11 = (np.concatenate(cols) for cols in zip(*parts, strict=True))
    return _DrawMoments(num_y=num_y, num_q=num_q, q00=q00, q01=q01, q11=q11, cr1=sums.cr1)


def _p_value(t: float, t_star: FloatArray, kind: str) -> float:
    tol = _TIE_RTOL * max(abs(t), 1.0)
    if kind == "symmetric":
        return float(np.mean(np.abs(t_star) >= abs(t) - tol))
    lower = float(np.mean(t_star <= t + tol))
    upper = float(np.mean(t_star >= t - tol))
    return min(1.0, 2.0 * min(lower, upper))


def _confidence_bound(
    p_of: Callable[[float], float], estimate: float, start: float, alpha: float, direction: float
) -> float:
    """Where the p-value falls to ``alpha`` moving away from the estimate.

    The p-value is a step function of the null value; ``brentq`` then narrows the
    bracket onto the step at which it crosses ``alpha``.
    """
    width = start
    while p_of(estimate + direction * width) >= alpha:
        width *= 2.0
        if width > _MAX_WIDTH_SE * start:
            return direction * np.inf
    outer = estimate + direction * width
    lo, hi = (estimate, outer) if direction > 0 else (outer, estimate)
    root = optimize.brentq(lambda b: p_of(b) - alpha, lo, hi, xtol=start * 1e-10, maxiter=500)
    return float(root)


def wild_cluster_bootstrap(
    y: np.ndarray,
    X: np.ndarray,
    clusters: np.ndarray,
    *,
    term_index: int,
    term: str = "",
    null_value: float = 0.0,
    draws: int = 9999,
    weights: str = "auto",
    few_clusters: int = 12,
    level: float = 0.95,
    seed: int = 0,
    p_value_kind: str = "symmetric",
    progress: Callable[[int, int], None] | None = None,
) -> BootstrapResult:
    r"""Test one coefficient with the restricted wild cluster bootstrap-t (WCR).

    Parameters
    ----------
    y
        Outcome, length N, already transformed like ``X``.
    X
        Regressors, N x K, already transformed (e.g. within-demeaned for fixed
        effects; the caller absorbs the effects). Include a constant if the model
        has one.
    clusters
        Cluster label of each row, any 1-D array of hashable labels.
    term_index
        Column of ``X`` whose coefficient is tested.
    term
        Name reported for that coefficient; defaults to ``x<term_index>``.
    null_value
        Coefficient value under the null hypothesis.
    draws
        Number of bootstrap samples B. With Rademacher weights and
        ``2**G <= draws`` all ``2**G`` sign vectors are enumerated instead.
    weights
        ``"rademacher"``, ``"webb"``, or ``"auto"``: Webb when
        ``G <= few_clusters``, otherwise Rademacher.
    few_clusters
        Cluster count at or below which ``"auto"`` picks Webb weights (12 is
        common practice).
    level
        Confidence level of the interval.
    seed
        Seed for ``numpy.random.default_rng``; the same seed and inputs give the
        same result.
    p_value_kind
        ``"symmetric"`` compares ``|t*|`` with ``|t|``; ``"equal_tail"`` doubles the
        smaller tail probability of ``t*`` around ``t``.
    progress
        Called as ``progress(done, total)`` after each batch of draws.

    Returns
    -------
    BootstrapResult
        The estimate, CR1 t statistic, bootstrap p-value and interval, and the
        choices made.

    Raises
    ------
    ValueError
        When shapes disagree, values are missing, X is rank deficient, there are
        fewer than 2 clusters, or an option is out of range.

    Notes
    -----
    Let :math:`\hat\beta = (X'X)^{-1}X'y`, :math:`a` the row of :math:`(X'X)^{-1}`
    for coefficient :math:`k`, and :math:`\hat u = y - X\hat\beta`. The t statistic
    uses the CR1 cluster-robust variance

    .. math:: t = \frac{\hat\beta_k - \beta_0}{\sqrt{c \sum_g (a'X_g'\hat u_g)^2}},
              \qquad c = \frac{G}{G-1}\,\frac{N-1}{N-K}.

    The bootstrap imposes the null: :math:`\tilde\beta` is least squares with
    :math:`\beta_k = \beta_0` and :math:`\tilde u` its residuals. Draw b sets
    :math:`y^*_b = X\tilde\beta + v_{bg}\tilde u_g` with one weight :math:`v_{bg}`
    per cluster, refits, and computes :math:`t^*_b` exactly like :math:`t`
    (Cameron, Gelbach & Miller 2008). Weights are Rademacher (:math:`\pm 1`) or
    Webb's six-point weights :math:`\pm\sqrt{1/2}, \pm 1, \pm\sqrt{3/2}`, each with
    probability 1/6, which give many more distinct samples when G is small
    (Webb 2023). The symmetric p-value is :math:`\#\{b: |t^*_b| \ge |t|\}/B`; the
    equal-tail p-value is :math:`2\min(\#\{t^*_b \le t\}, \#\{t^*_b \ge t\})/B`.

    No work proportional to N x B is done (Roodman et al. 2019, 'Fast and wild').
    With :math:`s_h = X_h'\tilde u_h` and :math:`c_h = a's_h`,

    .. math:: \hat\beta^*_{bk} - \beta_0 = \sum_h v_{bh} c_h, \qquad
              a'X_g'\hat u^*_{bg} = v_{bg} c_g
              - (X_g'X_g a)'(X'X)^{-1}\sum_h v_{bh} s_h,

    so after O(NK) cluster sums each draw costs O(GK), done as matrix products
    over batches of draws. Because :math:`\tilde u` is linear in :math:`\beta_0`,
    each draw reduces to five numbers from which :math:`t^*_b(\beta_0)` follows in
    closed form; the interval is the set of :math:`\beta_0` whose p-value is at
    least :math:`1 - \text{level}`, with bounds found by ``scipy.optimize.brentq``
    from the cluster-robust interval (:math:`t_{G-1}` critical value) outwards,
    using the same draws for every :math:`\beta_0`. Internally X is orthonormalised
    by a QR decomposition with the tested column last, which leaves every t
    statistic unchanged.

    With fixed effects nested within clusters (e.g. unit effects, clusters by
    unit or coarser), fitting the restricted model on the within-demeaned data is
    valid: the restricted residuals have mean zero within each effect's group,
    and multiplying them by a weight that is constant within the cluster keeps
    that property, so demeaning the bootstrap sample reproduces the bootstrap on
    the demeaned data exactly. K is the number of columns of ``X``; absorbed
    effects nested in clusters are not counted in ``c``.

    References
    ----------
    Cameron, A. C., Gelbach, J. B. & Miller, D. L. (2008), "Bootstrap-based
    improvements for inference with clustered errors", *Review of Economics and
    Statistics* 90(3), 414-427.

    Webb, M. D. (2023), "Reworking wild bootstrap-based inference for clustered
    errors", *Canadian Journal of Economics* 56(3), 839-858.

    Roodman, D., MacKinnon, J. G., Nielsen, M. Ø. & Webb, M. D. (2019), "Fast and
    wild".

    MacKinnon, J. G., Nielsen, M. Ø. & Webb, M. D. (2023), "Cluster-robust
    inference: a guide to empirical practice", *Journal of Econometrics* 232(2),
    272-299.
    """
    y_arr, X_arr, codes, n_clusters = _validate(
        y, X, clusters, term_index, draws, weights, level, p_value_kind
    )
    sums = _cluster_sums(y_arr, X_arr, codes, n_clusters, term_index)
    name = term or f"x{term_index}"
    se_theta = sums.se_theta
    if not se_theta > _EXACT_FIT_RTOL * float(np.linalg.norm(y_arr)):
        raise ValueError(
            f"the cluster-robust standard error of {name} is zero across {n_clusters} "
            "clusters (the model fits exactly); no t statistic can be formed"
        )
    estimate = sums.theta_hat / sums.scale
    se_beta = se_theta / sums.scale
    factor_note = (
        f"The t statistic uses the CR1 cluster-robust variance with factor "
        f"G/(G-1)*(N-1)/(N-K) = {n_clusters}/{n_clusters - 1}*{sums.n_obs - 1}/"
        f"{sums.n_obs - sums.n_params} = {sums.cr1:.6g}."
    )
    notes = [factor_note]

    kind = weights
    if kind == "auto":
        kind = "webb" if n_clusters <= few_clusters else "rademacher"
        comparison = "at most" if kind == "webb" else "more than"
        notes.append(
            f"{'Webb six-point' if kind == 'webb' else 'Rademacher'} weights were used "
            f"because there are {n_clusters} clusters, {comparison} few_clusters="
            f"{few_clusters}."
        )
    else:
        notes.append(f"{kind.capitalize()} weights were used as requested.")
    enumerated = kind == "rademacher" and n_clusters < 63 and 2**n_clusters <= draws
    used_draws = 2**n_clusters if enumerated else draws
    if enumerated:
        notes.append(
            f"All 2^{n_clusters} = {used_draws} Rademacher sign vectors were enumerated "
            f"instead of {draws} random draws, so the p-value is exact for this bootstrap "
            f"and moves in steps of 1/{used_draws}."
        )

    rng = np.random.default_rng(seed)
    moments = _draw_moments(
        sums,
        _weight_batches(rng, n_clusters, used_draws, kind, enumerated),
        used_draws,
        progress,
    )

    def p_of(beta0: float) -> float:
        theta0 = sums.theta(beta0)
        return _p_value(sums.t_stat(theta0), moments.t_star(theta0), p_value_kind)

    alpha = 1.0 - level
    crit = float(t_ppf(1.0 - alpha / 2.0, n_clusters - 1))
    if p_of(estimate) < alpha:
        ci_low = ci_high = float("nan")
        notes.append(
            f"No confidence interval: even at the estimate the {p_value_kind} bootstrap "
            f"p-value is below {alpha:.3g}."
        )
    else:
        ci_low = _confidence_bound(p_of, estimate, crit * se_beta, alpha, -1.0)
        ci_high = _confidence_bound(p_of, estimate, crit * se_beta, alpha, 1.0)
        if not (np.isfinite(ci_low) and np.isfinite(ci_high)):
            notes.append(
                f"The confidence interval is unbounded: the bootstrap p-value stays at or "
                f"above {alpha:.3g} however far the null value moves from the estimate "
                f"(with {used_draws} draws the smallest possible p-value is "
                f"{1 / used_draws:.3g})."
            )

    return BootstrapResult(
        term=name,
        estimate=float(estimate),
        t_stat=float((estimate - null_value) / se_beta),
        p_value=p_of(null_value),
        ci_low=ci_low,
        ci_high=ci_high,
        draws=used_draws,
        weights=kind,
        enumerated=enumerated,
        clusters=n_clusters,
        level=level,
        seed=seed,
        null_value=null_value,
        p_value_kind=p_value_kind,
        notes=tuple(notes),
    )
