"""The confidence level setting drives every critical value (here ``level: 0.90``).

References: scipy.stats ``t.ppf`` for intervals whose inference uses a t reference
distribution (the degrees of freedom named in each inference's ``reference``), and
``norm.ppf`` for the comparison of an estimate between two runs (a difference of
two estimates over their combined standard error, read on the normal scale).
"""

from __future__ import annotations

import csv
import json
import re
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from _support import (
    HOSTILE_HEADER,
    hostile_analysis,
    hostile_rows,
    run_panelpipe,
    write_hostile_config,
)
from panelpipe.changes import RunData, diff_runs


def _run(level: float, z_move: float) -> RunData:
    """A run whose one coefficient sits ``z_move`` combined standard errors from zero."""
    panel = pd.DataFrame({"region": ["north", "south"], "year": [2020, 2020], "jobs": [1.0, 2.0]})
    se = 1 / np.sqrt(2)  # two such standard errors combine to exactly 1
    results = {
        "analysis": "jobs",
        "models": {
            "fixed_effects": {
                "params": {"grant": z_move},
                "std_errors": {"cluster": {"grant": se}},
                "headline_inference": "cluster",
            }
        },
        "tests": {},
    }
    settings = {
        "unit": "region",
        "period": "year",
        "outcome": "jobs",
        "regressors": ["grant"],
        "level": level,
    }
    return RunData(f"run-{z_move}", results, settings, "2026-01-01T00:00:00+00:00", "year", panel)


@pytest.mark.parametrize(("level", "beyond"), [(0.90, True), (0.95, False)])
def test_a_move_is_beyond_noise_at_the_normal_quantile_of_the_level(
    level: float, beyond: bool
) -> None:
    # A move of 1.8 combined standard errors: beyond norm.ppf(0.95) = 1.645 (scipy),
    # within norm.ppf(0.975) = 1.960.
    changes = diff_runs(_run(level, 0.0), _run(level, 1.8))
    assert changes["noise_threshold"] == pytest.approx(stats.norm.ppf(0.5 + level / 2), rel=1e-12)
    (move,) = changes["estimates"]
    assert move["z"] == pytest.approx(1.8)
    assert move["beyond_noise"] is beyond


def _folders(out: Path) -> set[Path]:
    return {p.parent for p in out.glob("t/*/results.json")}


@pytest.mark.slow
def test_a_run_at_ninety_percent_uses_ninety_percent_everywhere(tmp_path: Path) -> None:
    analysis = hostile_analysis(
        level=0.90,
        estimators=["pooled_ols", "fixed_effects", "first_difference"],
        inference=["classical", "robust", "cluster", "driscoll_kraay"],
    )
    config = write_hostile_config(tmp_path, analysis)
    for years in (range(2018, 2024), range(2018, 2025)):
        before = _folders(tmp_path / "out")
        (tmp_path / "a.csv").write_text(HOSTILE_HEADER + hostile_rows(years=years), "utf-8")
        done = run_panelpipe(tmp_path, "run", "--config", str(config))
        assert done.returncode == 0, done.stderr[-3000:]
        (run,) = _folders(tmp_path / "out") - before
    results: dict[str, Any] = json.loads((run / "results.json").read_text("utf-8"))
    models = json.loads((run / "work" / "models.json").read_text("utf-8"))["models"]
    with (run / "estimates.csv").open(newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    checked = 0
    for row in rows:
        reference = models[row["model"]]["inference"][row["inference"]]["reference"]
        df = re.fullmatch(r"t\((\d+)\)", reference)
        if df is None:
            continue  # the bootstrap's intervals come from test inversion
        crit = stats.t.ppf(0.95, int(df.group(1)))  # scipy: the two-sided 90% quantile
        est, se = float(row["estimate"]), float(row["std_error"])
        assert float(row["ci_low"]) == pytest.approx(est - crit * se, rel=1e-9)
        assert float(row["ci_high"]) == pytest.approx(est + crit * se, rel=1e-9)
        published = results["models"][row["model"]]["intervals"][row["inference"]]
        if row["term"] in published["ci_low"]:
            assert published["ci_low"][row["term"]] == pytest.approx(float(row["ci_low"]))
            assert published["ci_high"][row["term"]] == pytest.approx(float(row["ci_high"]))
        checked += 1
    assert checked > 10
    changes = results["changes"]
    assert changes["compared"] is True
    assert changes["noise_threshold"] == pytest.approx(stats.norm.ppf(0.95), rel=1e-12)
    for move in changes["estimates"]:
        if move["z"] is not None:
            assert move["beyond_noise"] is bool(abs(move["z"]) > stats.norm.ppf(0.95))
    html = (run / "report.html").read_text("utf-8")
    assert "90% interval" in html
    assert f"exceeds {stats.norm.ppf(0.95):.2f} times" in html
    assert "95%" not in html
    assert "1.96" not in html
