"""What the top of the report says, read from the HTML of a real small run.

Two invented analyses of 21 schools over 2014-2021 in one run: one with about a
third of its outcomes missing (more often at the schools that spend most on
tutoring), one complete. With 21 clusters the wild cluster bootstrap is the
headline inference, which the report must label as the bootstrap's interval and
p-value, never as a standard error.
"""

from __future__ import annotations

import html
import json
import re
from typing import Any

import numpy as np
import pandas as pd
import pytest
import yaml

from _support import run_panelpipe

pytestmark = pytest.mark.slow

GENERAL_CAUTIONS = (
    "These are associations.",
    "Check your local data-protection rules",
    "Decisions that affect people, budgets or policy rest with qualified analysts",
)


def schools(seed: int, *, missing: bool) -> pd.DataFrame:
    """21 invented schools, 2014-2021: reading score on tutoring hours and class size."""
    rng = np.random.default_rng(seed)
    n, t = 21, 8
    effect = rng.normal(size=n)
    tutoring = 2.0 + 0.6 * effect[:, None] + rng.normal(size=(n, t))
    class_size = 25.0 + rng.normal(size=(n, t))
    score = 50.0 + 1.5 * tutoring - 0.3 * class_size + 3.0 * effect[:, None]
    score = score + rng.normal(size=(n, t))
    if missing:
        busy = tutoring.mean(axis=1) > np.median(tutoring.mean(axis=1))
        score = np.where(rng.uniform(size=(n, t)) < 0.05 + 0.6 * busy[:, None], np.nan, score)
    return pd.DataFrame(
        {
            "school": np.repeat([f"school_{i:02d}" for i in range(n)], t),
            "year": np.tile(np.arange(2014, 2014 + t), n),
            "reading": score.ravel().round(3),
            "tutoring": tutoring.ravel().round(3),
            "class_size": class_size.ravel().round(3),
        }
    )


def analysis(source: str) -> dict[str, Any]:
    return {
        "sources": [source],
        "unit": "school",
        "period": "year",
        "outcome": "reading",
        "regressors": ["tutoring", "class_size"],
        "estimators": ["pooled_ols", "fixed_effects", "random_effects"],
        "inference": ["classical", "cluster"],
        "bootstrap": {"draws": 999},
    }


@pytest.fixture(scope="module")
def run(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    base = tmp_path_factory.mktemp("wording")
    frames = {"gappy": schools(8, missing=True), "complete": schools(9, missing=False)}
    for name, frame in frames.items():
        frame.to_csv(base / f"{name}.csv", index=False)
    config = {"output_dir": "out", "analyses": {k: analysis(f"{k}.csv") for k in frames}}
    (base / "c.yaml").write_text(yaml.safe_dump(config), encoding="utf-8")
    done = run_panelpipe(base, "run", "--config", "c.yaml")
    assert done.returncode == 0, done.stderr[-3000:]
    out: dict[str, Any] = {"frames": frames}
    for name in frames:
        folder = base / "out" / name
        run_dir = folder / (folder / "latest").read_text(encoding="utf-8").strip()
        out[name] = {
            "html": (run_dir / "report.html").read_text(encoding="utf-8"),
            "results": json.loads((run_dir / "results.json").read_text(encoding="utf-8")),
            "estimates": pd.read_csv(run_dir / "estimates.csv"),
        }
    return out


def text_of(page: str, start: str, end: str) -> str:
    """The visible text between two markers, tags removed and spaces collapsed."""
    part = page[page.index(start) : page.index(end, page.index(start))]
    return re.sub(r"\s+", " ", html.unescape(re.sub(r"<[^>]+>", " ", part)))


def test_the_question_and_headline_give_the_sample_actually_used(run: dict[str, Any]) -> None:
    frame = run["frames"]["gappy"]
    used = frame.dropna()
    # Reference: pandas' count of complete rows (common practice, no source).
    rows, units = len(used), used["school"].nunique()
    assert rows < len(frame)
    question = text_of(run["gappy"]["html"], 'class="question"', "</section>")
    assert f"{units} units (school)" in question
    assert f"using {rows} rows" in question
    assert f"of the {len(frame)} rows and 21 units loaded" in question
    headline = text_of(run["gappy"]["html"], 'class="headline"', 'class="cautions"')
    assert f"{rows} rows of {units} units used (of {len(frame)} rows and 21 units loaded)" in (
        headline
    )
    complete = text_of(run["complete"]["html"], 'class="question"', "</section>")
    assert "using 168 rows" in complete and "loaded" not in complete


def test_bootstrap_figures_are_labelled_by_the_inference_that_produced_them(
    run: dict[str, Any],
) -> None:
    page = run["gappy"]["html"]
    results = run["gappy"]["results"]
    recommended = results["recommendation"]["estimator"]
    model = results["models"][recommended]
    assert model["headline_inference"] == "wild_bootstrap"
    headline = text_of(page, 'class="headline"', 'class="cautions"')
    assert "wild cluster bootstrap standard error" not in page
    assert "wild cluster bootstrap interval" in headline
    assert "wild cluster bootstrap p-value" in headline
    cr1 = model["std_errors"]["cluster"]["tutoring"]
    assert f"clustered (CR1) standard error {cr1:.4f}" in headline
    table = text_of(page, "Standard errors under each inference", "How each standard error")
    assert "wild cluster bootstrap: interval (no standard error of its own)" in table
    # results.json keeps its keys, but says what the bootstrap's standard errors are.
    note = model["std_errors_note"]["wild_bootstrap"]
    assert "clustered (CR1)" in note and "no standard error of its own" in note


def test_the_cautions_name_each_finding_of_the_audit(run: dict[str, Any]) -> None:
    page = run["gappy"]["html"]
    box = text_of(page, 'class="cautions"', "</aside>")
    for line in GENERAL_CAUTIONS:
        assert line in box
    flagged = {
        k: d
        for k, d in run["gappy"]["results"]["diagnostics"].items()
        if d["status"] in {"caution", "problem"}
    }
    assert "missing_data" in flagged and "few_clusters" in flagged
    for diag in flagged.values():
        assert diag["message"] in box
    assert "Missing values:" in box


def test_the_missing_data_check_is_in_the_audit_and_results(run: dict[str, Any]) -> None:
    diag = run["gappy"]["results"]["diagnostics"]["missing_data"]
    frame = run["frames"]["gappy"]
    assert diag["details"]["by_reason"]["reading"]["rows"] == int(frame["reading"].isna().sum())
    audit = text_of(run["gappy"]["html"], 'id="audit"', 'id="changes"')
    assert "Missing values" in audit
    complete = run["complete"]["results"]["diagnostics"]["missing_data"]
    assert complete["status"] == "not_run"


def test_estimates_csv_gives_the_bootstrap_no_standard_error(run: dict[str, Any]) -> None:
    table = run["gappy"]["estimates"]
    boot = table[table["inference"] == "wild_bootstrap"]
    assert len(boot) > 0
    assert boot["std_error"].isna().all()
    assert boot[["ci_low", "ci_high", "p_value"]].notna().all().all()
    assert table.loc[table["inference"] == "cluster", "std_error"].notna().all()
