"""What the report's figures and comparison lines say (issue: the report's wording).

Facts checked here are the project's own presentation choices; the numbers behind
them are checked elsewhere against outside references.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from _support import panel_settings
from panelpipe.compare import run_comparisons
from panelpipe.estimate import estimate_all, make_design
from panelpipe.report import MAX_FIGURE_TERMS, _factorize_units, coefficient_figure


def _axes(svg: str) -> int:
    return len(re.findall(r'<g id="axes_\d+"', svg))


def test_unit_ids_that_are_numbers_sort_as_numbers() -> None:
    codes, levels = _factorize_units(pd.Series(["10043", "1094", "7", "1094"]))
    assert list(levels) == ["7", "1094", "10043"]
    assert list(codes) == [2, 1, 0, 1]


def test_unit_ids_with_letters_sort_as_text() -> None:
    codes, levels = _factorize_units(pd.Series(["b2", "a10", "a9"]))
    assert list(levels) == ["a10", "a9", "b2"]
    assert list(levels[codes]) == ["b2", "a10", "a9"]


def test_coefficient_figure_keeps_the_headline_only_beyond_the_limit(make_panel) -> None:
    panel = make_panel()
    rng = np.random.default_rng(5)
    extra = [f"w{i}" for i in range(MAX_FIGURE_TERMS + 1)]
    for name in extra:
        panel[name] = rng.normal(size=len(panel))
    few = panel_settings(estimators=("pooled_ols", "fixed_effects"))
    many = panel_settings(estimators=("pooled_ols", "fixed_effects"), regressors=("x1", *extra))
    models_few, _ = estimate_all(make_design(panel, few)[0])
    models_many, _ = estimate_all(make_design(panel, many)[0])
    assert _axes(coefficient_figure(models_few, few.regressors)) == len(few.regressors)
    assert _axes(coefficient_figure(models_many, many.regressors)) == 1


def test_comparison_lines_say_what_they_test_in_words(make_panel) -> None:
    settings = panel_settings(estimators=("fixed_effects", "random_effects"))
    design, _ = make_design(make_panel(), settings)
    models, _ = estimate_all(design)
    tests = run_comparisons(design, models)
    f = tests["unit_effects_f"]
    assert f.name.startswith("Do units differ?")
    assert "degrees of freedom" in f.note and "F(" not in f.note
    assert "degrees of freedom" in tests["hausman_robust"].note


@pytest.mark.slow
def test_a_balanced_panel_has_no_presence_map_and_a_question_for_title(
    earlier_run_template: Path,
) -> None:
    # The earlier-run fixture is a balanced 6 x 6 panel (tests/_support.py).
    html = next((earlier_run_template / "out" / "t").glob("*/report.html")).read_text()
    assert "Every unit is observed in every period" in html
    assert "Which unit was observed in which period" not in html
    assert "<h1>How is jobs associated with grant?</h1>" in html


def test_the_presence_map_shows_rows_the_estimates_cannot_use() -> None:
    from panelpipe.report import presence_figure

    # An invented balanced panel of 4 schools over 5 years; 3 rows lack the outcome.
    panel = pd.DataFrame(
        {"school": np.repeat(["s1", "s2", "s3", "s4"], 5), "year": np.tile(range(2020, 2025), 4)}
    )
    used = pd.Series(True, index=panel.index)
    assert presence_figure(panel, "school", "year", used=used) is None
    used.iloc[[1, 7, 12]] = False
    svg = presence_figure(panel, "school", "year", used=used)
    assert svg is not None
    assert "lacking the outcome or a regressor (3 rows)" in svg
    assert "used by the estimates" in svg and "not in the data" in svg
    gappy = presence_figure(panel.drop(index=[4]), "school", "year")
    assert gappy is not None and "lacking" not in gappy
