"""Instruments within panels: two-stage least squares after each transformation.

Pure functions over plain arrays; the pipeline wires them in (one entry function per
estimator key of the interface contract, "Instruments"):

- `pooled_iv`: the constant (or, with period effects, the period means) partialled out;
- `fixed_effects_iv`: the within transformation (with period effects both sets removed
  exactly by `fit.demean_two_way`);
- `first_difference_iv`: differences over consecutive calendar periods (a difference
  across a gap is not formed, as in `estimate.first_difference_rows`), period means of
  the differences partialled out with period effects;
- `anderson_hsiao`: first differences with the outcome's differenced first lag as an
  endogenous regressor and its second lag in levels as its instrument (Anderson & Hsiao
  1981).

Partialling out exogenous effects before two-stage least squares gives the same slopes,
residuals and slope covariances as the regression with their dummies
(Frisch-Waugh-Lovell; the effects are exogenous and instrument themselves); their rank
enters every covariance as coefficients would, as in `estimate._fit`.

Every covariance is `fit.covariance` applied to the second stage: the fitted regressors
``X^ = P_Z X`` in place of ``X`` and the structural residuals ``y - X b`` (not
``y - X^ b``), which is the two-stage least-squares sandwich (the same small-sample
factors as the least-squares estimators: N/(N-K-effects), CR1 for clusters). Weak-
instrument diagnostics, the Anderson-Rubin set, the control-function test of
endogeneity and the over-identification test use the covariance kind of the headline
inference.

Wiring (for the pipeline): build an `IVData` from the validated panel's rows sorted by
unit and period (outcome, regressors, `endogenous` and `instruments` columns by label;
unit codes; period ordinals as `estimate.period_ordinals`; cluster codes; weights),
call ``IV_ESTIMATORS[key](data, inference, headline=...)``, store
``result.to_dict()`` under ``models[key]``, ``result.endogeneity`` under
``tests.endogeneity[key]``, and ``result.rows()`` in estimates.csv. For
`anderson_hsiao` pass the outcome in levels and the regressors without the lagged
outcome (``lag_name`` labels it). `lagged_outcome_finding` is the audit's finding.

Difference GMM (Arellano & Bond 1991) is not built.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import optimize

from .distributions import chi2_sf, f_ppf, f_sf, t_ppf, t_sf
from .findings import Finding, PanelpipeError
from .fit import (
    Regression,
    covariance,
    demean,
    demean_two_way,
    group_sums,
    least_squares,
    triangular_factor,
)

__all__ = [
    "INFERENCE",
    "IV_ESTIMATORS",
    "TWINS",
    "IVData",
    "IVResult",
    "anderson_hsiao",
    "dk_bandwidth",
    "first_difference_iv",
    "fixed_effects_iv",
    "lagged_outcome_finding",
    "nickell_bias",
    "pooled_iv",
]

FloatArray = np.ndarray
IntArray = np.ndarray

INFERENCE = ("classical", "robust", "cluster", "driscoll_kraay")
# each IV model and the least-squares estimator it is compared with (tests.endogeneity)
TWINS = {
    "pooled_iv": "pooled_ols",
    "fixed_effects_iv": "fixed_effects",
    "first_difference_iv": "first_difference",
    "anderson_hsiao": "first_difference",
}
# common practice, no single source: a first-stage F below 10 flags weak instruments
# (Staiger & Stock 1997's rule of thumb)
WEAK_F = 10.0
_GRID = 4001  # points of the Anderson-Rubin inversion on the tan-mapped line


@dataclass(frozen=True)
class IVData:
    """One analysis's rows for an IV estimator, before its transformation.

    Rows are sorted by unit, then period. ``period`` holds calendar ordinals (the
    period before ``p`` is ``p - 1``); ``clusters`` holds one or two columns of
    integer codes per row, or None. Names label the columns everywhere.

    With ``weights`` both stages are weighted least squares (as linearmodels'
    ``weights``): effects are removed with weighted means, then every column is
    multiplied by the square root of the weight; a first difference has the weight
    1 / (1/w(t) + 1/w(t-1)) (the inverse variance of a difference of independent
    errors, linearmodels' FirstDifferenceOLS convention).
    """

    y: FloatArray
    exog: FloatArray
    endog: FloatArray
    instruments: FloatArray
    unit: IntArray
    period: IntArray
    exog_names: tuple[str, ...]
    endog_names: tuple[str, ...]
    instrument_names: tuple[str, ...]
    clusters: IntArray | None = None
    period_effects: bool = False
    outcome_name: str = "outcome"
    weights: FloatArray | None = None  # positive; weighted least squares in both stages

    def __post_init__(self) -> None:
        n = len(self.y)
        for what, arr, names in (
            ("exogenous regressors", self.exog, self.exog_names),
            ("endogenous terms", self.endog, self.endog_names),
            ("instruments", self.instruments, self.instrument_names),
        ):
            if np.ndim(arr) != 2 or arr.shape[0] != n or arr.shape[1] != len(names):
                raise ValueError(f"{what}: expected {n} x {len(names)} values")
        if len(self.unit) != n or len(self.period) != n:
            raise ValueError("unit and period codes need one value per row")
        same = self.unit[1:] == self.unit[:-1]
        if np.any(self.unit[1:] < self.unit[:-1]) or np.any(
            same & (self.period[1:] <= self.period[:-1])
        ):
            raise ValueError("rows must be sorted by unit, then period, without duplicates")


@dataclass(frozen=True)
class IVResult:
    """One IV model: coefficients, covariances per inference key, strength and tests."""

    estimator: str
    names: tuple[str, ...]
    params: FloatArray
    covariances: dict[str, FloatArray]
    nobs: int
    units: int
    headline_inference: str
    first_stage: dict[str, dict[str, Any]]
    effective_f: dict[str, Any] | None
    weak_iv_robust: dict[str, Any]
    endogeneity: dict[str, Any]
    overidentification: dict[str, Any] | None
    reference_df: dict[str, int]  # t reference of each inference (see `rows`)
    notes: tuple[str, ...] = field(default=())

    def std_errors(self, kind: str) -> dict[str, float]:
        return dict(zip(self.names, np.sqrt(np.diag(self.covariances[kind])).tolist(), strict=True))

    def rows(self, level: float = 0.95) -> list[dict[str, Any]]:
        """Tidy rows for estimates.csv: t reference with ``reference_df`` degrees of freedom.

        Common practice, no single source (as estimate._reference): t(G-1) for clusters,
        t(T-1) for Driscoll-Kraay, t(residual df) otherwise.
        """
        out = []
        for kind, cov in self.covariances.items():
            df = self.reference_df[kind]
            se = np.sqrt(np.diag(cov))
            crit = float(t_ppf(0.5 + level / 2, df))
            for name, b, s in zip(self.names, self.params, se, strict=True):
                out.append(
                    {
                        "model": self.estimator,
                        "term": name,
                        "inference": kind,
                        "estimate": float(b),
                        "std_error": float(s),
                        "ci_low": float(b - crit * s),
                        "ci_high": float(b + crit * s),
                        "p_value": float(2 * t_sf(abs(b / s), df)),
                    }
                )
        return out

    def to_dict(self) -> dict[str, Any]:
        """The model's entry of results.json (the interface contract, "Instruments")."""
        out: dict[str, Any] = {
            "nobs": self.nobs,
            "units": self.units,
            "params": dict(zip(self.names, self.params.tolist(), strict=True)),
            "std_errors": {k: self.std_errors(k) for k in self.covariances},
            "headline_inference": self.headline_inference,
            "first_stage": self.first_stage,
            "weak_iv_robust": self.weak_iv_robust,
        }
        if self.effective_f is not None:
            out["effective_f"] = self.effective_f
        if self.overidentification is not None:
            out["overidentification"] = self.overidentification
        if self.notes:
            out["notes"] = list(self.notes)
        return out


# ------------------------------------------------------------------ small pieces


def dk_bandwidth(periods: int) -> float:
    """Bartlett bandwidth floor(4 (T/100)^(2/9)), at least 1 (as estimate.dk_bandwidth)."""
    return float(max(1, int(np.floor(4 * (periods / 100) ** (2 / 9)))))


def nickell_bias(rho: float, periods: int) -> float:
    r"""Approximate bias of fixed effects for an AR(1) coefficient (Nickell 1981), N large.

    With ``periods`` = T observations per unit in the within regression,

    .. math:: -\frac{1+\rho}{T-1}\Big(1-\frac{1}{T}\frac{1-\rho^T}{1-\rho}\Big)
              \Big\{1-\frac{2\rho}{(1-\rho)(T-1)}\Big[1-\frac{1-\rho^T}{T(1-\rho)}\Big]\Big\}^{-1}

    (Nickell 1981, eq. 18; written here from memory and checked by simulation in
    tests/test_instruments.py). About -(1 + rho) / (T - 1) for moderate T.
    """
    t = float(periods)
    if t < 2:
        raise ValueError("the bias needs at least two periods")
    if abs(rho) >= 1:
        raise ValueError("the formula holds for |rho| < 1")
    a = (1 - rho**t) / (t * (1 - rho))
    num = -(1 + rho) / (t - 1) * (1 - a)
    den = 1 - 2 * rho / ((1 - rho) * (t - 1)) * (1 - a)
    return float(num / den)


def lagged_outcome_finding(term: str, rho: float, periods: int) -> Finding:
    """The audit's finding when the outcome's lag is a regressor under fixed effects.

    ``rho`` is the fixed-effects coefficient of the lag, ``periods`` the number of
    periods per unit in the within regression (the typical unit's). The size is
    Nickell's approximation at the estimate (a rough guide: the bias is evaluated at
    the biased value).
    """
    bias = nickell_bias(float(np.clip(rho, -0.99, 0.99)), max(periods, 2))
    return Finding(
        "lagged_outcome_bias",
        "warning",
        f"{term} (the outcome's own lag) is a regressor: with {periods} periods per unit, "
        f"fixed effects bias its coefficient by about {bias:+.3f} (Nickell 1981), "
        "downward for a positive persistence. Use anderson_hsiao, which instruments "
        "the lagged change with the outcome two periods back.",
        {"term": term, "periods": periods, "approximate_bias": bias},
    )


def _previous(unit: IntArray, period: IntArray) -> IntArray:
    """Each row's row of the same unit one calendar period earlier, or -1."""
    prev = np.full(len(unit), -1, dtype=np.intp)
    ok = (unit[1:] == unit[:-1]) & (period[1:] == period[:-1] + 1)
    prev[1:][ok] = np.flatnonzero(ok)
    return prev


def _sandwich(
    x: FloatArray, resid: FloatArray, time: IntArray, rows: IntArray, effects: int, absorbed: int
) -> Regression:
    """A Regression that `fit.covariance` reads as regressors ``x`` with residuals ``resid``.

    ``covariance`` uses only ``x``, its triangular factor, the residuals and the counts:
    with zero coefficients and ``y = resid`` it computes the sandwich of any scores.
    """
    k = x.shape[1]
    names = tuple(str(j) for j in range(k))
    return Regression(
        names, np.zeros(k), resid, x, triangular_factor(x), time, rows, effects, absorbed
    )


@dataclass(frozen=True)
class _Panel:
    """The transformed data and what every covariance needs about it."""

    estimator: str
    y: FloatArray
    exog: FloatArray
    endog: FloatArray
    instruments: FloatArray
    time: IntArray  # calendar ordinals of the transformed rows
    rows: IntArray  # positions among the input rows
    units: int
    effects: int  # unit effects removed (within)
    absorbed: int  # rank of the other partialled effects
    clusters: IntArray | None  # per transformed row, or None where not usable
    nested: bool
    periods: int
    notes: tuple[str, ...]
    raw_norms: FloatArray  # column norms before the transformation (all stacked columns)


class _Context:
    """Covariance settings shared by every regression of one model."""

    def __init__(self, panel: _Panel, bandwidth: float | None) -> None:
        self.panel = panel
        self.bandwidth = dk_bandwidth(panel.periods) if bandwidth is None else bandwidth
        self.n_clusters = (
            0
            if panel.clusters is None
            else min(
                len(np.unique(c)) for c in np.asarray(panel.clusters).reshape(len(panel.y), -1).T
            )
        )

    def cov(self, reg: Regression, kind: str) -> FloatArray:
        p = self.panel
        if kind == "cluster":
            if p.clusters is None:
                raise ValueError("no usable clusters")
            return covariance(reg, "cluster", clusters=p.clusters, count_effects=not p.nested)
        if kind == "driscoll_kraay":
            return covariance(reg, "driscoll_kraay", bandwidth=self.bandwidth)
        return covariance(reg, kind)

    def df_denominator(self, kind: str, df_resid: int) -> int:
        """Denominator degrees of freedom of F tests (as estimate._reference does for t).

        Common practice, no single source: G - 1 for clusters, T - 1 for Driscoll-Kraay,
        the residual degrees of freedom otherwise.
        """
        if kind == "cluster":
            return self.n_clusters - 1
        if kind == "driscoll_kraay":
            return self.panel.periods - 1
        return df_resid

    def regression(self, y: FloatArray, x: FloatArray, names: Sequence[str]) -> Regression:
        p = self.panel
        return least_squares(
            y,
            x,
            tuple(names),
            time=p.time,
            rows=p.rows,
            effects_df=p.effects,
            absorbed_df=p.absorbed,
        )


def _wald(params: FloatArray, cov: FloatArray) -> float:
    return float(params @ np.linalg.solve(cov, params))


# ------------------------------------------------------------------ transformations


def _checked(data: IVData, need_endog: bool = True) -> None:
    """Identification by counting and by names (before any arithmetic)."""
    endog, instr = data.endog_names, data.instrument_names
    if need_endog and not endog:
        raise PanelpipeError("An IV estimator needs at least one term under `endogenous`.")
    both = sorted(set(instr) & (set(data.exog_names) | set(endog)))
    if both:
        raise PanelpipeError(
            f"{', '.join(both)} is listed as an instrument and as a regressor or endogenous "
            "term; an excluded instrument must not enter the equation itself: keep it in one list."
        )
    if len(instr) < len(endog):
        raise PanelpipeError(
            f"{len(endog)} endogenous term(s) ({', '.join(endog)}) but only {len(instr)} "
            f"instrument(s) ({', '.join(instr) or 'none'}): the model is not identified; "
            "add instruments or remove endogenous terms."
        )
    if data.weights is not None:
        w = np.asarray(data.weights, dtype=float)
        if w.shape != data.y.shape or not np.all(np.isfinite(w) & (w > 0)):
            raise PanelpipeError(
                "Weights must be positive and finite, one per row; "
                f"{int(np.sum(~(np.isfinite(w) & (w > 0))))} are not: fix or drop those rows."
            )
    for what, arr, names in (
        ("outcome", data.y[:, None], (data.outcome_name,)),
        ("regressor", data.exog, data.exog_names),
        ("endogenous term", data.endog, endog),
        ("instrument", data.instruments, instr),
    ):
        bad = ~np.isfinite(arr).all(axis=0)
        if bad.any():
            which = ", ".join(n for n, b in zip(names, bad, strict=True) if b)
            raise PanelpipeError(
                f"The {what} {which} has missing or infinite values in the estimation "
                "sample; drop those rows first."
            )


def _clusters_for(
    data: IVData, rows: IntArray, others: Sequence[IntArray] = ()
) -> tuple[IntArray | None, str]:
    if data.clusters is None:
        return None, ""
    c = np.asarray(data.clusters).reshape(len(data.y), -1)
    for other in others:  # a difference whose rows lie in two clusters has no cluster
        if np.any(c[rows] != c[other]):
            return None, ("Clustered errors left out: some differences join rows of two clusters.")
    return c[rows], ""


def _nested(data: IVData) -> bool:
    if data.clusters is None:
        return False
    c = np.asarray(data.clusters).reshape(len(data.y), -1)
    unit = data.unit
    return all(
        bool(np.all(col == col[np.searchsorted(unit, unit)])) for col in c.T
    )  # rows sorted by unit: the first row of each unit


def _period_codes(period: IntArray) -> IntArray:
    return np.unique(period, return_inverse=True)[1].ravel().astype(np.intp)


def _stack(data: IVData) -> FloatArray:
    return np.column_stack([data.y, data.exog, data.endog, data.instruments])


def _split(estimator: str, data: IVData, both: FloatArray, raw: FloatArray, **kw: Any) -> _Panel:
    kx, ke = data.exog.shape[1], data.endog.shape[1]
    return _Panel(
        estimator,
        both[:, 0],
        both[:, 1 : 1 + kx],
        both[:, 1 + kx : 1 + kx + ke],
        both[:, 1 + kx + ke :],
        periods=len(np.unique(data.period)),
        raw_norms=np.sqrt((raw**2).sum(axis=0)),
        **kw,
    )


def _weighted_demean(v: FloatArray, codes: IntArray, w: FloatArray) -> FloatArray:
    """``v`` minus its weighted means within each code."""
    g = int(codes.max()) + 1
    means = group_sums(v * w[:, None], codes, g) / np.bincount(codes, w, minlength=g)[:, None]
    out: FloatArray = v - means[codes]
    return out


def _pooled_panel(data: IVData) -> _Panel:
    raw = _stack(data)
    codes = _period_codes(data.period)
    if not data.period_effects:
        codes = np.zeros_like(codes)
    k = int(codes.max()) + 1
    if data.weights is None:
        v = demean(raw, codes)
    else:
        w = np.asarray(data.weights, dtype=float)
        v = _weighted_demean(raw, codes, w) * np.sqrt(w)[:, None]
    clusters, _ = _clusters_for(data, np.arange(len(data.y)))
    return _split(
        "pooled_iv",
        data,
        v,
        raw,
        time=data.period,
        rows=np.arange(len(data.y)),
        units=len(np.unique(data.unit)),
        effects=0,
        absorbed=k,
        clusters=clusters,
        nested=False,
        notes=(),
    )


def _within_panel(data: IVData) -> _Panel:
    raw = _stack(data)
    unit = np.unique(data.unit, return_inverse=True)[1].ravel().astype(np.intp)
    g = int(unit.max()) + 1
    if data.weights is not None:
        v, k = _weighted_within(raw, unit, data)
    elif data.period_effects:
        v, k = demean_two_way(raw, unit, _period_codes(data.period))
    else:
        v, k = demean(raw, unit), 0
    clusters, _ = _clusters_for(data, np.arange(len(data.y)))
    return _split(
        "fixed_effects_iv",
        data,
        v,
        raw,
        time=data.period,
        rows=np.arange(len(data.y)),
        units=g,
        effects=g,
        absorbed=k,
        clusters=clusters,
        nested=_nested(data),
        notes=(),
    )


def _weighted_within(raw: FloatArray, unit: IntArray, data: IVData) -> tuple[FloatArray, int]:
    """Weighted within transformation; period effects as dummies partialled out.

    The dummies are formed (N x T memory) because `fit.demean_two_way` has no weights:
    weighted unit demeaning, the square root of the weights, then the least-squares
    projection off the transformed dummies (Frisch-Waugh-Lovell), whose rank is counted.
    """
    w = np.asarray(data.weights, dtype=float)
    root = np.sqrt(w)[:, None]
    v = _weighted_demean(raw, unit, w) * root
    if not data.period_effects:
        return v, 0
    codes = _period_codes(data.period)
    dummies = np.eye(int(codes.max()) + 1)[codes]
    d = _weighted_demean(dummies, unit, w) * root
    coef, _, rank, _ = np.linalg.lstsq(d, v, rcond=None)
    out: FloatArray = v - d @ coef
    return out, int(rank)


def _difference_weights(data: IVData, rows: IntArray, prev: IntArray) -> FloatArray | None:
    if data.weights is None:
        return None
    w = np.asarray(data.weights, dtype=float)
    out: FloatArray = 1.0 / (1.0 / w[rows] + 1.0 / w[prev])
    return out


def _differenced(
    estimator: str,
    data: IVData,
    v: FloatArray,
    raw: FloatArray,
    rows: IntArray,
    before: Sequence[IntArray],
    weights: FloatArray | None = None,
) -> _Panel:
    k = 0
    if data.period_effects and len(rows):
        groups = pd.factorize(data.period[rows])[0]
        k = int(groups.max()) + 1
        v = demean(v, groups) if weights is None else _weighted_demean(v, groups, weights)
    if weights is not None:
        v = v * np.sqrt(weights)[:, None]
    clusters, note = _clusters_for(data, rows, before)
    return _split(
        estimator,
        data,
        v,
        raw,
        time=data.period[rows],
        rows=rows,
        units=len(np.unique(data.unit[rows])),
        effects=0,
        absorbed=k,
        clusters=clusters,
        nested=False,
        notes=(note,) if note else (),
    )


def _fd_panel(data: IVData) -> _Panel:
    prev = _previous(data.unit, data.period)
    rows = np.flatnonzero(prev >= 0)
    v = _stack(data)
    return _differenced(
        "first_difference_iv",
        data,
        v[rows] - v[prev[rows]],
        v[rows],
        rows,
        [prev[rows]],
        _difference_weights(data, rows, prev[rows]),
    )


# ------------------------------------------------------------------ the two stages


def _identified(panel: _Panel, data: IVData) -> None:
    """Instruments that vanish after the transformation or repeat the regressors: refuse."""
    z = np.column_stack([panel.exog, panel.instruments])
    names = data.exog_names + data.instrument_names
    scale = panel.raw_norms[1:] + 1e-300
    kx, ke = len(data.exog_names), len(data.endog_names)
    before = np.r_[scale[:kx], scale[kx + ke :]]
    gone = np.sqrt((z**2).sum(axis=0)) <= 1e-10 * before
    transformation = {
        "pooled_iv": "removing the mean (the period means with period effects)",
        "fixed_effects_iv": "the within transformation (it is constant within units)",
        "first_difference_iv": "first differences (it never changes between periods)",
        "anderson_hsiao": "first differences (it never changes between periods)",
    }[panel.estimator]
    if gone.any():
        which = ", ".join(n for n, g in zip(names, gone, strict=True) if g)
        raise PanelpipeError(
            f"{which} has no variation left after {transformation}; "
            "it cannot serve here: remove it or use another estimator."
        )
    try:
        least_squares(panel.y, z, names, time=panel.time, rows=panel.rows)
    except np.linalg.LinAlgError as exc:
        raise PanelpipeError(
            f"The instruments are collinear with the exogenous regressors ({exc}) under "
            f"{panel.estimator}: each instrument must add variation of its own; remove "
            "the repeated term."
        ) from None


def _fit(
    panel: _Panel,
    data: IVData,
    endog_names: tuple[str, ...],
    instrument_names: tuple[str, ...],
    inference: Sequence[str],
    headline: str | None,
    bandwidth: float | None,
    level: float,
) -> IVResult:
    k_all = panel.exog.shape[1] + panel.instruments.shape[1] + panel.effects + panel.absorbed
    if len(panel.y) <= k_all:
        raise PanelpipeError(
            f"{panel.estimator} has {len(panel.y)} usable rows after its transformation for "
            f"{k_all} coefficients and effects: too few to estimate; supply more periods "
            "or units, or use fewer terms."
        )
    _identified(panel, data)
    ctx = _Context(panel, bandwidth)
    x = np.column_stack([panel.exog, panel.endog])
    z = np.column_stack([panel.exog, panel.instruments])
    names = data.exog_names + endog_names
    kx, ke, q = panel.exog.shape[1], len(endog_names), len(instrument_names)
    notes = list(panel.notes)
    unknown = [k for k in inference if k not in INFERENCE]
    if unknown:
        notes.append(f"{', '.join(unknown)}: not available for IV models.")

    def possible(k: str) -> bool:
        return k in INFERENCE and (k != "cluster" or panel.clusters is not None)

    if headline is None:
        headline = "cluster" if panel.clusters is not None else "robust"
    if not possible(headline):
        notes.append(f"Headline inference {headline} is not available; robust is used.")
        headline = "robust"
    available = list(dict.fromkeys([*(k for k in inference if possible(k)), headline]))
    # first stage: every endogenous term on all instruments (exogenous ones included)
    first = [
        ctx.regression(panel.endog[:, j], z, data.exog_names + instrument_names) for j in range(ke)
    ]
    xhat = np.column_stack([panel.exog] + [f.x @ f.params for f in first])
    try:
        second = least_squares(panel.y, xhat, names, time=panel.time, rows=panel.rows)
    except np.linalg.LinAlgError:
        raise PanelpipeError(
            f"The instruments ({', '.join(instrument_names)}) do not move the endogenous "
            f"terms ({', '.join(endog_names)}) apart from the exogenous regressors and "
            "each other under "
            f"{panel.estimator}: the model is not identified; add or change instruments."
        ) from None
    params = second.params
    resid = panel.y - x @ params
    reg = _sandwich(xhat, resid, panel.time, panel.rows, panel.effects, panel.absorbed)
    covs: dict[str, FloatArray] = {}
    for k in available:
        try:
            covs[k] = ctx.cov(reg, k)
        except np.linalg.LinAlgError as exc:  # e.g. Driscoll-Kraay with too few periods
            if k == headline:
                raise PanelpipeError(
                    f"The {k} covariance of {panel.estimator} cannot be computed ({exc}); "
                    "choose another inference."
                ) from None
            notes.append(f"{k} standard errors left out: {exc}.")
    first_stage = {}
    for name, f in zip(endog_names, first, strict=True):
        block = slice(kx, kx + q)
        stat = _wald(f.params[block], ctx.cov(f, headline)[block, block]) / q
        df2 = ctx.df_denominator(headline, f.df_resid)
        first_stage[name] = {
            "f_statistic": stat,
            "df": [q, df2],
            "p_value": float(f_sf(stat, q, df2)),
            "inference": headline,
            "weak": bool(stat < WEAK_F),
        }
    effective = _effective_f(ctx, first[0], kx, q, headline) if ke == 1 else None
    try:
        ar = _anderson_rubin(
            ctx,
            panel,
            z,
            kx,
            q,
            ke,
            headline,
            level,
            float(params[kx]),
            float(np.sqrt(covs[headline][kx, kx])),
        )
    except np.linalg.LinAlgError as exc:  # a singular covariance of the AR regression
        ar = {
            "method": "Anderson-Rubin test inversion",
            "ci_low": None,
            "ci_high": None,
            "shape": "not_computed",
            "level": level,
            "message": f"not computed: {exc}",
        }
    ar["term"] = endog_names[0]
    return IVResult(
        panel.estimator,
        names,
        params,
        covs,
        len(panel.y),
        panel.units,
        headline,
        first_stage,
        effective,
        ar,
        _endogeneity(ctx, panel, x, names, first, headline),
        _overidentification(ctx, panel, x, z, headline) if q > ke else None,
        {k: ctx.df_denominator(k, reg.df_resid) for k in covs},
        tuple(notes),
    )


def _effective_f(ctx: _Context, first: Regression, kx: int, q: int, kind: str) -> dict[str, Any]:
    r"""Effective first-stage F of Montiel Olea & Pflueger (2013), one endogenous term.

    :math:`F_{eff} = \hat\pi' Z'Z \hat\pi / \mathrm{tr}(\hat V_\pi Z'Z)` with the excluded
    instruments ``Z`` after partialling out the exogenous regressors, ``pi`` their
    first-stage coefficients and ``V_pi`` its covariance of the headline kind; it equals
    the first-stage F when q = 1 or errors are homoskedastic. The statistic only: its
    critical values (the authors' simplified or generalized procedure) are not computed.
    """
    block = slice(kx, kx + q)
    zx = first.x[:, :kx]
    zz = first.x[:, block]
    if kx:
        zz = zz - zx @ np.linalg.lstsq(zx, zz, rcond=None)[0]
    gram = zz.T @ zz
    pi = first.params[block]
    v = ctx.cov(first, kind)[block, block]
    stat = float(pi @ gram @ pi / np.trace(v @ gram))
    return {
        "statistic": stat,
        "inference": kind,
        "method": "Montiel Olea & Pflueger (2013) effective F; statistic only, no critical value",
    }


def _polarized(ctx: _Context, x: FloatArray, a: FloatArray, b: FloatArray, kind: str) -> tuple:
    """Covariances for residuals a, b and their cross term: cov(a - t b) is quadratic in t."""
    p = ctx.panel

    def c(e: FloatArray) -> FloatArray:
        return ctx.cov(_sandwich(x, e, p.time, p.rows, p.effects, p.absorbed), kind)

    caa, cbb = c(a), c(b)
    cab = (c(a + b) - caa - cbb) / 2
    return caa, cab, cbb


def _anderson_rubin(
    ctx: _Context,
    panel: _Panel,
    z: FloatArray,
    kx: int,
    q: int,
    ke: int,
    kind: str,
    level: float,
    estimate: float,
    spread: float,
) -> dict[str, Any]:
    """Anderson-Rubin confidence set for the first endogenous term, by test inversion.

    At a value b the outcome minus b times the term is regressed on all instruments and
    the excluded instruments' coefficients are tested with a Wald/q statistic of the
    headline covariance (cluster-robust when clustered) against F(q, df). Coefficients
    and residuals are linear in b, so every covariance is a quadratic in b (obtained by
    polarization); the statistic is evaluated on a grid over the whole line (b = estimate
    + s tan(theta)) and each crossing refined by ``brentq``. The set may be an interval,
    the union of two rays, the whole line, empty, or several pieces: ``shape`` says
    which, ``pieces`` lists them (None for an unbounded end).
    """
    method = f"Anderson-Rubin test inversion ({kind} covariance)"
    if ke != 1:
        return {
            "method": method,
            "ci_low": None,
            "ci_high": None,
            "shape": "not_computed",
            "level": level,
            "message": "computed only with one endogenous term",
        }
    p = ctx.panel
    w = panel.endog[:, 0]
    coef = np.linalg.lstsq(z, np.column_stack([panel.y, w]), rcond=None)[0]
    ey, ew = panel.y - z @ coef[:, 0], w - z @ coef[:, 1]
    block = slice(kx, kx + q)
    a, c = coef[block, 0], coef[block, 1]
    vyy, vyw, vww = (m[block, block] for m in _polarized(ctx, z, ey, ew, kind))
    df2 = ctx.df_denominator(kind, len(p.y) - z.shape[1] - p.effects - p.absorbed)
    crit = float(f_ppf(level, q, df2))

    def excess(b: FloatArray) -> FloatArray:
        b = np.atleast_1d(b)
        g = a[None, :] - b[:, None] * c[None, :]
        v = vyy[None] - 2 * b[:, None, None] * vyw[None] + (b**2)[:, None, None] * vww[None]
        stat = np.einsum("ij,ij->i", g, np.linalg.solve(v, g[:, :, None])[:, :, 0]) / q
        out: FloatArray = stat - crit
        return out

    scale = max(spread, 1e-8 * max(1.0, abs(estimate)))

    def to_b(t: FloatArray) -> FloatArray:
        out: FloatArray = estimate + scale * np.tan(t)
        return out

    at_inf = float(c @ np.linalg.solve(vww, c)) / q - crit  # limit as b -> +-infinity
    grid = np.linspace(-np.pi / 2, np.pi / 2, _GRID)
    accept = np.r_[at_inf <= 0, excess(to_b(grid[1:-1])) <= 0, at_inf <= 0]

    def crossing(i: int) -> float:
        """The boundary between grid points i and i + 1 (one of them is accepted)."""
        lo, hi = max(grid[i], -np.pi / 2 + 1e-12), min(grid[i + 1], np.pi / 2 - 1e-12)

        def f(t: float) -> float:
            return float(excess(to_b(np.array([t])))[0])

        if np.sign(f(lo)) == np.sign(f(hi)):  # beyond the grid's reach: its last point
            return float(to_b(np.array([lo if accept[i] else hi]))[0])
        return float(to_b(np.array([optimize.brentq(f, lo, hi, xtol=1e-13)]))[0])

    pieces: list[list[float | None]] = []
    changes = np.flatnonzero(accept[1:] != accept[:-1])
    starts = [0] if accept[0] else []
    starts += [int(i) + 1 for i in changes if accept[i + 1]]
    stops = [int(i) for i in changes if accept[i]] + ([len(grid) - 1] if accept[-1] else [])
    for a0, a1 in zip(starts, stops, strict=True):
        low = None if a0 == 0 else crossing(a0 - 1)
        high = None if a1 == len(grid) - 1 else crossing(a1)
        pieces.append([low, high])
    if not pieces:
        shape = "empty"
    elif pieces == [[None, None]]:
        shape = "whole_line"
    elif len(pieces) == 1:
        shape = "interval"
    elif len(pieces) == 2 and pieces[0][0] is None and pieces[1][1] is None:
        shape = "two_rays"
    else:
        shape = "several_pieces"
    bounded = shape == "interval"
    words = {
        "interval": "a bounded interval",
        "two_rays": "unbounded, the union of two rays: the instruments are too weak to "
        "bound this coefficient",
        "whole_line": "the whole line: the data do not restrict this coefficient at all",
        "empty": "empty: no value passes the test, which rejects the instruments' "
        "exclusion (their over-identifying restrictions) as a whole",
        "several_pieces": "several disjoint pieces",
    }
    return {
        "method": method,
        "ci_low": pieces[0][0] if bounded else None,
        "ci_high": pieces[0][1] if bounded else None,
        "shape": shape,
        "pieces": pieces,
        "level": level,
        "message": f"The {level:.0%} Anderson-Rubin set is {words[shape]}.",
    }


def _endogeneity(
    ctx: _Context,
    panel: _Panel,
    x: FloatArray,
    names: tuple[str, ...],
    first: list[Regression],
    kind: str,
) -> dict[str, Any]:
    """Control-function test: the first-stage residuals added to the least-squares twin.

    Regression-based test of Hausman (1978) in the form of Wooldridge (Econometric
    Analysis of Cross Section and Panel Data, 2010, §6.3.1): the outcome on the
    regressors and each endogenous term's first-stage residual, on the same transformed
    data; the residuals' coefficients tested jointly with the headline covariance
    (cluster-robust when clustered), Wald/k against F(k, df).
    """
    v = np.column_stack([f.resid for f in first])
    ke = v.shape[1]
    cf_names = names + tuple(f"_first_stage_residual_{j}" for j in range(ke))
    reg = ctx.regression(panel.y, np.column_stack([x, v]), cf_names)
    block = slice(x.shape[1], x.shape[1] + ke)
    stat = _wald(reg.params[block], ctx.cov(reg, kind)[block, block]) / ke
    df2 = ctx.df_denominator(kind, reg.df_resid)
    return {
        "statistic": stat,
        "df": [ke, df2],
        "p_value": float(f_sf(stat, ke, df2)),
        "method": f"control function, {kind} covariance",
        "compared_with": TWINS[panel.estimator],
    }


def _overidentification(
    ctx: _Context, panel: _Panel, x: FloatArray, z: FloatArray, kind: str
) -> dict[str, Any]:
    """Sargan's statistic (classical) or Hansen's J (other covariances).

    Sargan (1958): N times the uncentred R-squared of the two-stage residuals on all
    instruments. Hansen (1982): two-step efficient GMM with the weight matrix from the
    two-stage residuals' scores summed as the covariance kind sums them (rows, clusters,
    or periods with the Bartlett kernel), without small-sample factors, and J the
    minimized criterion. Chi-squared with (instruments - regressors) degrees of freedom.
    """
    p = ctx.panel
    df = z.shape[1] - x.shape[1]
    coef = np.linalg.lstsq(z, x, rcond=None)[0]
    xhat = z @ coef
    b = np.linalg.lstsq(xhat, p.y, rcond=None)[0]
    u = p.y - x @ b
    if kind == "cluster" and np.asarray(p.clusters).reshape(len(u), -1).shape[1] > 1:
        why = "not computed: Hansen's J with two-way clusters is not built"
        return {"statistic": None, "df": df, "p_value": None, "method": why}
    if kind == "classical":
        fitted = z @ np.linalg.lstsq(z, u, rcond=None)[0]
        stat = len(u) * float(fitted @ fitted) / float(u @ u)
        method = "Sargan"
    else:
        # the meat of `fit.covariance` with the instruments as regressors: the bread is
        # (Z'Z)^-1, so undo it and the N/(N-K) factor (and CR1's) to get the sum of scores
        reg = _sandwich(z, u, p.time, p.rows, 0, 0)
        meat = _raw_meat(ctx, reg, kind)
        if np.linalg.matrix_rank(meat) < meat.shape[0]:
            why = (
                f"not computed: the {kind} weight matrix is singular (too few clusters or periods)"
            )
            return {"statistic": None, "df": df, "p_value": None, "method": why}
        w = np.linalg.inv(meat)
        zx, zy = z.T @ x, z.T @ p.y
        b = np.linalg.solve(zx.T @ w @ zx, zx.T @ w @ zy)
        g = z.T @ (p.y - x @ b)
        stat = float(g @ w @ g)
        method = f"Hansen J ({kind} weight)"
    return {
        "statistic": stat,
        "df": df,
        "p_value": float(chi2_sf(stat, df)),
        "method": method,
        "inference": kind,
    }


def _raw_meat(ctx: _Context, reg: Regression, kind: str) -> FloatArray:
    """Sum of the outer products of the scores (as ``kind`` sums them), no factors."""
    n, k = reg.x.shape
    gram = reg.x.T @ reg.x
    full = ctx.cov(reg, kind)
    scale = n / (n - k - reg.effects_df - reg.absorbed_df)
    meat: FloatArray = gram @ full @ gram / scale
    if kind == "cluster":
        c = np.asarray(ctx.panel.clusters).reshape(n, -1)
        if c.shape[1] > 1:
            raise ValueError("two-way clusters")
        g = len(np.unique(c[:, 0]))
        meat = meat / (g / (g - 1) * (n - 1) / n)
    return (meat + meat.T) / 2


# ------------------------------------------------------------------ entry functions


def _run(
    panel: _Panel,
    data: IVData,
    inference: Sequence[str],
    headline: str | None,
    bandwidth: float | None,
    level: float,
) -> IVResult:
    return _fit(
        panel, data, data.endog_names, data.instrument_names, inference, headline, bandwidth, level
    )


def pooled_iv(
    data: IVData,
    inference: Sequence[str] = INFERENCE,
    *,
    headline: str | None = None,
    bandwidth: float | None = None,
    level: float = 0.95,
) -> IVResult:
    """Two-stage least squares on the pooled rows (constant or period effects partialled)."""
    _checked(data)
    return _run(_pooled_panel(data), data, inference, headline, bandwidth, level)


def fixed_effects_iv(
    data: IVData,
    inference: Sequence[str] = INFERENCE,
    *,
    headline: str | None = None,
    bandwidth: float | None = None,
    level: float = 0.95,
) -> IVResult:
    """Two-stage least squares after the within transformation (unit effects counted)."""
    _checked(data)
    return _run(_within_panel(data), data, inference, headline, bandwidth, level)


def first_difference_iv(
    data: IVData,
    inference: Sequence[str] = INFERENCE,
    *,
    headline: str | None = None,
    bandwidth: float | None = None,
    level: float = 0.95,
) -> IVResult:
    """Two-stage least squares on first differences over consecutive calendar periods."""
    _checked(data)
    return _run(_fd_panel(data), data, inference, headline, bandwidth, level)


def anderson_hsiao(
    data: IVData,
    inference: Sequence[str] = INFERENCE,
    *,
    lag_name: str | None = None,
    headline: str | None = None,
    bandwidth: float | None = None,
    level: float = 0.95,
) -> IVResult:
    """Anderson & Hsiao (1981): first differences, y(t-2) in levels for the lagged change.

    ``data.y`` is the outcome in levels on the panel's rows (not its lag column); the
    lag is formed here: the regression is Delta y(t) on Delta y(t-1) (labelled
    ``lag_name``), the differenced regressors and any other endogenous terms, with
    y(t-2) and the differenced instruments as instruments; a row needs its unit's
    periods t, t-1 and t-2. The regressors must not hold the lagged outcome itself.
    """
    label = lag_name or f"lag({data.outcome_name})"
    if label in data.exog_names + data.endog_names + data.instrument_names:
        raise PanelpipeError(
            f"{label} is the lagged outcome, which anderson_hsiao forms and instruments "
            "itself (with the outcome's second lag); remove it from the regressors, "
            "endogenous terms and instruments."
        )
    _checked(data, need_endog=False)
    prev = _previous(data.unit, data.period)
    prev2 = np.where(prev >= 0, prev[np.maximum(prev, 0)], -1)
    rows = np.flatnonzero(prev2 >= 0)
    if not len(rows):
        raise PanelpipeError(
            "anderson_hsiao needs units observed in three consecutive periods; none is."
        )
    v = _stack(data)
    d = v[rows] - v[prev[rows]]
    y, kx, ke = data.y, data.exog.shape[1], data.endog.shape[1]
    dlag = y[prev[rows]] - y[prev2[rows]]
    stacked = np.column_stack(
        [d[:, : 1 + kx], dlag, d[:, 1 + kx : 1 + kx + ke], y[prev2[rows]], d[:, 1 + kx + ke :]]
    )
    second = f"lag({data.outcome_name}, 2)"
    shaped = IVData(
        np.zeros(len(y)),
        np.zeros((len(y), kx)),
        np.zeros((len(y), ke + 1)),
        np.zeros((len(y), data.instruments.shape[1] + 1)),
        data.unit,
        data.period,
        data.exog_names,
        (label, *data.endog_names),
        (second, *data.instrument_names),
        data.clusters,
        data.period_effects,
        data.outcome_name,
    )
    raw = np.column_stack([v[rows, : 1 + kx], y[prev[rows]], v[rows, 1 + kx :]])
    raw = np.column_stack([raw[:, : 2 + kx + ke], y[prev2[rows]], raw[:, 2 + kx + ke :]])
    weights = _difference_weights(data, rows, prev[rows])
    panel = _differenced(
        "anderson_hsiao", shaped, stacked, raw, rows, [prev[rows], prev2[rows]], weights
    )
    return _fit(
        panel,
        shaped,
        shaped.endog_names,
        shaped.instrument_names,
        inference,
        headline,
        bandwidth,
        level,
    )


IV_ESTIMATORS = {
    "pooled_iv": pooled_iv,
    "fixed_effects_iv": fixed_effects_iv,
    "first_difference_iv": first_difference_iv,
    "anderson_hsiao": anderson_hsiao,
}
