"""Report: results.json, estimates.csv and one self-contained HTML page.

Everything here is a pure function of the stage outputs; the HTML embeds its
styles and figures (inline SVG), loads nothing from the network and escapes
every user-supplied string (Jinja2 autoescaping).
"""

from __future__ import annotations

import io
import unicodedata
from collections.abc import Mapping, Sequence
from typing import Any

import jinja2
import matplotlib

matplotlib.use("svg")
matplotlib.rcParams["svg.hashsalt"] = "panelpipe"  # stable element ids between runs
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from .compare import TestResult  # noqa: E402
from .estimate import ESTIMATOR_LABELS, INFERENCE_LABELS, INTERCEPT, ModelResult  # noqa: E402
from .findings import Finding  # noqa: E402

__all__ = [
    "SCHEMA_VERSION",
    "estimates_table",
    "headline_figures",
    "history_figure",
    "latex_text",
    "loco_figure",
    "markdown_cell",
    "paper_tables",
    "recommend",
    "render_html",
    "render_validation_page",
    "residual_figure",
    "results_document",
]

SCHEMA_VERSION = 1

_ESTIMATES_COLUMNS = [
    "model",
    "term",
    "inference",
    "estimate",
    "std_error",
    "ci_low",
    "ci_high",
    "p_value",
]


def estimates_table(models: Mapping[str, ModelResult]) -> pd.DataFrame:
    """Tidy estimates: one row per model, term (regressors and intercept) and inference.

    The wild cluster bootstrap gives an interval and a p-value but no standard
    error of its own, so its rows leave ``std_error`` empty rather than repeat the
    clustered figure under the bootstrap's name.
    """
    rows = []
    for key, m in models.items():
        terms = [t for t in m.params.index if t in m.terms or t == INTERCEPT]
        for inf_key, inf in m.inference.items():
            for t in (t for t in terms if t in inf.std_errors.index):
                rows.append(
                    (
                        key,
                        t,
                        inf_key,
                        m.params[t],
                        np.nan if inf_key == "wild_bootstrap" else inf.std_errors[t],
                        inf.ci_low[t],
                        inf.ci_high[t],
                        inf.p_values[t],
                    )
                )
    return pd.DataFrame(rows, columns=_ESTIMATES_COLUMNS)


def recommend(
    models: Mapping[str, ModelResult], tests: Mapping[str, TestResult], alpha: float = 0.05
) -> tuple[str, list[str]]:
    """Which estimator the data support, with the reasons in plain words.

    The cluster-robust (Mundlak) comparison decides when it is available: the
    classical Hausman test assumes homoskedastic, serially uncorrelated errors,
    which panels rarely have. A test result is quoted with its p-value.
    """

    def rejects(key: str) -> bool | None:
        t = tests.get(key)
        if t is None or not t.valid or t.p_value is None:
            return None
        return t.p_value < alpha

    def p_of(key: str) -> str:
        p = tests[key].p_value
        return f"p = {p:.3g}" if p is not None and p >= 0.001 else "p < 0.001"

    reasons: list[str] = []
    robust, classical = rejects("hausman_robust"), rejects("hausman")
    decider = "hausman_robust" if robust is not None else "hausman"
    verdict = robust if robust is not None else classical
    if "fixed_effects" in models and verdict is not None:
        label = "cluster-robust Hausman test" if decider == "hausman_robust" else "Hausman test"
        if verdict:
            reasons.append(
                f"The {label} rejects random effects ({p_of(decider)}): the unit effects "
                "appear correlated with the regressors, so random effects and pooled OLS are "
                "likely biased and fixed effects are preferred."
            )
            choice = "fixed_effects"
        else:
            reasons.append(
                f"The {label} does not reject random effects ({p_of(decider)}): fixed and "
                "random effects agree within sampling noise."
            )
            choice = "random_effects" if "random_effects" in models else "fixed_effects"
            if choice == "random_effects":
                reasons.append("Random effects are then more precise and are preferred.")
            lm, f = rejects("breusch_pagan"), rejects("unit_effects_f")
            if lm is False and f is False and "pooled_ols" in models:
                reasons.append(
                    f"Neither the Breusch–Pagan test ({p_of('breusch_pagan')}) nor the F test "
                    f"({p_of('unit_effects_f')}) finds unit effects, so pooled OLS is adequate."
                )
                choice = "pooled_ols"
        if decider == "hausman_robust" and classical is not None and classical != robust:
            reasons.append(
                f"The classical Hausman test disagrees ({p_of('hausman')}); trust the "
                "cluster-robust one, which stays valid when errors are heteroskedastic or "
                "serially correlated."
            )
        return choice, reasons
    for key in (
        "fixed_effects",
        "first_difference",
        "correlated_random_effects",
        "random_effects",
        "pooled_ols",
        "between",
    ):
        if key in models:
            reasons.append(
                f"{ESTIMATOR_LABELS[key]} is the most robust estimator that ran; no comparison "
                "test was available to choose between estimators."
            )
            return key, reasons
    raise ValueError("no model was estimated")


def results_document(
    *,
    analysis: str,
    run: str,
    summary: Mapping[str, Any],
    findings: Sequence[Finding],
    status: str,
    models: Mapping[str, ModelResult],
    tests: Mapping[str, TestResult],
    recommended: str,
    reasons: Sequence[str],
) -> dict[str, Any]:
    """The ``results.json`` document, schema_version 1 (README.md, "Where a run lands")."""
    return {
        "schema_version": SCHEMA_VERSION,
        "analysis": analysis,
        "run_id": run,
        "data": {
            k: summary.get(k)
            for k in ("rows", "units", "periods", "balanced", "first_period", "last_period")
        },
        "validation": {"status": status, "findings": [f.to_dict() for f in findings]},
        "models": {
            k: {kk: v for kk, v in m.to_dict().items() if kk not in {"inference", "all_params"}}
            | _intervals(m)
            | _std_errors_note(m)
            for k, m in models.items()
        },
        "tests": {k: t.to_dict() for k, t in tests.items()},
        "recommendation": {"estimator": recommended, "reasons": list(reasons)},
        "diagnostics": {},
    }


BOOTSTRAP_SE_NOTE = (
    "std_errors.wild_bootstrap repeats the clustered (CR1) standard error that the "
    "bootstrap t-statistic is studentised with; the wild cluster bootstrap has no standard "
    "error of its own: its p-values and intervals are in estimates.csv (inference "
    "wild_bootstrap) and in the report."
)


def _intervals(model: ModelResult) -> dict[str, Any]:
    """``intervals``: per inference, the interval of every reported term at the run's level.

    Beside ``std_errors`` so that a later run can draw this run's intervals as they
    were published, whatever its own level and reference distributions.
    """
    shown = model.to_dict()["params"]
    return {
        "intervals": {
            key: {
                "ci_low": {t: float(inf.ci_low[t]) for t in shown if t in inf.ci_low.index},
                "ci_high": {t: float(inf.ci_high[t]) for t in shown if t in inf.ci_high.index},
            }
            for key, inf in model.inference.items()
        }
    }


def _std_errors_note(model: ModelResult) -> dict[str, Any]:
    """A note beside ``std_errors`` when one of its tables is not what its key says."""
    if "wild_bootstrap" not in model.inference:
        return {}
    return {"std_errors_note": {"wild_bootstrap": BOOTSTRAP_SE_NOTE}}


def headline_figures(model: ModelResult, focus: str) -> dict[str, Any] | None:
    """The recommended estimate of ``focus``, each figure labelled by what produced it.

    The interval and p-value are those of the model's headline inference. Under
    the wild cluster bootstrap, which has no standard error of its own, the
    standard error shown is the clustered (CR1) one, labelled as such (None when
    the model has no clustered inference).
    """
    if focus not in model.terms:
        return None
    key = model.headline_inference
    inf = model.inference[key]
    se_key = "cluster" if key == "wild_bootstrap" else key
    se_inf = model.inference.get(se_key)
    return {
        "estimate": float(model.params[focus]),
        "ci_low": float(inf.ci_low[focus]),
        "ci_high": float(inf.ci_high[focus]),
        "p_value": float(inf.p_values[focus]),
        "inference": key,
        "std_error": None if se_inf is None else float(se_inf.std_errors[focus]),
        "std_error_inference": se_key,
    }


def term_label(term: str) -> str:
    """How a term is shown to people."""
    return "intercept" if term == INTERCEPT else term


_LATEX_SPECIALS = {
    "\\": r"\textbackslash{}",
    "{": r"\{",
    "}": r"\}",
    "$": r"\$",
    "&": r"\&",
    "#": r"\#",
    "^": r"\textasciicircum{}",
    "_": r"\_",
    "%": r"\%",
    "~": r"\textasciitilde{}",
}


_MARKDOWN_SPECIALS = {"\\": "\\\\", "|": "\\|"}


def _escape(text: str, specials: Mapping[str, str], hidden: str) -> str:
    """``text`` with each special character replaced, in one pass over the characters.

    White-space controls (line breaks, tabs) become spaces; a character that
    prints nothing (a control or format character, a line or paragraph
    separator) is shown by its code point through the format ``hidden``.
    """
    out = []
    for ch in text:
        if ch in "\t\n\r\v\f":
            out.append(" ")
        elif unicodedata.category(ch) in {"Cc", "Cf", "Cs", "Co", "Cn", "Zl", "Zp"}:
            out.append(hidden.format(ord(ch)))
        else:
            out.append(specials.get(ch, ch))
    return "".join(out)


def latex_text(text: str) -> str:
    """``text`` for LaTeX's text mode: each of its ten special characters escaped.

    One pass, so the braces of an inserted command are never escaped again;
    non-printing characters are shown as ``<U+XXXX>``.
    """
    return _escape(text, _LATEX_SPECIALS, r"\textless{{}}U+{:04X}\textgreater{{}}")


def markdown_cell(text: str) -> str:
    """``text`` for a Markdown table cell: backslashes, pipes and line breaks escaped."""
    return _escape(text, _MARKDOWN_SPECIALS, "<U+{:04X}>")


def paper_tables(
    models: Mapping[str, ModelResult], regressors: Sequence[str], level: float
) -> tuple[str, str]:
    """The estimates table for papers: Markdown and LaTeX.

    Estimators as columns, one row per term with the coefficient and, below it,
    the interval under that estimator's headline inference. Every label and
    caption is escaped for its format, since column names come from the data.
    """
    terms = [
        t
        for t in (*regressors, INTERCEPT)
        if any(t in m.terms or (t == INTERCEPT and t in m.params.index) for m in models.values())
    ]
    header = [
        f"{ESTIMATOR_LABELS[key]} ({INFERENCE_LABELS[m.headline_inference]})"
        for key, m in models.items()
    ]
    rows: list[tuple[str, list[str]]] = []
    for t in terms:
        cells = []
        for m in models.values():
            inf = m.inference[m.headline_inference]
            if t in inf.std_errors.index and t in m.params.index:
                cells.append(f"{m.params[t]:.4f} [{inf.ci_low[t]:.4f}, {inf.ci_high[t]:.4f}]")
            else:
                cells.append("")
        rows.append((term_label(t), cells))
    rows.append(("rows used", [str(m.nobs) for m in models.values()]))
    caption = f"Coefficients with {level * 100:g}% intervals in brackets."

    def md_row(cells: Sequence[str]) -> str:
        return "| " + " | ".join(markdown_cell(c) for c in cells) + " |"

    markdown = "\n".join(
        [
            md_row(["term", *header]),
            "|:--|" + "--:|" * len(header),
            *(md_row([label, *cells]) for label, cells in rows),
        ]
    )
    latex = "\n".join(
        [
            r"\begin{table}",
            r"\centering",
            rf"\caption{{{latex_text(caption)}}}",
            rf"\begin{{tabular}}{{l{'r' * len(header)}}}",
            r"\hline",
            " & ".join(latex_text(c) for c in ["term", *header]) + r" \\",
            r"\hline",
            *(" & ".join(latex_text(c) for c in [label, *cells]) + r" \\" for label, cells in rows),
            r"\hline",
            r"\end{tabular}",
            r"\end{table}",
        ]
    )
    return markdown + f"\n\n{markdown_cell(caption)}\n", latex + "\n"


# ---------------------------------------------------------------- figures

_PALETTE = ["#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00"]  # Okabe-Ito


def _svg(fig: Any) -> str:
    buf = io.StringIO()
    fig.savefig(
        buf,
        format="svg",
        bbox_inches="tight",
        metadata={"Creator": None, "Date": None, "Format": None, "Type": None},
    )
    plt.close(fig)
    text = buf.getvalue()
    return text[text.index("<svg") :]


#: Beyond this many regressors the coefficient figure shows the headline term only:
#: one small panel per term stops being readable.
MAX_FIGURE_TERMS = 5


def coefficient_figure(models: Mapping[str, ModelResult], regressors: Sequence[str]) -> str:
    """Coefficients across estimators with headline intervals, one panel per term.

    With more than `MAX_FIGURE_TERMS` regressors only the first (the headline
    term) is drawn.
    """
    shown = list(regressors) if len(regressors) <= MAX_FIGURE_TERMS else [regressors[0]]
    n = len(shown)
    width = 3.1 * n if n > 1 else 6.0
    fig, axes = plt.subplots(1, n, figsize=(width, 0.45 * len(models) + 1.4), squeeze=False)
    keys = list(models)
    for ax, term in zip(axes[0], shown, strict=True):
        for i, key in enumerate(keys):
            m = models[key]
            if term not in m.terms:
                continue
            inf = m.inference[m.headline_inference]
            ax.errorbar(
                m.params[term],
                i,
                xerr=[[m.params[term] - inf.ci_low[term]], [inf.ci_high[term] - m.params[term]]],
                fmt="o",
                color=_PALETTE[i % len(_PALETTE)],
                capsize=3,
            )
        ax.axvline(0.0, color="#999999", lw=0.8, ls=":")
        ax.set_yticks(range(len(keys)))
        ax.set_yticklabels([ESTIMATOR_LABELS[k] for k in keys] if ax is axes[0][0] else [])
        ax.set_ylim(len(keys) - 0.5, -0.5)
        ax.set_title(term, fontsize=10)
        ax.tick_params(labelsize=8)
    fig.tight_layout()
    return _svg(fig)


def _factorize_units(values: pd.Series) -> tuple[np.ndarray, pd.Index]:
    """Integer codes and levels of unit ids, in numeric order when all are numbers."""
    codes, levels = pd.factorize(values, sort=True)
    as_numbers = pd.to_numeric(pd.Series(levels.astype(str)), errors="coerce")
    if len(levels) and as_numbers.notna().all():
        order = np.argsort(as_numbers.to_numpy(), kind="stable")
        rank = np.empty_like(order)
        rank[order] = np.arange(len(order))
        return rank[codes], pd.Index(levels[order])
    return codes, pd.Index(levels)


def presence_figure(
    panel: pd.DataFrame,
    unit: str,
    period: str,
    labels: Mapping[str, str] | None = None,
    used: pd.Series | None = None,
) -> str | None:
    """Which unit was observed in which period, and whether the estimates use the row.

    ``used`` marks the rows that have the outcome and every regressor (all rows when
    not given). None when every unit is observed in every period and every row is
    used: the map would be a solid block, and the page says so in words. Units
    are ordered as numbers when every id reads as one (so 1094 comes before
    10043), otherwise as text.
    """
    from matplotlib.patches import Patch

    unit_codes, unit_levels = _factorize_units(panel[unit])
    period_codes, period_levels = pd.factorize(panel[period], sort=True)
    in_use = np.ones(len(panel), bool) if used is None else np.asarray(used, bool)
    if len(panel) == len(unit_levels) * len(period_levels) and in_use.all():
        return None
    n_shown = min(80, len(unit_levels))
    rows = unit_codes < n_shown  # the first units in sorted order
    grid = np.zeros((n_shown, len(period_levels)))
    # Dark: used by the estimates; pale: in the data but lacking a value; white: absent.
    grid[unit_codes[rows], period_codes[rows]] = np.where(in_use[rows], 1.0, 0.35)
    fig, ax = plt.subplots(
        figsize=(min(0.32 * len(period_levels) + 2, 9), min(0.07 * n_shown + 1.2, 5.5) + 0.5)
    )
    cmap = plt.get_cmap("Blues")
    ax.imshow(grid, aspect="auto", cmap=cmap, vmin=0, vmax=1.3, interpolation="nearest")
    ax.set_xticks(range(len(period_levels)))
    names = labels or {}
    ax.set_xticklabels([names.get(str(c), str(c)) for c in period_levels], rotation=90, fontsize=7)
    step = max(1, n_shown // 20)
    ax.set_yticks(range(0, n_shown, step))
    ax.set_yticklabels([str(u) for u in unit_levels[:n_shown:step]], fontsize=7)
    ax.set_xlabel(period)
    ax.set_ylabel(unit)
    legend = [Patch(facecolor=cmap(1.0 / 1.3), edgecolor="grey", label="used by the estimates")]
    if not in_use.all():
        lacking = f"in the data, lacking the outcome or a regressor ({int((~in_use).sum())} rows)"
        legend.append(Patch(facecolor=cmap(0.35 / 1.3), edgecolor="grey", label=lacking))
    legend.append(Patch(facecolor="white", edgecolor="grey", label="not in the data"))
    ax.legend(handles=legend, loc="lower left", bbox_to_anchor=(0, 1.01), fontsize=7, frameon=False)
    if len(unit_levels) > n_shown:
        ax.set_title(f"first {n_shown} of {len(unit_levels)} units", fontsize=8, loc="right")
    fig.tight_layout()
    return _svg(fig)


def variance_share_figure(panel: pd.DataFrame, unit: str, regressors: Sequence[str]) -> str:
    """Within-unit and between-unit share of each regressor's variance."""
    within = []
    for col in regressors:
        x = panel[col].astype(float)
        total = float(x.var(ddof=0))
        w = float((x - x.groupby(panel[unit]).transform("mean")).var(ddof=0))
        within.append(w / total if total > 0 else 0.0)
    fig, ax = plt.subplots(figsize=(6, 0.4 * len(regressors) + 1))
    y = np.arange(len(regressors))
    ax.barh(y, within, color=_PALETTE[0], label="within units")
    ax.barh(y, 1 - np.asarray(within), left=within, color=_PALETTE[1], label="between units")
    ax.set_yticks(y)
    ax.set_yticklabels(list(regressors), fontsize=8)
    ax.set_xlim(0, 1)
    ax.invert_yaxis()
    ax.legend(fontsize=8, loc="lower right", framealpha=0.9)
    ax.set_xlabel("share of variance")
    fig.tight_layout()
    return _svg(fig)


def loco_figure(diagnostic: Mapping[str, Any]) -> str | None:
    """Leave-one-cluster-out estimates of the focus coefficient, sorted."""
    effect = diagnostic.get("effect") or {}
    loo = effect.get("leave_one_out")
    if not loo:
        return None
    labels = list(loo)
    values = np.array([loo[k] if loo[k] is not None else np.nan for k in labels])
    order = np.argsort(values)
    est, band = effect.get("estimate"), effect.get("cr1_interval")
    shown = order if len(order) <= 60 else np.concatenate([order[:30], order[-30:]])
    fig, ax = plt.subplots(figsize=(min(0.16 * len(shown) + 2, 11), 2.8))
    x = np.arange(len(shown))
    ax.plot(x, values[shown], "o", color=_PALETTE[0], ms=3.5)
    if est is not None:
        ax.axhline(est, color=_PALETTE[1], lw=1.2)
        if band:
            ax.axhspan(band[0], band[1], color=_PALETTE[1], alpha=0.15)
    ax.set_xticks(x)
    ax.set_xticklabels([str(labels[i]) for i in shown], rotation=90, fontsize=6)
    ax.set_ylabel("estimate without the cluster", fontsize=8)
    if len(order) > len(shown):
        ax.set_title(f"the 30 lowest and 30 highest of {len(order)} clusters", fontsize=8)
    fig.tight_layout()
    return _svg(fig)


def residual_figure(fitted: np.ndarray, resid: np.ndarray) -> str:
    """Residuals against fitted values, and a normal quantile plot."""
    from .distributions import norm_ppf

    rng = np.random.default_rng(0)
    keep = rng.choice(len(resid), size=min(len(resid), 4000), replace=False)
    fig, (a, b) = plt.subplots(1, 2, figsize=(9, 3.2))
    a.scatter(fitted[keep], resid[keep], s=4, alpha=0.5, color=_PALETTE[0])
    a.axhline(0.0, color="#999999", lw=0.8)
    a.set_xlabel("fitted (within units)", fontsize=8)
    a.set_ylabel("residual", fontsize=8)
    osr = np.sort(resid[keep])
    osm = norm_ppf((np.arange(1, len(osr) + 1) - 0.5) / len(osr))  # Hazen plotting positions
    slope, intercept = np.polyfit(osm, osr, 1)
    b.plot(osm, osr, "o", ms=2.5, alpha=0.6, color=_PALETTE[0])
    b.plot(osm, slope * np.asarray(osm) + intercept, color=_PALETTE[1], lw=1)
    b.set_xlabel("normal quantiles", fontsize=8)
    b.set_ylabel("residual quantiles", fontsize=8)
    for ax in (a, b):
        ax.tick_params(labelsize=7)
    fig.tight_layout()
    return _svg(fig)


def history_figure(runs: Sequence[Mapping[str, Any]], model: str, term: str) -> str | None:
    """The headline coefficient of ``model`` across runs, with headline intervals.

    Each run's interval is the one it published (``intervals`` in its results.json,
    at its own level); a run written before intervals were kept there shows the
    point alone.
    """
    points = []
    for r in runs:
        m = r["models"].get(model)
        if not m or term not in m["params"]:
            continue
        published = m.get("intervals", {}).get(m["headline_inference"], {})
        low, high = (published.get(k, {}).get(term) for k in ("ci_low", "ci_high"))
        value = m["params"][term]
        bar = (value - low, high - value) if low is not None and high is not None else (0.0, 0.0)
        points.append((f"{r['run_id'][:8]}\n(to {r['last_period']})", value, bar))
    if len(points) < 2:
        return None
    fig, ax = plt.subplots(figsize=(min(1.1 * len(points) + 2, 10), 2.8))
    x = np.arange(len(points))
    ax.errorbar(
        x,
        [p[1] for p in points],
        yerr=np.array([p[2] for p in points]).T,
        fmt="o-",
        color=_PALETTE[0],
        capsize=3,
    )
    ax.set_xticks(x)
    ax.set_xticklabels([p[0] for p in points], fontsize=7)
    ax.set_ylabel(term, fontsize=8)
    ax.axhline(0.0, color="#999999", lw=0.8, ls=":")
    fig.tight_layout()
    return _svg(fig)


# ---------------------------------------------------------------- HTML


def _fmt(value: Any, digits: int = 4) -> str:
    if value is None:
        return "–"
    if isinstance(value, float):
        if not np.isfinite(value):
            return "–"
        return (
            f"{value:.{digits}g}"
            if abs(value) >= 1e4 or abs(value) < 1e-3
            else f"{value:.{digits}f}"
        )
    return str(value)


def _pvalue(p: float | None) -> str:
    if p is None:
        return "–"
    return "< 0.001" if p < 0.001 else f"{p:.3f}"


_ENV = jinja2.Environment(
    loader=jinja2.PackageLoader("panelpipe", "templates"),
    autoescape=True,
    undefined=jinja2.StrictUndefined,
    trim_blocks=True,
    lstrip_blocks=True,
)
_ENV.filters["num"] = _fmt
_ENV.filters["pvalue"] = _pvalue
_ENV.filters["term"] = term_label
_ENV.filters["root"] = lambda v: None if v is None or not v >= 0 else float(np.sqrt(v))


STATUS_MARKS = {"ok": "✔", "caution": "▲", "problem": "✖", "not_run": "○"}
STATUS_WORDS = {"ok": "ok", "caution": "caution", "problem": "problem", "not_run": "not run"}
DIAGNOSTIC_LABELS = {
    "omitted_variables": "Omitted variables",
    "strict_exogeneity": "Feedback and simultaneity",
    "functional_form": "Functional form",
    "measurement_error": "Measurement error",
    "attrition": "Attrition and selection",
    "missing_data": "Missing values",
    "serial_correlation": "Errors correlated within units",
    "cross_sectional_dependence": "Errors correlated across units",
    "heteroskedasticity": "Unequal error variances",
    "few_clusters": "Few clusters",
    "influential_clusters": "Influential clusters",
}


def render_html(context: Mapping[str, Any]) -> str:
    """Render the report page from a context built by the report step."""
    context = dict(context)
    context.setdefault("status_marks", STATUS_MARKS)
    context.setdefault("status_words", STATUS_WORDS)
    context.setdefault("diagnostic_labels", DIAGNOSTIC_LABELS)
    counts: dict[str, int] = {}
    for d in context.get("diagnostics", {}).values():
        counts[d["status"]] = counts.get(d["status"], 0) + 1
    context.setdefault(
        "audit_counts",
        {k: counts[k] for k in ("problem", "caution", "ok", "not_run") if k in counts},
    )
    context.setdefault("max_figure_terms", MAX_FIGURE_TERMS)
    context.setdefault("estimator_labels", ESTIMATOR_LABELS)
    context.setdefault("inference_labels", INFERENCE_LABELS)
    context.setdefault("audit_cautions", audit_cautions(context.get("diagnostics", {})))
    # The bootstrap the estimation stage adds by itself below 30 clusters is shown too.
    ran = {k for m in context["models"].values() for k in m.inference}
    keys = list(context.get("inference_keys", []))
    added = [k for k in INFERENCE_LABELS if k in ran - set(keys)]
    context.setdefault("shown_inference", keys + added)
    context.setdefault(
        "used",
        sample_used(
            context["models"][context["recommended"]],
            context.get("diagnostics", {}),
            context.get("summary", {}).get("period_labels") or {},
        ),
    )
    return _ENV.get_template("report.html.j2").render(**context)


def audit_cautions(diagnostics: Mapping[str, Mapping[str, Any]]) -> list[dict[str, str]]:
    """One line per audit check that flagged something, problems first."""
    order = {"problem": 0, "caution": 1}
    flagged = [(k, d) for k, d in diagnostics.items() if d.get("status") in order]
    flagged.sort(key=lambda kd: order[kd[1]["status"]])
    return [
        {"status": d["status"], "label": DIAGNOSTIC_LABELS.get(k, k), "message": d["message"]}
        for k, d in flagged
    ]


_SAMPLE_WORDS = {"first_difference": "differences", "between": "unit means"}


def sample_used(
    model: ModelResult, diagnostics: Mapping[str, Any], period_labels: Mapping[str, str]
) -> dict[str, Any]:
    """Rows, units and periods the recommended estimate used, for the question and headline.

    The periods' span comes from the missing-data check (the rows kept after
    missing values were dropped); without it, from the loaded data.
    """
    details = (diagnostics.get("missing_data") or {}).get("details") or {}
    sample = details.get("sample_used") or {}
    loss = details.get("loss") or {}

    def label(period: Any) -> Any:
        return period_labels.get(str(period), period)

    return {
        "rows": model.nobs,
        "what": _SAMPLE_WORDS.get(model.key, "rows"),
        "units": model.units,
        "periods": model.periods,
        "first_period": label(sample["first_period"]) if sample.get("first_period") else None,
        "last_period": label(sample["last_period"]) if sample.get("last_period") else None,
        "rows_dropped": loss.get("rows_dropped", 0),
    }


def render_validation_page(context: Mapping[str, Any]) -> str:
    """The page written for a run that failed validation."""
    return _ENV.get_template("validation.html.j2").render(**context)
