"""The battery of bad deliveries: each gets its documented error or warning.

Every case writes small files and a config into a temporary folder and runs
``panelpipe check`` (ingest and validation, as the workflow runs them), then
asserts the exit status and the message, which must name the file and line or
the column at fault. The end-to-end runs in test_workflow.py repeat a few of
these through Snakemake.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest
import yaml

from panelpipe.cli import main

HEADER = "region,year,jobs,grant,coastal\n"


def rows(units: int = 6, years: range = range(2018, 2024), skip: tuple = ()) -> str:
    out = []
    for u in range(1, units + 1):
        for y in years:
            if (u, y) in skip:
                continue
            out.append(f"{u:03d},{y},{10 + u + (y * u) % 7},{(u * 3 + y * 7) % 11 + 0.5},{u % 2}")
    return "\n".join(out) + "\n"


GOOD = HEADER + rows()


@dataclass
class Case:
    files: dict[str, str]
    expect_exit: int
    expect: list[str]
    analysis: dict[str, Any] = field(default_factory=dict)
    top: dict[str, Any] = field(default_factory=dict)
    stream: str = "err"


def _analysis(**over: Any) -> dict[str, Any]:
    base: dict[str, Any] = {
        "sources": ["a.csv"],
        "unit": "region",
        "period": "year",
        "outcome": "jobs",
        "regressors": ["grant", "coastal"],
        "inference": ["classical", "cluster"],
    }
    base.update(over)
    return base


CASES: dict[str, Case] = {
    "duplicate-key-in-a-file": Case(
        {"a.csv": GOOD + "002,2019,5,1.5,0\n"},
        1,
        ["duplicate_keys", "(002, 2019)", "a.csv line 9", "a.csv line 38"],
    ),
    "missing-unit": Case({"a.csv": GOOD + ",2019,5,1.5,0\n"}, 1, ["missing_unit", "a.csv line 38"]),
    "blank-line-inside": Case(
        {"a.csv": HEADER + rows(units=2) + "\n" + rows(units=1)},
        1,
        ["missing_unit", "a.csv line 14"],
    ),
    "missing-period": Case(
        {"a.csv": GOOD + "007,,5,1.5,0\n"}, 1, ["missing_period", "a.csv line 38"]
    ),
    "unreadable-period": Case(
        {"a.csv": GOOD + "007,FY2019,5,1.5,0\n"}, 1, ["bad_period", "'FY2019'", "a.csv line 38"]
    ),
    "mixed-period-formats": Case(
        {"a.csv": GOOD + "007,2019Q1,5,1.5,0\n"},
        1,
        ["mixed_period_formats", "a.csv line 38", "quarter: 1"],
    ),
    "text-in-number-column": Case(
        {"a.csv": GOOD + "007,2019,five,1.5,0\n"},
        1,
        ["non_numeric", "'jobs'", "'five'", "a.csv line 38"],
    ),
    "infinite-value": Case(
        {"a.csv": GOOD + "007,2019,inf,1.5,0\n"}, 1, ["non_finite", "'jobs'", "a.csv line 38"]
    ),
    "column-absent": Case(
        {"a.csv": GOOD.replace("grant", "grant_rate")},
        2,
        ["a.csv: column(s) 'grant' not found", "'grant_rate'", "rename"],
    ),
    "renamed-column-in-a-delivery": Case(
        {"a.csv": GOOD, "b.csv": HEADER.replace("grant", "grant_rate") + "001,2024,9,2.5,1\n"},
        0,
        ["validation"],
        _analysis(sources=["a.csv", {"path": "b.csv", "rename": {"grant_rate": "grant"}}]),
        stream="out",
    ),
    "rename-of-absent-column": Case(
        {"a.csv": GOOD},
        2,
        ["'rename' names column(s) 'subsidy'"],
        _analysis(sources=[{"path": "a.csv", "rename": {"subsidy": "grant"}}]),
    ),
    "unit-with-trailing-space": Case(
        {"a.csv": GOOD.replace("003,2019", "003 ,2019")},
        0,
        ["unit_whitespace", "a.csv line 15"],
        stream="out",
    ),
    "revised-history": Case(
        {"a.csv": GOOD, "b.csv": HEADER + "002,2019,50,1.5,0\n"},
        0,
        ["revised", "(002, 2019) jobs:", "→ 50.0"],
        _analysis(sources=["a.csv", "b.csv"]),
        stream="out",
    ),
    "one-unit-only": Case({"a.csv": HEADER + rows(units=1)}, 1, ["too_few_units", "'region'"]),
    "one-period-only": Case(
        {"a.csv": HEADER + rows(years=range(2020, 2021))}, 1, ["too_few_periods", "'year'"]
    ),
    "header-only": Case({"a.csv": HEADER}, 2, ["a.csv: has a header but no data rows"]),
    "constant-regressor": Case(
        {},
        1,
        ["constant_regressor", "'one'"],
        _analysis(regressors=["grant", "one"]),
    ),
    "time-invariant-regressor": Case(
        {"a.csv": GOOD}, 0, ["time_invariant_regressor", "'coastal'"], stream="out"
    ),
    "singleton-unit": Case(
        {"a.csv": GOOD + "099,2019,5,1.5,0\n"}, 0, ["singleton_units"], stream="out"
    ),
    "too-many-missing-values": Case(
        {
            "a.csv": HEADER
            + rows()
            .replace(",1.5,", ",,")
            .replace(",0.5,", ",,")
            .replace(",2.5,", ",,")
            .replace(",3.5,", ",,")
        },
        1,
        ["rows_dropped", "max_dropped_share=0.1"],
        _analysis(gates={"max_dropped_share": 0.1}),
    ),
    # the two files below are written by _write: a column of ones; an 'area' column
    "cluster-value-missing": Case(
        {}, 1, ["missing_cluster", "'area'", "a.csv line 6"], _analysis(cluster_by=["area"])
    ),
    "too-few-clusters": Case(
        {"a.csv": GOOD},
        1,
        ["too_few_clusters", "'coastal'", "min_clusters"],
        _analysis(cluster_by=["coastal"], gates={"min_clusters": 3}),
    ),
    "file-not-found": Case({}, 2, ["the source file 'a.csv' does not exist"]),
    "wrong-delimiter": Case({"a.csv": GOOD.replace(",", ";")}, 2, ["column(s)", "not found"]),
    "semicolon-and-decimal-comma": Case(
        {"a.csv": GOOD.replace(",", ";").replace(".5", ",5")},
        0,
        ["validation pass"],
        _analysis(csv={"delimiter": ";", "decimal": ","}, inference=["classical"]),
        stream="out",
    ),
    "byte-order-mark": Case({"a.csv": "\ufeff" + GOOD}, 0, ["validation"], stream="out"),
    "unknown-config-key": Case(
        {"a.csv": GOOD},
        2,
        ["analyses.t: Additional properties", "'colour' was unexpected"],
        _analysis(colour="red"),
    ),
    "hostile-column-name": Case(
        {"a.csv": GOOD.replace("grant", "<script>alert(1)</script>")},
        0,
        ["validation"],
        _analysis(regressors=["<script>alert(1)</script>", "coastal"]),
        stream="out",
    ),
    "gap-inside-a-unit": Case(
        {"a.csv": HEADER + rows(skip=((2, 2020),))}, 0, ["validation"], stream="out"
    ),
}


def _write(tmp_path: Path, case: Case, name: str) -> Path:
    for fname, text in case.files.items():
        (tmp_path / fname).write_text(text, encoding="utf-8")
    analysis = case.analysis or _analysis()
    if name == "constant-regressor":
        (tmp_path / "a.csv").write_text(
            "\n".join(
                line + (",one" if i == 0 else ",1") for i, line in enumerate(GOOD.splitlines())
            )
            + "\n"
        )
    if name == "cluster-value-missing":
        lines = GOOD.splitlines()
        lines[0] += ",area"
        lines[1:] = [line + ("," if i == 4 else ",north") for i, line in enumerate(lines[1:])]
        (tmp_path / "a.csv").write_text("\n".join(lines) + "\n")
    config = {"output_dir": "out", "analyses": {"t": analysis}, **case.top}
    path = tmp_path / "c.yaml"
    path.write_text(yaml.safe_dump(config, allow_unicode=True))
    return path


@pytest.mark.parametrize("name", list(CASES), ids=list(CASES))
def test_bad_input(
    name: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    case = CASES[name]
    monkeypatch.chdir(tmp_path)
    config = _write(tmp_path, case, name)
    before = {p: p.read_bytes() for p in tmp_path.glob("*.csv")}
    code = main(["check", "--config", str(config), "--verbose"])
    out, err = capsys.readouterr()
    assert code == case.expect_exit, out + err
    text = err if case.stream == "err" else out
    for needle in case.expect:
        assert needle in text, f"{needle!r} not in:\n{text}"
    assert "Traceback" not in out + err
    assert before == {p: p.read_bytes() for p in tmp_path.glob("*.csv")}, "inputs modified"


def test_the_battery_has_at_least_twenty_kinds() -> None:
    assert len(CASES) >= 20
