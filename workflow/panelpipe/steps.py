"""The file-level edge of each pipeline stage, called by the workflow scripts.

Each function reads its inputs from files, calls the pure functions of its
stage and writes its outputs atomically. Nothing here is statistics.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as dt
import json
import platform
import sys
from collections.abc import Iterator, Mapping, Sequence
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
import yaml

from . import __version__
from .config import AnalysisSettings, DatabaseSpec, SourceSpec, source_specs
from .findings import Finding, PanelpipeError
from .ingest import SOURCE, read_panel, source_path
from .runs import atomic_write_text, fault_point, file_digest, input_change
from .validate import validate_panel

if TYPE_CHECKING:
    from .compare import TestResult
    from .estimate import ModelResult

# Each workflow step runs in its own process: the heavy stage modules (the numerical
# core, scipy, matplotlib) are imported inside the steps that need them, so that
# ingest and validation start in a fraction of the time.

__all__ = [
    "compare_step",
    "diagnose_step",
    "estimate_step",
    "ingest_step",
    "report_step",
    "script_guard",
    "validate_step",
]


def _write_json(path: Path | str, doc: Any) -> None:
    atomic_write_text(Path(path), json.dumps(doc, indent=2, ensure_ascii=False, default=str) + "\n")


def _read_json(path: Path | str) -> Any:
    return json.loads(Path(path).read_text(encoding="utf-8"))


def _with_planned_rows(
    specs: Sequence[SourceSpec | DatabaseSpec], planned: Sequence[Sequence[str]]
) -> list[SourceSpec | DatabaseSpec]:
    """Database sources carry the rows' hash of the plan: reading refuses other rows.

    A query the plan does not hold at that place gets no hash, so the check of
    the sources against the plan refuses the run before anything is read.
    """
    out: list[SourceSpec | DatabaseSpec] = []
    for i, spec in enumerate(specs):
        if isinstance(spec, DatabaseSpec):
            same = i < len(planned) and planned[i][0] == spec.label
            spec = dataclasses.replace(spec, expect=str(planned[i][1]) if same else "")
        out.append(spec)
    return out


def _hash_as_planned(
    name: str,
    specs: Sequence[SourceSpec | DatabaseSpec],
    planned: Sequence[Sequence[str]],
    doing: str,
) -> list[tuple[str, str]]:
    """The (path, sha256) of every source now; refuse if they differ from the plan.

    A database source counts with the hash it must have (``expect``): the read
    itself compares the rows with it.
    """
    now = [
        (spec.label, spec.expect)
        if isinstance(spec, DatabaseSpec)
        else (str(spec.path), file_digest(spec.path))
        for spec in specs
    ]
    change = input_change(planned, now)
    if change:
        raise PanelpipeError(
            f"analysis {name!r}: {change} while the run was {doing}. A delivery may still be "
            "arriving: wait until it is complete, then run again. Nothing was estimated."
        )
    return now


def _query_record(spec: SourceSpec | DatabaseSpec) -> dict[str, str]:
    """What the manifest records of a database source besides label, hash and rows."""
    if not isinstance(spec, DatabaseSpec):
        return {}
    from .database import server_of

    return {**server_of(spec), "query": spec.query}


def ingest_step(
    settings: AnalysisSettings,
    panel_out: str,
    sources_out: str,
    *,
    run: str,
    planned: Mapping[str, Any],
) -> None:
    """Read and stack the sources; record each source's hash and row count.

    ``planned`` is the run's plan (`RunPlan.to_dict`): the run id and the
    (path, sha256) of every source as hashed when the run was planned. The files
    are hashed again before and after they are read, so the panel holds exactly
    the bytes the run id names; a file that changed refuses the run. A query is
    run again and its rows must hash as planned; the record of a database source
    adds its server, database and query (never a password: the URL holds none).
    """
    if run != planned["run_id"]:
        raise PanelpipeError(
            f"analysis {settings.name!r}: run {run} is not the run of the current inputs and "
            f"settings ({planned['run_id']}); an earlier run is never redone with other data."
        )
    specs = source_specs(settings.sources, settings.csv, analysis=settings.name)
    specs = _with_planned_rows(specs, planned["inputs"])
    text = list(dict.fromkeys((settings.unit, settings.period, *settings.cluster_by)))
    _hash_as_planned(settings.name, specs, planned["inputs"], "starting")
    panel = read_panel(specs, settings.columns, text=text)
    now = _hash_as_planned(settings.name, specs, planned["inputs"], "reading it")
    counts = panel[SOURCE].astype("string").map(source_path).value_counts(sort=False)
    sources = [
        {"path": path, "sha256": digest, "rows": int(counts.get(path, 0)), **_query_record(spec)}
        for (path, digest), spec in zip(now, specs, strict=True)
    ]
    Path(panel_out).parent.mkdir(parents=True, exist_ok=True)
    panel.to_parquet(panel_out, index=False)
    _write_json(sources_out, sources)


def validate_step(
    settings: AnalysisSettings, raw_in: str, panel_out: str, validation_out: str
) -> None:
    """Validate the stacked panel; on errors write the findings and stop."""
    raw = pd.read_parquet(raw_in)
    result = validate_panel(raw, settings)
    doc = {"analysis": settings.name, **result.to_dict()}
    if result.status == "fail":
        from .report import render_validation_page  # 1.7 s of imports, only on failure

        # Kept beside the run (not declared outputs, which a failed job loses) so that
        # the failed attempt can be read; report.html is never written.
        run_dir = Path(validation_out).parent.parent
        _write_json(run_dir / "validation.json", doc)
        atomic_write_text(
            run_dir / "validation.html",
            render_validation_page(
                {
                    "analysis": settings.name,
                    "run_id": run_dir.name,
                    "created": dt.datetime.now(dt.timezone.utc).replace(microsecond=0).isoformat(),
                    "findings": result.findings,
                    "sources": sorted({str(x) for x in raw["_source"].unique()}),
                }
            ),
        )
        errors = [f for f in result.findings if f.severity == "error"]
        lines = "\n".join(f"  - [{f.code}] {f.message}" for f in errors)
        raise PanelpipeError(
            f"analysis {settings.name!r}: validation failed with {len(errors)} error(s); "
            f"nothing was estimated:\n{lines}\nThe findings are in {run_dir}/validation.html.",
            errors,
        )
    result.panel.to_parquet(panel_out, index=False)
    _write_json(validation_out, doc)


def estimate_step(settings: AnalysisSettings, panel_in: str, models_out: str) -> None:
    """Fit every configured estimator on the validated panel."""
    from .estimate import estimate_all, make_design

    panel = pd.read_parquet(panel_in)
    design, findings = make_design(panel, settings)
    models, more = estimate_all(design)
    findings += more
    if not models:
        raise PanelpipeError(f"analysis {settings.name!r}: no estimator could be fitted.", findings)
    _write_json(
        models_out,
        {
            "models": {k: m.to_dict() for k, m in models.items()},
            "findings": [f.to_dict() for f in findings],
        },
    )


def _load_models(path: str) -> tuple[dict[str, ModelResult], list[Finding]]:
    from .estimate import ModelResult

    doc = _read_json(path)
    models = {k: ModelResult.from_dict(k, v) for k, v in doc["models"].items()}
    findings = [
        Finding(f["code"], f["severity"], f["message"], f.get("where", {})) for f in doc["findings"]
    ]
    return models, findings


def compare_step(settings: AnalysisSettings, panel_in: str, models_in: str, tests_out: str) -> None:
    """Run the comparison tests between the fitted estimators."""
    from .compare import run_comparisons
    from .estimate import make_design

    models, _ = _load_models(models_in)
    design, _ = make_design(pd.read_parquet(panel_in), settings)
    tests = run_comparisons(design, models)
    _write_json(tests_out, {k: {**t.to_dict(), "valid": t.valid} for k, t in tests.items()})


def diagnose_step(settings: AnalysisSettings, panel_in: str, diagnostics_out: str) -> None:
    """Run the validity audit on the fixed-effects model.

    The audit fits the fixed-effects model itself (the same deterministic
    computation as the estimate step, a few seconds at a million rows) so that
    it runs beside the estimate step instead of after it.
    """
    from .diagnose import run_audit
    from .estimate import estimate_one, make_design, planned_inference

    panel = pd.read_parquet(panel_in)
    design, _ = make_design(panel, settings)
    models = {}
    if "fixed_effects" in settings.estimators:
        inference, _ = planned_inference(design)
        fe, _ = estimate_one(design, "fixed_effects", inference)
        if fe is not None:
            models["fixed_effects"] = fe
    # The validated panel, before rows with missing values are dropped, is what
    # the missing-data check compares the rows used with.
    audit = run_audit(design, models, focus=settings.regressors[0], panel=panel)
    _write_json(diagnostics_out, {k: d.to_dict() for k, d in audit.items()})


def _load_tests(path: str) -> dict[str, TestResult]:
    from .compare import TestResult

    doc = _read_json(path)
    return {
        k: TestResult(
            v["name"],
            v["null"],
            v.get("statistic"),
            v.get("df"),
            v.get("p_value"),
            v.get("note", ""),
            v.get("invalid_reason", ""),
        )
        for k, v in doc.items()
    }


def _versions() -> dict[str, str]:
    out = {"python": platform.python_version(), "panelpipe": __version__}
    # The libraries that compute the run's numbers and files (linearmodels is the
    # reference the numerical core is tested against, not used by a run).
    for pkg in (
        "pandas",
        "numpy",
        "scipy",
        "pyarrow",
        "snakemake",
        "matplotlib",
        "jinja2",
    ):
        try:
            out[pkg] = metadata.version(pkg)
        except metadata.PackageNotFoundError:
            out[pkg] = "not installed"
    return out


def _benchmarks(folder: Path) -> dict[str, float]:
    times: dict[str, float] = {}
    for tsv in sorted(folder.glob("*.tsv")):
        try:
            times[tsv.stem] = float(pd.read_csv(tsv, sep="\t")["s"].iloc[0])
        except (OSError, KeyError, ValueError, IndexError):
            continue
    return times


def _residuals(
    panel: pd.DataFrame, settings: AnalysisSettings, models: Mapping[str, ModelResult]
) -> str | None:
    """The residual figure of the fixed-effects model, on about 4,000 rows.

    Whole units are drawn at random (seeded) until about 4,000 rows are in; the
    within transformation works unit by unit, so their residuals are exactly
    those of the full fit, without transforming every row of a large panel.
    """
    from .estimate import PERIOD_PREFIX, make_design
    from .fit import demean
    from .report import residual_figure

    fe = models.get("fixed_effects")
    if fe is None:
        return None
    units = pd.unique(panel[settings.unit])
    counts = panel[settings.unit].value_counts()
    order = np.random.default_rng(0).permutation(len(units))
    sizes = counts.reindex(units[order]).to_numpy()
    take = units[order][: int(np.searchsorted(np.cumsum(sizes), 4000)) + 1]
    design, _ = make_design(panel[panel[settings.unit].isin(take)], settings)
    period_text = design.periods.astype(str).to_numpy()
    columns = []
    for name in fe.params.index:
        if name in design.x.columns:
            columns.append(design.x[name].to_numpy(dtype=float))
        elif str(name).startswith(PERIOD_PREFIX):
            columns.append((period_text == str(name)[len(PERIOD_PREFIX) :]).astype(float))
        else:
            return None
    unit = design.unit_codes
    xw = demean(np.column_stack(columns), unit)
    yw = demean(design.y.to_numpy(dtype=float), unit)
    fitted = xw @ fe.params.to_numpy()
    return residual_figure(fitted, yw - fitted)


def report_step(
    settings: AnalysisSettings,
    run: str,
    *,
    sources_in: str,
    panel_in: str,
    validation_in: str,
    models_in: str,
    tests_in: str,
    diagnostics_in: str,
    outputs: Mapping[str, str],
    config: Mapping[str, Any],
) -> None:
    """Assemble results.json, estimates.csv, manifest.json and report.html."""
    from .changes import RunData, look_back
    from .estimate import INTERCEPT, usable_rows
    from .report import (
        coefficient_figure,
        estimates_table,
        headline_figures,
        history_figure,
        loco_figure,
        paper_tables,
        presence_figure,
        recommend,
        render_html,
        results_document,
        variance_share_figure,
    )

    sources: Sequence[dict[str, Any]] = _read_json(sources_in)
    validation = _read_json(validation_in)
    models, model_findings = _load_models(models_in)
    tests = _load_tests(tests_in)
    diagnostics = _read_json(diagnostics_in)
    panel = pd.read_parquet(panel_in)
    used = usable_rows(panel, settings)
    findings = [
        Finding(f["code"], f["severity"], f["message"], f.get("where", {}))
        for f in validation["findings"]
    ] + model_findings
    status = validation["status"]
    recommended, reasons = recommend(models, tests)
    summary = validation["summary"]
    doc = results_document(
        analysis=settings.name,
        run=run,
        summary=summary,
        findings=findings,
        status=status,
        models=models,
        tests=tests,
        recommended=recommended,
        reasons=reasons,
    )
    table = estimates_table(models)
    created = dt.datetime.now(dt.timezone.utc).replace(microsecond=0).isoformat()
    run_dir = Path(outputs["html"]).parent
    # Earlier runs are only read; one that is damaged or made with other columns
    # becomes a note in the changes, never a reason to stop this run.
    changes, earlier = look_back(
        run_dir.parent,
        RunData(run, doc, settings.to_dict(), created, summary["frequency"], panel),
    )
    doc["changes"] = changes
    doc["diagnostics"] = diagnostics
    runs = [
        *earlier,
        {
            "run_id": run,
            "created": created,
            "last_period": summary.get("last_period"),
            "models": doc["models"],
        },
    ]
    manifest = {
        "analysis": settings.name,
        "run_id": run,
        "created": created,
        "inputs": list(sources),
        "settings": settings.to_dict(),
        "config": dict(config),
        "versions": _versions(),
        "timings_seconds": _benchmarks(run_dir / "benchmarks"),
    }
    focus = settings.regressors[0]
    headline = headline_figures(models[recommended], focus)
    terms = list(dict.fromkeys([*settings.regressors, INTERCEPT]))
    html = render_html(
        {
            "analysis": settings.name,
            "run_id": run,
            "created": created,
            "version": __version__,
            "outcome": settings.outcome,
            "regressors": list(settings.regressors),
            "focus": focus,
            "unit": settings.unit,
            "period": settings.period,
            "level": settings.level,
            "data": doc["data"],
            "summary": summary,
            "sources": sources,
            "findings": findings,
            "validation_status": status,
            "n_warnings": sum(f.severity == "warning" for f in findings),
            "models": models,
            "tests": tests,
            "recommended": recommended,
            "reasons": reasons,
            "headline": headline,
            "table_terms": terms,
            "intercept": INTERCEPT,
            "inference_keys": list(settings.inference),
            "period_effects_note": {
                k: ("yes" if settings.period_effects and k != "between" else "no") for k in models
            },
            "figures": {
                "coefficients": coefficient_figure(models, settings.regressors),
                "presence": presence_figure(
                    panel, settings.unit, settings.period, summary.get("period_labels"), used
                ),
                # The shares of the rows the estimates use, as the caption says.
                "variance": variance_share_figure(
                    panel.loc[used], settings.unit, settings.regressors
                ),
                "history": history_figure(runs, recommended, focus),
                "loco": loco_figure(diagnostics.get("influential_clusters", {})),
                "residuals": _residuals(panel, settings, models),
            },
            "changes": changes,
            "diagnostics": diagnostics,
            "versions": manifest["versions"],
            "settings_yaml": yaml.safe_dump(
                settings.to_dict(), sort_keys=False, allow_unicode=True
            ),
        }
    )
    atomic_write_text(Path(outputs["estimates"]), table.to_csv(index=False, lineterminator="\n"))
    markdown, latex = paper_tables(models, settings.regressors, settings.level)
    atomic_write_text(Path(outputs["markdown"]), markdown)
    atomic_write_text(Path(outputs["latex"]), latex)
    _write_json(outputs["results"], doc)
    _write_json(outputs["manifest"], manifest)
    fault_point("report:writing")
    atomic_write_text(Path(outputs["html"]), html)


@contextlib.contextmanager
def script_guard(log_path: str) -> Iterator[None]:
    """Run a workflow script with stderr in its log and user errors made plain.

    A `PanelpipeError` is written to the log and to the terminal without a
    traceback, and the script exits with status 1 so that Snakemake stops.
    """
    terminal = sys.stderr
    Path(log_path).parent.mkdir(parents=True, exist_ok=True)
    with open(log_path, "w", encoding="utf-8") as log:
        sys.stderr = log
        try:
            yield
        except PanelpipeError as err:
            log.write(f"panelpipe: {err}\n")
            terminal.write(f"\npanelpipe: {err}\n\n")
            terminal.flush()
            raise SystemExit(1) from None
        finally:
            sys.stderr = terminal
