"""Treatment switched on at different times: the two-way estimate audited.

When the headline regressor is a 0/1 treatment that, once on, stays on, and units
switch it on in different periods (staggered adoption), the two-way fixed-effects
coefficient averages many 2x2 comparisons, some of which use already-treated units
as controls; with effects that change over time since adoption it can mislead,
even in sign. This module

* detects staggered adoption and says why it is absent (`detect`);
* decomposes the two-way coefficient into its 2x2 comparisons (Goodman-Bacon 2021);
* attaches the two-way coefficient's weights to the treated cells and reports the
  negative ones (de Chaisemartin & D'Haultfœuille 2020);
* estimates group-time average effects, their aggregation to an overall effect and
  an event-time profile with simultaneous bands, and a joint pre-adoption test
  (Callaway & Sant'Anna 2021);
* turns the comparison into the ``treatment_timing`` diagnostic.

Everything works on plain arrays (unit codes, period ordinals, outcome, treatment,
optional cluster codes); the one entry point is `timing_audit`.

Sample. The decomposition identity holds on a balanced panel only, so the audit
keeps the units observed (outcome and treatment present) in every period of the
panel and says how many others it left out; units treated from their first period
are left out too (they have no period before adoption to compare with). The
two-way coefficient audited is that of the outcome on the treatment alone with unit
and period effects, on this sample: it equals the fixed-effects headline only when
the model has no other regressors and the panel is complete.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from .distributions import chi2_sf, norm_ppf, norm_sf
from .findings import PanelpipeError

__all__ = [
    "THRESHOLDS",
    "Detection",
    "TimingResult",
    "TimingSkipped",
    "detect",
    "timing_audit",
]

Comparison = Literal["never", "not_yet"]
Float = npt.NDArray[np.float64]
Int = npt.NDArray[np.int64]

THRESHOLDS: Mapping[str, float] = {
    # Judgement, no published source: when the negative weights of the two-way
    # estimate add up to -0.2 or less, a fifth of its weight sits on treated cells
    # with the wrong sign, enough to move it far from any average effect when effects
    # change with time since adoption.
    "negative_weight_sum": -0.2,
    # The identity of the decomposition is checked at run time to this relative
    # precision; beyond it the decomposition is withheld rather than reported.
    "identity_tolerance": 1e-8,
}
"""Thresholds of the ``treatment_timing`` diagnostic (see comments in the source)."""

_NEVER = np.iinfo(np.int64).max  # adoption index of never-treated units


@dataclass(frozen=True)
class Detection:
    """Whether the treatment is switched on at different times, and why not.

    Parameters
    ----------
    present
        True when the treatment is 0/1, never switches off within a unit, and
        switches on in at least two different periods.
    reason
        One plain sentence: what was found (or why staggered adoption is absent).
    cohorts
        Units per adoption period (label -> count), units of known adoption only.
    never_treated
        Units never treated in the panel.
    excluded
        Units left out of the cohorts and why (treated from their first
        observation, or a gap just before adoption so that its period is unknown).
    """

    present: bool
    reason: str
    cohorts: dict[str, int] = field(default_factory=dict)
    never_treated: int = 0
    excluded: dict[str, str] = field(default_factory=dict)


@dataclass(frozen=True)
class TimingSkipped:
    """The audit could not run; ``reason`` says why in one sentence."""

    reason: str
    detection: Detection

    def to_dict(self) -> None:
        """No ``timing`` section in results.json."""
        return None

    def diagnostic(self) -> dict[str, Any]:
        """The ``treatment_timing`` entry: not run, with the reason."""
        return {
            "status": "not_run",
            "statistic": None,
            "p_value": None,
            "message": f"Not run: {self.reason}",
            "details": {"reason": self.reason},
        }


@dataclass(frozen=True)
class TimingResult:
    """What the audit found; `to_dict` gives results.json's ``timing`` section."""

    cohorts: dict[str, int]
    never_treated: int
    decomposition: list[dict[str, Any]]
    two_way_estimate: float
    two_way_std_error: float
    negative_weights: dict[str, float]
    treated_cell_weights: list[dict[str, Any]]
    group_time: list[dict[str, Any]]
    event_study: list[dict[str, Any]]
    band_critical_value: float
    overall: dict[str, float]
    pre_trends: dict[str, float] | None
    pre_trends_reason: str
    difference: dict[str, float]
    comparison: Comparison
    level: float
    sample: dict[str, Any]

    def to_dict(self) -> dict[str, Any]:
        """The ``timing`` keys of the interface contract, plus documented extensions.

        Extensions: ``decomposition[].comparison_cohort`` (the other cohort, or
        ``never``), ``group_time[].event_time``, ``event_study[].band_low/high``
        (simultaneous band; ``ci_low/high`` are pointwise), ``two_way_std_error``,
        ``comparison_group``, ``never_treated``, ``sample``.
        """
        return {
            "cohorts": dict(self.cohorts),
            "decomposition": [dict(r) for r in self.decomposition],
            "two_way_estimate": self.two_way_estimate,
            "negative_weights": dict(self.negative_weights),
            "group_time": [dict(r) for r in self.group_time],
            "event_study": [dict(r) for r in self.event_study],
            "overall": dict(self.overall),
            "pre_trends": None if self.pre_trends is None else dict(self.pre_trends),
            "two_way_std_error": self.two_way_std_error,
            "comparison_group": self.comparison,
            "never_treated": self.never_treated,
            "sample": dict(self.sample),
        }

    def diagnostic(self) -> dict[str, Any]:
        """The ``treatment_timing`` diagnostic: status, statistic, p-value, message.

        ``problem`` when the two-way and the group-time overall estimates differ
        beyond sampling noise (a z test on their difference, with the standard error
        from both estimates' influence functions summed by cluster, so their
        covariance is counted) or when negative weights sum to
        ``THRESHOLDS['negative_weight_sum']`` or less; ``caution`` when the joint
        pre-adoption test rejects at 1 - level; ``ok`` otherwise.
        """
        alpha = 1.0 - self.level
        diff = self.difference
        neg = self.negative_weights["sum"]
        material = neg <= THRESHOLDS["negative_weight_sum"]
        differs = diff["p_value"] < alpha
        pre_reject = self.pre_trends is not None and self.pre_trends["p_value"] < alpha
        tw, ov = self.two_way_estimate, self.overall["estimate"]
        if differs:
            status = "problem"
            message = (
                f"The two-way estimate ({tw:.4g}) differs from the average effect over "
                f"adoption cohorts ({ov:.4g}) by more than sampling noise, so the headline "
                "mixes comparisons against already-treated units and should not be read "
                "as the programme's average effect."
            )
        elif material:
            status = "problem"
            message = (
                f"Negative weights sum to {neg:.2f} in the two-way estimate ({tw:.4g}), so "
                "if effects change with time since adoption the headline can be far from "
                f"any average effect; read the cohort-based estimate ({ov:.4g}) beside it."
            )
        elif pre_reject:
            status = "caution"
            message = (
                "Before adoption, adopting units already moved differently from their "
                "comparison units, so both the two-way and the cohort-based estimates may "
                "carry a trend that is not the programme's effect."
            )
        else:
            status = "ok"
            message = (
                f"The two-way estimate ({tw:.4g}) agrees with the average effect over "
                f"adoption cohorts ({ov:.4g}) within sampling noise, so staggered adoption "
                "does not visibly distort the headline."
            )
        return {
            "status": status,
            "statistic": diff["z"],
            "p_value": diff["p_value"],
            "message": message,
            "details": {
                "reference": "standard normal (difference of the two estimates)",
                "difference": dict(diff),
                "negative_weights": dict(self.negative_weights),
                "negative_weight_threshold": THRESHOLDS["negative_weight_sum"],
                "pre_trends": None if self.pre_trends is None else dict(self.pre_trends),
                "pre_trends_reason": self.pre_trends_reason,
                "comparison_group": self.comparison,
                "sample": dict(self.sample),
            },
        }


# ---------------------------------------------------------------- detection


@dataclass(frozen=True)
class _Rows:
    """The rows as integer codes, sorted by unit then period, missing rows dropped."""

    unit: Int
    period: Int  # index into `grid`
    y: Float
    d: Float
    unit_names: list[str]
    grid_names: list[str]
    cluster: Int | None
    dropped_missing: int


def _rows(
    unit: Sequence[Any] | npt.ArrayLike,
    period: Sequence[Any] | npt.ArrayLike,
    y: npt.ArrayLike,
    d: npt.ArrayLike,
    cluster: npt.ArrayLike | None,
    period_labels: Mapping[Any, str] | None,
) -> _Rows:
    u_raw = np.asarray(unit)
    p_raw = np.asarray(period)
    yv = np.asarray(y, dtype=float)
    dv = np.asarray(d, dtype=float)
    n = u_raw.shape[0]
    if not (p_raw.shape[0] == yv.shape[0] == dv.shape[0] == n) or (
        cluster is not None and np.asarray(cluster).shape[0] != n
    ):
        raise PanelpipeError(
            "timing audit: unit, period, outcome, treatment (and cluster) columns have "
            "different lengths; pass one value per row."
        )
    keep = np.isfinite(yv) & np.isfinite(dv)
    u_names, u_code = np.unique(u_raw, return_inverse=True)
    p_vals, p_code = np.unique(p_raw, return_inverse=True)
    labels = [period_labels[v] if period_labels is not None else str(v) for v in p_vals.tolist()]
    cl = None if cluster is None else np.unique(np.asarray(cluster), return_inverse=True)[1]
    u_code, p_code, yv, dv = u_code[keep], p_code[keep], yv[keep], dv[keep]
    cl = None if cl is None else cl[keep]
    order = np.lexsort((p_code, u_code))
    u_code, p_code, yv, dv = u_code[order], p_code[order], yv[order], dv[order]
    cl = None if cl is None else cl[order]
    same = (np.diff(u_code) == 0) & (np.diff(p_code) == 0)
    if same.any():
        i = int(np.flatnonzero(same)[0])
        raise PanelpipeError(
            f"timing audit: unit {u_names[u_code[i]]} has two rows for period "
            f"{labels[p_code[i]]}; keep one row per unit and period."
        )
    return _Rows(
        u_code.astype(np.int64),
        p_code.astype(np.int64),
        yv,
        dv,
        [str(v) for v in u_names.tolist()],
        labels,
        None if cl is None else cl.astype(np.int64),
        int((~keep).sum()),
    )


def _adoption(rows: _Rows) -> tuple[Detection, Int]:
    """Detection, and each unit's adoption index (`_NEVER`, or -1 when unknown)."""
    u, p, d = rows.unit, rows.period, rows.d
    n_units = len(rows.unit_names)
    adopt = np.full(n_units, _NEVER, dtype=np.int64)
    bad = (d != 0.0) & (d != 1.0)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        return Detection(
            False,
            f"the treatment takes values other than 0 and 1 (e.g. {d[i]:g} in unit "
            f"{rows.unit_names[u[i]]} at period {rows.grid_names[p[i]]}).",
        ), adopt
    off = (np.diff(u) == 0) & (np.diff(d) < 0)
    if off.any():
        i = int(np.flatnonzero(off)[0]) + 1
        return Detection(
            False,
            f"the treatment switches off in unit {rows.unit_names[u[i]]} at period "
            f"{rows.grid_names[p[i]]}, so adoption is not once and for all.",
        ), adopt
    first_row = np.r_[True, np.diff(u) != 0]
    on = (d == 1.0) & (first_row | np.r_[False, np.diff(d) > 0])
    excluded: dict[str, str] = {}
    for i in np.flatnonzero(on).tolist():
        name = rows.unit_names[u[i]]
        if p[i] == 0:
            adopt[u[i]] = -1
            excluded[name] = "treated from the first period"
        elif first_row[i]:
            adopt[u[i]] = -1
            excluded[name] = f"treated from its first row ({rows.grid_names[p[i]]})"
        elif p[i - 1] != p[i] - 1:
            adopt[u[i]] = -1
            excluded[name] = (
                f"a gap just before its first treated period {rows.grid_names[p[i]]}, "
                "so the adoption period is unknown"
            )
        else:
            adopt[u[i]] = p[i]
    cohorts = _cohort_counts(adopt, rows.grid_names)
    never = int((adopt == _NEVER).sum())
    if len(cohorts) >= 2:
        reason = (
            f"the treatment switches on in {len(cohorts)} different periods "
            f"({', '.join(cohorts)}); {never} units are never treated."
        )
        return Detection(True, reason, cohorts, never, excluded), adopt
    if len(cohorts) == 1:
        reason = (
            f"all units that switch the treatment on do so in one period ({next(iter(cohorts))})."
        )
    elif excluded:
        reason = (
            "no unit switches the treatment on within the panel; every treated unit is "
            "treated from its first row."
        )
    else:
        reason = "no unit is ever treated."
    return Detection(False, reason, cohorts, never, excluded), adopt


def _cohort_counts(adopt: Int, names: list[str]) -> dict[str, int]:
    """Units per known adoption period, keyed by the period's label."""
    values, counts = np.unique(adopt[(adopt >= 0) & (adopt != _NEVER)], return_counts=True)
    return {names[v]: int(c) for v, c in zip(values.tolist(), counts.tolist(), strict=True)}


def detect(
    unit: npt.ArrayLike,
    period: npt.ArrayLike,
    d: npt.ArrayLike,
    *,
    period_labels: Mapping[Any, str] | None = None,
) -> Detection:
    """Whether the 0/1 treatment ``d`` is switched on at different times.

    Parameters
    ----------
    unit, period, d
        One value per row: unit codes, period values (sortable; ordinals),
        treatment. Rows whose treatment is missing are ignored.
    period_labels
        Optional text for each period value (default ``str(value)``).

    Notes
    -----
    Staggered adoption as in Goodman-Bacon (2021, *J. Econometrics*) and Callaway &
    Sant'Anna (2021, *J. Econometrics*): the treatment is 0/1, absorbing (never
    switches off), and switches on in at least two periods. A unit's adoption period
    is its first treated period when the period just before it is observed untreated;
    units treated from their first row, or with a gap just before adoption, have an
    unknown adoption period and are listed in ``excluded``.
    """
    dv = np.asarray(d, dtype=float)
    rows = _rows(unit, period, np.zeros(dv.shape[0]), dv, None, period_labels)
    return _adoption(rows)[0]


# ---------------------------------------------------------------- the balanced sample


@dataclass(frozen=True)
class _Panel:
    Y: Float  # units x periods
    adopt: Int  # adoption index per unit, _NEVER if never
    cluster: Int  # cluster code per unit (units themselves by default)
    unit_names: list[str]
    grid_names: list[str]


def _balanced(rows: _Rows, adopt: Int) -> tuple[_Panel, dict[str, Any]]:
    n_units, n_periods = len(rows.unit_names), len(rows.grid_names)
    counts = np.bincount(rows.unit, minlength=n_units)
    full = (counts == n_periods) & (adopt >= 0)
    keep_rows = full[rows.unit]
    units = np.flatnonzero(full)
    Y = rows.y[keep_rows].reshape(units.size, n_periods)
    if rows.cluster is None:
        cluster = np.arange(units.size, dtype=np.int64)
    else:
        cl = rows.cluster[keep_rows].reshape(units.size, n_periods)
        varies = (cl != cl[:, :1]).any(axis=1)
        if varies.any():
            name = rows.unit_names[units[int(np.flatnonzero(varies)[0])]]
            raise PanelpipeError(
                f"timing audit: unit {name} belongs to more than one cluster; cluster by a "
                "column that is constant within each unit (or by the unit)."
            )
        cluster = np.unique(cl[:, 0], return_inverse=True)[1].astype(np.int64)
    sample = {
        "units": int(units.size),
        "periods": n_periods,
        "units_left_out": int(n_units - units.size),
        "rows_with_missing_values": rows.dropped_missing,
        "rule": (
            "units observed in every period, with a known adoption period (or never "
            "treated), not treated in their first period"
        ),
    }
    names = [rows.unit_names[i] for i in units]
    return _Panel(Y, adopt[units], cluster, names, rows.grid_names), sample


# ---------------------------------------------------------------- two-way and its decomposition


def _two_way(panel: _Panel) -> tuple[float, Float, Float]:
    """Two-way coefficient, its per-unit influence function, and demeaned D (N x T).

    Balanced panel: the two-way within transformation is x - row mean - column mean
    + grand mean (common practice, no source needed), so no regression library is
    needed; tests hold it equal to statsmodels OLS with unit and period dummies.
    """
    Y = panel.Y
    n, t = Y.shape
    D = (np.arange(t)[None, :] >= panel.adopt[:, None]).astype(float)

    def within(a: Float) -> Float:
        out: Float = a - a.mean(axis=1, keepdims=True) - a.mean(axis=0, keepdims=True) + a.mean()
        return out

    Dt, Yt = within(D), within(Y)
    sdd = float((Dt * Dt).sum())
    beta = float((Dt * Yt).sum() / sdd)
    resid = Yt - beta * Dt
    psi = n * (Dt * resid).sum(axis=1) / sdd
    return beta, psi, Dt


def _decomposition(
    panel: _Panel, Dt: Float, beta: float
) -> tuple[list[dict[str, Any]], dict[str, float], list[dict[str, Any]]]:
    """Goodman-Bacon's 2x2 comparisons and de Chaisemartin–D'Haultfœuille weights.

    Notes
    -----
    Goodman-Bacon (2021, *J. Econometrics*), Theorem 1, balanced panel, no
    covariates. With sample shares n_k of timing groups (and n_U of never treated),
    share of treated periods Dbar_k, and V the variance of the two-way demeaned
    treatment: treated k vs never treated has weight
    (n_k + n_U)^2 n_kU (1 - n_kU) Dbar_k (1 - Dbar_k) / V; for k adopting before l,
    the comparison of k with l not yet treated (window before l adopts) has weight
    ((n_k + n_l)(1 - Dbar_l))^2 n_kl (1 - n_kl) (Dbar_k - Dbar_l)(1 - Dbar_k)
    / (1 - Dbar_l)^2 / V, and l against k already treated (window from k's adoption)
    has ((n_k + n_l) Dbar_k)^2 n_kl (1 - n_kl) Dbar_l (Dbar_k - Dbar_l) / Dbar_k^2 / V,
    with n_ab = n_a / (n_a + n_b). Each 2x2 estimate is a difference of mean changes.
    The identity (weights sum to one, weighted estimates sum to the two-way
    coefficient) is checked here; the decomposition is withheld if it fails.

    de Chaisemartin & D'Haultfœuille (2020, *AER*), Theorem 1: the two-way
    coefficient is a weighted sum of the effects in treated (cohort, period) cells
    with weights proportional to N_gt times the two-way demeaned treatment of the
    cell, normalised to sum to one over treated cells; some may be negative.
    """
    Y, adopt, names = panel.Y, panel.adopt, panel.grid_names
    t = Y.shape[1]
    V = float((Dt * Dt).mean())
    groups = [int(a) for a in np.unique(adopt) if a != _NEVER]
    share = {a: float((adopt == a).mean()) for a in [*groups, _NEVER]}
    gmean = {a: Y[adopt == a].mean(axis=0) for a in [*groups, _NEVER] if share[a] > 0}
    dbar = {a: (t - a) / t for a in groups}

    def change(a: int, lo: int, mid: int, hi: int) -> float:
        m = gmean[a]
        return float(m[mid:hi].mean() - m[lo:mid].mean())

    rows: list[dict[str, Any]] = []
    for k in groups:
        if share[_NEVER] > 0:
            nk, nu = share[k], share[_NEVER]
            s = nk / (nk + nu)
            w = (nk + nu) ** 2 * s * (1 - s) * dbar[k] * (1 - dbar[k]) / V
            est = change(k, 0, k, t) - change(_NEVER, 0, k, t)
            rows.append(_pair(names[k], "never", "never", w, est))
        for lat in (g for g in groups if g > k):
            nk, nl = share[k], share[lat]
            s = nk / (nk + nl)
            dk, dl = dbar[k], dbar[lat]
            w = ((nk + nl) * (1 - dl)) ** 2 * s * (1 - s) * (dk - dl) * (1 - dk) / (1 - dl) ** 2 / V
            est = change(k, 0, k, lat) - change(lat, 0, k, lat)
            rows.append(_pair(names[k], "not_yet", names[lat], w, est))
            w = ((nk + nl) * dk) ** 2 * s * (1 - s) * dl * (dk - dl) / dk**2 / V
            est = change(lat, k, lat, t) - change(k, k, lat, t)
            rows.append(_pair(names[lat], "already", names[k], w, est))
    weights = np.array([r["weight"] for r in rows])
    estimates = np.array([r["estimate"] for r in rows])
    tol = THRESHOLDS["identity_tolerance"]
    if abs(weights.sum() - 1.0) > tol or abs(weights @ estimates - beta) > tol * max(
        1.0, abs(beta), float(np.abs(estimates).max())
    ):
        rows = []

    cell_w: list[dict[str, Any]] = []
    for k in groups:
        for p in range(k, t):
            cell_w.append(
                {
                    "cohort": names[k],
                    "period": names[p],
                    "raw": share[k] * float(Dt[adopt == k, p][0]),
                }
            )
    total = sum(c["raw"] for c in cell_w)
    for c in cell_w:
        c["weight"] = c.pop("raw") / total
    neg = [c["weight"] for c in cell_w if c["weight"] < 0]
    negative = {"share": len(neg) / len(cell_w), "sum": float(sum(neg))}
    return rows, negative, cell_w


def _pair(treated: str, kind: str, other: str, weight: float, estimate: float) -> dict[str, Any]:
    return {
        "treated": treated,
        "comparison": kind,
        "weight": float(weight),
        "estimate": float(estimate),
        "comparison_cohort": other,
    }


# ---------------------------------------------------------------- group-time effects


@dataclass(frozen=True)
class _Cells:
    cohort: Int  # adoption index per cell
    period: Int
    estimate: Float
    psi: Float  # units x cells


def _group_time(panel: _Panel, comparison: Comparison) -> _Cells:
    """ATT(g, t) without covariates, and their influence functions.

    Notes
    -----
    Callaway & Sant'Anna (2021, *J. Econometrics*), Theorem 1 with no covariates
    (the unconditional difference in mean changes) and the influence function of
    their Section 4: for treated cohort g and comparison units C,
    psi_i = (1[G_i = g] / p_g)(dY_i - mean_g dY) - (1[i in C] / p_C)(dY_i - mean_C dY),
    with dY_i = Y_it - Y_ib. Base period b = g - 1 for every t (a "universal" base:
    pre-adoption cells are long differences to the period before adoption and the
    profile is zero at event time -1 by construction, as in a regression event
    study; Roth 2024, "Interpreting event-studies from recent difference-in-
    differences methods", recommends it for plotting). Comparison units: never
    treated (``never``), or not yet treated at max(t, b) and not in cohort g
    (``not_yet``, which includes the never treated).
    """
    Y, adopt = panel.Y, panel.adopt
    n, t = Y.shape
    cohorts, periods, est, psis = [], [], [], []
    for g in (int(a) for a in np.unique(adopt) if a != _NEVER):
        b = g - 1
        treated = adopt == g
        for p in range(t):
            if p == b:
                continue
            # not yet treated at max(p, b) includes the never treated (_NEVER is large)
            control = adopt == _NEVER if comparison == "never" else (adopt > max(p, b)) & ~treated
            if not control.any():
                continue
            dy = Y[:, p] - Y[:, b]
            mg, mc = dy[treated].mean(), dy[control].mean()
            pg, pc = treated.mean(), control.mean()
            psi = np.where(treated, (dy - mg) / pg, 0.0) - np.where(control, (dy - mc) / pc, 0.0)
            cohorts.append(g)
            periods.append(p)
            est.append(mg - mc)
            psis.append(psi)
    return _Cells(
        np.array(cohorts, dtype=np.int64),
        np.array(periods, dtype=np.int64),
        np.array(est, dtype=float),
        np.column_stack(psis) if psis else np.zeros((n, 0)),
    )


def _aggregate(adopt: Int, comp_cohort: Int, est: Float, psi: Float) -> tuple[float, Float]:
    """Cohort-size-weighted average of components and its influence function.

    The weights p_g / sum p_g are estimated, so their influence function enters
    (Callaway & Sant'Anna 2021, Section 4.1, the extra term for estimated weights).
    """
    share = np.array([(adopt == g).mean() for g in comp_cohort])
    total = share.sum()
    w = share / total
    theta = float(w @ est)
    ind = np.column_stack(
        [(adopt == g).astype(float) - s for g, s in zip(comp_cohort, share, strict=True)]
    )
    w_psi = (ind * total - share[None, :] * ind.sum(axis=1, keepdims=True)) / total**2
    return theta, psi @ w + w_psi @ est


def _cluster_se(psi: Float, cluster: Int) -> Float:
    """Standard errors from influence functions summed within clusters."""
    sums = _cluster_sums(psi, cluster)
    out: Float = np.sqrt((sums * sums).sum(axis=0)) / psi.shape[0]
    return out


def _cluster_sums(psi: Float, cluster: Int) -> Float:
    sums = np.zeros((int(cluster.max()) + 1, psi.shape[1]))
    np.add.at(sums, cluster, psi)
    return sums


def _band_critical(
    psi: Float, cluster: Int, se: Float, level: float, seed: int, draws: int
) -> float:
    """Critical value of the simultaneous band from a multiplier bootstrap.

    Callaway & Sant'Anna (2021), Section 4.1 and Algorithm 1: perturb the
    cluster sums of the influence functions with independent mean-zero, unit-variance
    weights (Rademacher here), take the largest standardised deviation over event
    times, and use its ``level`` quantile.
    """
    sums = _cluster_sums(psi, cluster)
    n = psi.shape[0]
    rng = np.random.default_rng(seed)
    ok = se > 0
    if not ok.any():
        return float("nan")
    stats = np.empty(draws)
    step = max(1, min(draws, 4_000_000 // max(1, sums.shape[0])))
    for start in range(0, draws, step):
        m = min(step, draws - start)
        v = rng.choice(np.array([-1.0, 1.0]), size=(m, sums.shape[0]))
        dev = (v @ sums[:, ok]) / n
        stats[start : start + m] = np.abs(dev / se[ok]).max(axis=1)
    return float(np.quantile(stats, level))


# ---------------------------------------------------------------- the entry point


def timing_audit(
    unit: npt.ArrayLike,
    period: npt.ArrayLike,
    y: npt.ArrayLike,
    d: npt.ArrayLike,
    *,
    cluster: npt.ArrayLike | None = None,
    level: float = 0.95,
    comparison: Comparison = "not_yet",
    seed: int = 0,
    draws: int = 999,
    period_labels: Mapping[Any, str] | None = None,
) -> TimingResult | TimingSkipped:
    """Audit the two-way estimate of a staggered 0/1 treatment.

    Parameters
    ----------
    unit, period, y, d
        One value per row: unit codes, period values (sortable ordinals), outcome,
        treatment. Rows with a missing outcome or treatment are dropped.
    cluster
        Optional cluster code per row, constant within a unit (default: the unit).
    level
        Confidence level of intervals and bands; tests reject at 1 - level.
    comparison
        ``not_yet`` (default: every unit not yet treated, the never treated
        included, so it also works without a never-treated group and uses the most
        data) or ``never`` (only never-treated units).
    seed, draws
        The multiplier bootstrap of the simultaneous bands.
    period_labels
        Optional text for each period value (default ``str(value)``).

    Returns
    -------
    TimingResult, or TimingSkipped with the reason when the audit cannot apply.

    Notes
    -----
    Goodman-Bacon (2021, *J. Econometrics*); de Chaisemartin & D'Haultfœuille (2020,
    *AER*); Callaway & Sant'Anna (2021, *J. Econometrics*). Aggregations weight
    cohorts by their size. The overall effect is the cohort-size-weighted average of
    each cohort's mean effect over its post-adoption periods. The pre-adoption test
    is a Wald test that the event-time estimates before -1 are all zero, with the
    covariance from the influence functions (chi-squared, df = their number).
    """
    if comparison not in ("never", "not_yet"):
        raise PanelpipeError(
            f"timing audit: comparison group {comparison!r} is not known; use never or not_yet."
        )
    if not 0.5 < level < 1.0:
        raise PanelpipeError(f"timing audit: level {level} must lie between 0.5 and 1.")
    rows = _rows(unit, period, y, d, cluster, period_labels)
    detection, adopt = _adoption(rows)
    if not detection.present:
        return TimingSkipped(detection.reason, detection)
    panel, sample = _balanced(rows, adopt)
    cohorts = _cohort_counts(panel.adopt, panel.grid_names)
    never = int((panel.adopt == _NEVER).sum())
    if len(cohorts) < 2:
        return TimingSkipped(
            "fewer than two adoption cohorts remain among the units observed in every "
            f"period ({sample['units']} of {sample['units'] + sample['units_left_out']} units).",
            detection,
        )
    if comparison == "never" and never == 0:
        return TimingSkipped(
            "no never-treated units remain to compare with; choose the not-yet-treated "
            "comparison group.",
            detection,
        )
    beta, psi_tw, Dt = _two_way(panel)
    decomposition, negative, cell_w = _decomposition(panel, Dt, beta)
    if not decomposition:
        return TimingSkipped(
            "the decomposition of the two-way estimate did not add up to it on this "
            "sample, so it is not reported.",
            detection,
        )
    cells = _group_time(panel, comparison)
    post = cells.period >= cells.cohort
    if not post.any():
        return TimingSkipped(
            "no never-treated and no not-yet-treated comparison units are left for any "
            "period after adoption.",
            detection,
        )
    z = float(norm_ppf(0.5 + level / 2))
    se_cells = _cluster_se(cells.psi, panel.cluster)
    names = panel.grid_names
    group_time = [
        {
            "cohort": names[g],
            "period": names[p],
            "estimate": float(e),
            "std_error": float(s),
            "event_time": int(p - g),
        }
        for g, p, e, s in zip(cells.cohort, cells.period, cells.estimate, se_cells, strict=True)
    ]

    # overall: each cohort's mean over its post periods, then cohort-size weights
    post_cohorts = np.unique(cells.cohort[post])
    by_cohort = np.column_stack(
        [(post & (cells.cohort == g)) / (post & (cells.cohort == g)).sum() for g in post_cohorts]
    )
    overall, psi_ov = _aggregate(
        panel.adopt, post_cohorts, cells.estimate @ by_cohort, cells.psi @ by_cohort
    )

    # event-time profile
    etimes = np.unique(cells.period - cells.cohort)
    es_est, es_psi = [], []
    for e in etimes:
        pick = (cells.period - cells.cohort) == e
        theta, psi = _aggregate(
            panel.adopt, cells.cohort[pick], cells.estimate[pick], cells.psi[:, pick]
        )
        es_est.append(theta)
        es_psi.append(psi)
    es_psi_m = np.column_stack(es_psi)
    es_se = _cluster_se(es_psi_m, panel.cluster)
    crit = _band_critical(es_psi_m, panel.cluster, es_se, level, seed, draws)
    event_study = [
        {
            "event_time": int(e),
            "estimate": float(th),
            "std_error": float(s),
            "ci_low": float(th - z * s),
            "ci_high": float(th + z * s),
            "band_low": float(th - crit * s),
            "band_high": float(th + crit * s),
        }
        for e, th, s in zip(etimes, es_est, es_se, strict=True)
    ]

    both = np.column_stack([psi_ov, psi_tw])
    se_ov, se_tw = (float(v) for v in _cluster_se(both, panel.cluster))
    se_diff = float(_cluster_se((psi_tw - psi_ov)[:, None], panel.cluster)[0])
    zdiff = (beta - overall) / se_diff if se_diff > 0 else 0.0
    difference = {
        "estimate": beta - overall,
        "std_error": se_diff,
        "z": zdiff,
        "p_value": float(2 * norm_sf(abs(zdiff))),
    }

    pre, pre_reason = _pre_trends(etimes, np.array(es_est), es_psi_m, panel.cluster)
    return TimingResult(
        cohorts=cohorts,
        never_treated=never,
        decomposition=decomposition,
        two_way_estimate=beta,
        two_way_std_error=se_tw,
        negative_weights=negative,
        treated_cell_weights=cell_w,
        group_time=group_time,
        event_study=event_study,
        band_critical_value=crit,
        overall={
            "estimate": overall,
            "std_error": se_ov,
            "ci_low": overall - z * se_ov,
            "ci_high": overall + z * se_ov,
        },
        pre_trends=pre,
        pre_trends_reason=pre_reason,
        difference=difference,
        comparison=comparison,
        level=level,
        sample=sample,
    )


def _pre_trends(
    etimes: Int, est: Float, psi: Float, cluster: Int
) -> tuple[dict[str, float] | None, str]:
    """Wald test that every event-time estimate before -1 is zero.

    Covariance from the influence functions summed by cluster; chi-squared with df
    the rank of that covariance (a generalised inverse when it is singular). Roth,
    Sant'Anna, Bilinski & Poe (2023, *J. Econometrics*), Section 3 on pre-trend
    tests and their limits.
    """
    pick = etimes <= -2
    if not pick.any():
        return None, "no period before adoption other than the base period is observed"
    sums = _cluster_sums(psi[:, pick], cluster)
    n = psi.shape[0]
    cov = sums.T @ sums / n**2
    rank = int(np.linalg.matrix_rank(cov))
    if rank == 0:
        return None, "the pre-adoption estimates have no sampling variance"
    stat = float(est[pick] @ np.linalg.pinv(cov) @ est[pick])
    return {"statistic": stat, "df": rank, "p_value": float(chi2_sf(stat, rank))}, ""
