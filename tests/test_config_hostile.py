"""Hostile configurations through the real command line: each is refused before any work.

Every case writes ``c.yaml`` next to a copy of an earlier complete run (the
``earlier_run`` fixture of conftest.py), runs ``panelpipe run --config c.yaml``
and asserts exit status 2 (a configuration error), the message naming the key at
fault, no traceback, a short message, and the earlier run folder byte-identical.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
import yaml

from _support import (
    HOSTILE_HEADER,
    hostile_analysis,
    hostile_rows,
    run_panelpipe,
    write_hostile_config,
)

pytestmark = pytest.mark.slow

# Every message is capped: a hostile config must never come back as a huge error.
MESSAGE_CAP = 4000


def _run_refused(tmp_path: Path, config: Path, *expected: str) -> str:
    done = run_panelpipe(tmp_path, "run", "--config", str(config))
    assert done.returncode == 2, done.stderr[-3000:]
    assert "Traceback" not in done.stderr
    assert len(done.stderr) < MESSAGE_CAP, done.stderr[:3000]
    for text in expected:
        assert text in done.stderr, done.stderr[-3000:]
    assert done.stdout == ""
    return done.stderr


def _setup(tmp_path: Path, earlier_run: Callable[[], Callable[[], None]]) -> Callable[[], None]:
    (tmp_path / "a.csv").write_text(HOSTILE_HEADER + hostile_rows(), encoding="utf-8")
    return earlier_run()


def _analyses_in(tmp_path: Path) -> list[str]:
    return sorted(p.name for p in (tmp_path / "out").iterdir() if p.is_dir())


BAD_VALUES: list[tuple[dict[str, Any], tuple[str, ...]]] = [
    ({"level": float("nan")}, ("analyses.t.level", "not a finite number")),
    ({"level": float("inf")}, ("analyses.t.level", "not a finite number")),
    (
        {"gates": {"max_dropped_share": float("nan")}},
        ("analyses.t.gates.max_dropped_share", "not a finite number"),
    ),
    ({"gates": {"min_units": float("-inf")}}, ("analyses.t.gates.min_units", "not a finite")),
    ({"bootstrap": {"seed": float("nan")}}, ("analyses.t.bootstrap.seed", "not a finite number")),
    ({"bootstrap": {"draws": 100_000}}, ("analyses.t.bootstrap.draws", "99999")),
    ({"bootstrap": {"draws": 999.0}}, ("analyses.t.bootstrap.draws", "999.0 is not of type")),
    (
        {"unit": ["region" * 1000] * 100, "outcome": ["jobs"] * 5000},
        ("analyses.t.unit", "analyses.t.outcome", "is not of type", "characters)"),
    ),
    ({"regressors": ["grant", "_intercept"]}, ("analyses.t.regressors", "'_intercept'")),
    ({"regressors": ["_period_2019"]}, ("analyses.t.regressors", "'_period_2019'", "rename")),
    ({"outcome": "_unit_mean_grant"}, ("analyses.t.outcome", "'_unit_mean_grant'", "rename")),
    ({"unit": "_line"}, ("analyses.t.unit", "'_line'", "rename")),
    ({"cluster_by": ["_source"]}, ("analyses.t.cluster_by", "'_source'", "rename")),
    ({"period": "column"}, ("analyses.t.period", "'column'", "rename")),
]


@pytest.mark.parametrize(
    ("over", "expected"),
    BAD_VALUES,
    ids=[
        "level-nan",
        "level-inf",
        "share-nan",
        "units-minus-inf",
        "seed-nan",
        "draws-above-bound",
        "draws-decimal-point",
        "huge-values-not-echoed",
        "intercept-column",
        "period-dummy-column",
        "unit-mean-column",
        "line-column",
        "source-column",
        "revision-table-column",
    ],
)
def test_bad_values_are_refused_with_the_key_path(
    tmp_path: Path,
    earlier_run: Callable[[], Callable[[], None]],
    over: dict[str, Any],
    expected: tuple[str, ...],
) -> None:
    check = _setup(tmp_path, earlier_run)
    config = write_hostile_config(tmp_path, hostile_analysis(**over))
    _run_refused(tmp_path, config, *expected)
    check()


def test_a_number_hidden_deep_in_a_list_is_found(
    tmp_path: Path, earlier_run: Callable[[], Callable[[], None]]
) -> None:
    check = _setup(tmp_path, earlier_run)
    config = tmp_path / "c.yaml"
    text = write_hostile_config(tmp_path, hostile_analysis()).read_text(encoding="utf-8")
    config.write_text(text + "extra: [1, [2, .NaN]]\n", encoding="utf-8")
    _run_refused(tmp_path, config, "extra[1][1]", "not a finite number")
    check()


def test_two_analyses_with_one_name_are_refused_with_both_lines(
    tmp_path: Path, earlier_run: Callable[[], Callable[[], None]]
) -> None:
    check = _setup(tmp_path, earlier_run)
    body = yaml.safe_dump(hostile_analysis(), default_flow_style=True, width=1000).strip()
    config = tmp_path / "c.yaml"
    config.write_text(
        f"output_dir: out\nanalyses:\n  t: {body}\n  t: {body}\n",
        encoding="utf-8",
    )
    _run_refused(tmp_path, config, "c.yaml", "key 't' appears twice", "lines 3 and 4")
    check()


def test_a_repeated_key_inside_an_analysis_is_refused(
    tmp_path: Path, earlier_run: Callable[[], Callable[[], None]]
) -> None:
    check = _setup(tmp_path, earlier_run)
    config = tmp_path / "c.yaml"
    config.write_text(
        "output_dir: out\n"
        "analyses:\n"
        "  t:\n"
        "    sources: [a.csv]\n"
        "    unit: region\n"
        "    period: year\n"
        "    outcome: jobs\n"
        "    regressors: [grant]\n"
        "    gates: {min_units: 2, max_dropped_share: 0.1, max_dropped_share: 0.9}\n",
        encoding="utf-8",
    )
    _run_refused(tmp_path, config, "key 'max_dropped_share' appears twice", "lines 9 and 9")
    check()


@pytest.mark.parametrize(
    "name",
    ["t\n", "a/b", "..", "x" * 65, "Jobs", "_t", "t\x00"],
    ids=["trailing-newline", "slash", "dots", "too-long", "upper-case", "underscore", "nul"],
)
def test_unsafe_analysis_names_are_refused(
    tmp_path: Path, earlier_run: Callable[[], Callable[[], None]], name: str
) -> None:
    check = _setup(tmp_path, earlier_run)
    config = tmp_path / "c.yaml"
    config.write_text(
        yaml.safe_dump({"output_dir": "out", "analyses": {name: hostile_analysis()}}),
        encoding="utf-8",
    )
    _run_refused(tmp_path, config, "is not a safe folder name")
    assert _analyses_in(tmp_path) == ["t"]
    check()


BILLION_LAUGHS = """\
a: &a ["lol", "lol", "lol", "lol", "lol", "lol", "lol", "lol", "lol"]
b: &b [*a, *a, *a, *a, *a, *a, *a, *a, *a]
c: &c [*b, *b, *b, *b, *b, *b, *b, *b, *b]
d: &d [*c, *c, *c, *c, *c, *c, *c, *c, *c]
e: &e [*d, *d, *d, *d, *d, *d, *d, *d, *d]
f: &f [*e, *e, *e, *e, *e, *e, *e, *e, *e]
g: &g [*f, *f, *f, *f, *f, *f, *f, *f, *f]
analyses: {t: {sources: *g, unit: *g, period: *g, outcome: *g, regressors: *g}}
"""


def test_nested_aliases_are_refused_at_once(
    tmp_path: Path, earlier_run: Callable[[], Callable[[], None]]
) -> None:
    check = _setup(tmp_path, earlier_run)
    config = tmp_path / "c.yaml"
    config.write_text(BILLION_LAUGHS, encoding="utf-8")
    started = time.monotonic()
    _run_refused(tmp_path, config, "c.yaml", "line 1", "anchors and aliases")
    # Expanded, each list is 9**7 strings and its echo in an error message tens of
    # megabytes (two more levels take gigabytes: kept small so that a regression does not
    # starve the machine); refused, it costs one interpreter start. The bound is loose so
    # that a busy machine passes.
    assert time.monotonic() - started < 10
    check()


def test_an_oversized_config_is_refused_unread(
    tmp_path: Path, earlier_run: Callable[[], Callable[[], None]]
) -> None:
    check = _setup(tmp_path, earlier_run)
    config = write_hostile_config(tmp_path, hostile_analysis())
    with config.open("a", encoding="utf-8") as fh:
        fh.write("# padding\n" * 120_000)
    _run_refused(tmp_path, config, "c.yaml", "larger than 1 MiB")
    check()
