"""Every kind of source file gives the same panel, the same estimates and the same messages.

One invented panel of schools by year is saved as CSV, gzip/zstd/bz2-compressed CSV,
Parquet, Arrow IPC (.arrow, .feather), .xlsx and .ods workbooks, and split across two
kinds; each reading is estimated and compared with the plain CSV's estimates. Also:
the kind follows the name, workbook rows are named by sheet and row, and
``inspect``/``init`` read every kind with ``run``'s options.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.feather as feather
import pytest
import yaml

from _support import panel_settings, run_panelpipe, workbook_bytes
from panelpipe.cli import main
from panelpipe.config import SourceSpec, file_kind, load_config
from panelpipe.estimate import estimate_all, make_design
from panelpipe.findings import PanelpipeError
from panelpipe.ingest import place, read_panel, read_source, source_path
from panelpipe.validate import validate_panel

COLUMNS = ["school", "year", "score", "tutoring", "class_size"]
TEXT = ["school", "year"]


def schools(n_schools: int = 12, years: range = range(2015, 2023)) -> pd.DataFrame:
    """Invented test scores of schools by year (seeded), with tutoring hours and class size."""
    rng = np.random.default_rng(20261202)
    school = np.repeat([f"sch{i:03d}" for i in range(n_schools)], len(years))
    year = np.tile(np.arange(years.start, years.stop), n_schools)
    effect = np.repeat(rng.normal(size=n_schools), len(years))
    tutoring = 2 + effect + rng.normal(size=school.size)
    class_size = 24 + 3 * rng.normal(size=school.size)
    score = 60 + 4 * effect + 1.3 * tutoring - 0.4 * class_size + rng.normal(size=school.size)
    return pd.DataFrame(
        {
            "school": school,
            "year": year,
            "score": score,
            "tutoring": tutoring,
            "class_size": class_size,
        }
    )


def _compressed(data: bytes, codec: str) -> bytes:
    sink = pa.BufferOutputStream()
    with pa.CompressedOutputStream(sink, codec) as stream:
        stream.write(data)
    return bytes(sink.getvalue())


def _rows(frame: pd.DataFrame) -> list[list[Any]]:
    return [list(frame.columns), *frame.astype(object).to_numpy().tolist()]


def save(frame: pd.DataFrame, path: Path) -> SourceSpec:
    """``frame`` written to ``path`` in the kind its name says; the spec that reads it."""
    csv = frame.to_csv(index=False, float_format="%.17g").encode()
    name = path.name
    if name.endswith(".csv"):
        path.write_bytes(csv)
    elif name.endswith((".gz", ".zst", ".bz2")):
        codec = {"gz": "gzip", "zst": "zstd", "bz2": "bz2"}[name.rsplit(".", 1)[1]]
        path.write_bytes(_compressed(csv, codec))
    elif name.endswith(".parquet"):
        frame.to_parquet(path, index=False)
    elif name.endswith((".arrow", ".feather")):
        feather.write_feather(frame, path)
    else:
        path.write_bytes(workbook_bytes(_rows(frame), kind=path.suffix[1:], sheet="scores"))
    return SourceSpec(path, sheet="scores" if name.endswith((".xlsx", ".ods")) else None)


def estimates(specs: list[SourceSpec]) -> dict[str, dict[str, pd.Series]]:
    """Parameters and standard errors of every estimator on the panel read from ``specs``."""
    settings = panel_settings(
        sources=tuple(str(s.path) for s in specs),
        unit="school",
        period="year",
        outcome="score",
        regressors=("tutoring", "class_size"),
        cluster_by=("school",),
        estimators=("pooled_ols", "fixed_effects", "random_effects", "first_difference"),
        inference=("classical", "robust", "cluster"),
    )
    result = validate_panel(read_panel(specs, COLUMNS, text=TEXT), settings)
    assert result.status != "fail", result.findings
    design, _ = make_design(result.panel, settings)
    models, _ = estimate_all(design)
    out: dict[str, dict[str, pd.Series]] = {}
    for key, model in models.items():
        out[key] = {"params": model.params}
        for inference, values in model.inference.items():
            out[key][inference] = values.std_errors
    return out


KINDS = [
    "p.csv.gz",
    "p.csv.zst",
    "p.csv.bz2",
    "p.parquet",
    "p.arrow",
    "p.feather",
    "p.xlsx",
    "p.ods",
    "early.xlsx+late.csv.zst",
    "early.ods+late.arrow",
]


@pytest.mark.parametrize("kinds", KINDS)
def test_every_kind_gives_the_estimates_of_the_csv(tmp_path: Path, kinds: str) -> None:
    frame = schools()
    reference = estimates([save(frame, tmp_path / "p.csv")])
    names = kinds.split("+")
    early = frame["year"] < 2019
    parts = [frame] if len(names) == 1 else [frame[early], frame[~early]]
    specs = [save(part, tmp_path / name) for part, name in zip(parts, names, strict=True)]
    got = estimates(specs)
    assert got.keys() == reference.keys() and len(got) == 4
    for key, tables in reference.items():
        assert got[key].keys() == tables.keys()
        for what, values in tables.items():
            # Source: the plain CSV reading of the same panel (common practice, no source):
            # the kind of file must not move an estimate.
            np.testing.assert_allclose(got[key][what], values, rtol=0, atol=1e-10)


def test_the_kind_follows_the_name() -> None:
    kinds = {
        "a.csv": "csv",
        "a.TSV": "csv",
        "a.csv.gz": "csv",
        "a.tsv.zst": "csv",
        "a.txt.bz2": "csv",
        "a.parquet": "parquet",
        "a.arrow": "arrow",
        "a.feather": "arrow",
        "regions.2024.xlsx": "workbook",
        "a.ods": "workbook",
        "a.gz": None,
        "a.xls": None,
        "a.json": None,
    }
    assert {name: file_kind(Path(name)) for name in kinds} == kinds


def test_workbook_rows_are_named_by_sheet_and_row(tmp_path: Path) -> None:
    spec = save(schools(), tmp_path / "p.xlsx")
    frame = read_source(spec, COLUMNS, text=TEXT)
    label = str(frame["_source"].iloc[0])
    assert label == f"{tmp_path / 'p.xlsx'}, sheet scores"
    assert source_path(label) == str(tmp_path / "p.xlsx")
    assert frame["_line"].iloc[0] == 2  # the header is sheet row 1
    assert place(label, 17) == f"{label}, row 17"
    assert place("a, sheet b.csv", 3) == "a, sheet b.csv line 3"  # only workbooks have sheets
    assert frame["year"].iloc[0] == "2015"  # a whole number cell reads as CSV text would


def test_workbook_header_row_and_blank_rows(tmp_path: Path) -> None:
    rows: list[list[Any]] = [
        ["Invented school scores, for tests"],
        [],
        ["school", "year", "score"],
        ["sch001", 2020, 61.5],
        [None, None, None],
        ["sch001", 2021, None],
    ]
    path = tmp_path / "notes.xlsx"
    path.write_bytes(workbook_bytes(rows))
    frame = read_source(SourceSpec(path, header_row=3), ["school", "year", "score"], text=TEXT)
    # A blank row inside the table is a row without values (validation names it), as a
    # blank CSV line is; an empty cell is a missing value.
    assert frame["_line"].tolist() == [4, 5, 6]
    assert frame["school"].isna().tolist() == [False, True, False]
    assert np.isnan(frame["score"].iloc[2])
    with pytest.raises(PanelpipeError, match=r"sheet 2024, cell B1: .* set 'header_row'"):
        read_source(SourceSpec(path), ["school", "year", "score"], text=TEXT)


def test_strict_csv_rules_hold_inside_compressed_files(tmp_path: Path) -> None:
    body = "school,year,score\nsch001,2020,1\nsch001,2021,2,9\n"
    path = tmp_path / "late.csv.gz"
    path.write_bytes(_compressed(body.encode(), "gzip"))
    with pytest.raises(PanelpipeError, match=r"late\.csv\.gz line 3: 4 fields where the header"):
        read_source(SourceSpec(path), ["school", "year", "score"], text=TEXT)


def _inspect(capsys: pytest.CaptureFixture[str], *args: str) -> dict[str, Any]:
    assert main(["inspect", *args, "--json"]) == 0
    profile: dict[str, Any] = json.loads(capsys.readouterr().out)
    return profile


@pytest.mark.parametrize(
    "periods",
    [
        ["2021Q1", "2021Q2", "2021Q3"],
        ["2021-01", "2021-02", "2021-03"],
        ["2021-01-01", "2021-04-01", "2021-07-01"],
        [1, 2, 3],
    ],
    ids=["quarters", "months", "dates", "index"],
)
def test_inspect_proposes_every_period_form_run_reads(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], periods: list[Any]
) -> None:
    frame = pd.DataFrame(
        {
            "worker": np.repeat(["w1", "w2"], 3),
            "when": periods * 2,
            "hours": [38.5, 40.0, 37.5, 20.0, 22.5, 21.0],
        }
    )
    frame.to_csv(tmp_path / "w.csv", index=False)
    profile = _inspect(capsys, str(tmp_path / "w.csv"))
    assert profile["period_candidates"] == ["when"]
    assert profile["unit_candidates"] == ["worker"]
    assert profile["panel"]["balanced"] and profile["panel"]["gaps"] == 0


def test_inspect_and_init_read_a_semicolon_decimal_comma_file(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    frame = schools(3, range(2020, 2023))
    (tmp_path / "p.csv").write_text(
        frame.to_csv(index=False, sep=";", decimal=","), encoding="utf-8"
    )
    monkeypatch.chdir(tmp_path)
    profile = _inspect(capsys, "p.csv", "--delimiter", ";", "--decimal", ",")
    assert [c["name"] for c in profile["columns"]] == COLUMNS
    assert [c["numeric"] for c in profile["columns"]] == [False, True, True, True, True]
    assert profile["period_candidates"] == ["year"]
    args = ["init", "p.csv", "--delimiter", ";", "--decimal", ","]
    args += ["--unit", "school", "--period", "year", "--outcome", "score", "-o", "c.yaml"]
    assert main(args) == 0
    capsys.readouterr()
    config = load_config("c.yaml")
    entry = config["analyses"]["p"]["sources"][0]
    assert entry == {"path": "p.csv", "delimiter": ";", "decimal": ","}
    assert config["analyses"]["p"]["regressors"] == ["tutoring", "class_size"]
    assert main(["check", "--config", "c.yaml"]) == 0, capsys.readouterr().err


def test_inspect_reads_a_named_sheet(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    save(schools(), tmp_path / "p.ods")
    profile = _inspect(capsys, str(tmp_path / "p.ods"), "--sheet", "scores")
    assert profile["file"].endswith("p.ods, sheet scores")
    assert profile["unit_candidates"][0] == "school"
    assert profile["period_candidates"] == ["year"]
    assert profile["panel"]["units"] == 12 and profile["panel"]["periods"] == 8
    assert main(["inspect", str(tmp_path / "p.ods"), "--sheet", "2030"]) == 2
    assert "has no sheet '2030'; its sheets are 'scores'" in capsys.readouterr().err
    assert main(["inspect", str(tmp_path / "p.ods"), "--delimiter", ";", "--sheet", "x"]) == 2
    err = capsys.readouterr().err
    assert "has no sheet 'x'" in err and "Traceback" not in err


@pytest.mark.slow
def test_the_workflow_gives_equal_results_from_every_kind(tmp_path: Path) -> None:
    frame = schools()
    analyses: dict[str, Any] = {}
    for name, files in {
        "plain": ["p.csv"],
        "gzip": ["p.csv.gz"],
        "workbook": ["p.xlsx"],
        "split": ["early.ods", "late.arrow"],
    }.items():
        early = frame["year"] < 2019
        parts = [frame] if len(files) == 1 else [frame[early], frame[~early]]
        sources: list[Any] = []
        for part, file in zip(parts, files, strict=True):
            spec = save(part, tmp_path / file)
            sources.append(file if spec.sheet is None else {"path": file, "sheet": spec.sheet})
        analyses[name] = {
            "sources": sources,
            "unit": "school",
            "period": "year",
            "outcome": "score",
            "regressors": ["tutoring", "class_size"],
            "estimators": ["pooled_ols", "fixed_effects", "random_effects"],
            "inference": ["classical", "cluster"],
        }
    config = tmp_path / "c.yaml"
    config.write_text(yaml.safe_dump({"output_dir": "out", "analyses": analyses}))
    done = run_panelpipe(tmp_path, "run", "--config", str(config))
    assert done.returncode == 0, done.stderr[-3000:]
    results = {}
    for name in analyses:
        run = (tmp_path / "out" / name / "latest").read_text().strip()
        folder = tmp_path / "out" / name / run
        results[name] = json.loads((folder / "results.json").read_text())
        manifest = json.loads((folder / "manifest.json").read_text())
        assert sum(s["rows"] for s in manifest["inputs"]) == len(frame), manifest["inputs"]
    for name in ("gzip", "workbook", "split"):
        for key, model in results["plain"]["models"].items():
            other = results[name]["models"][key]
            # Source: the plain CSV run of the same panel (common practice, no source).
            for term, value in model["params"].items():
                assert other["params"][term] == pytest.approx(value, abs=1e-10)
            for inference, table in model["std_errors"].items():
                for term, value in table.items():
                    assert other["std_errors"][inference][term] == pytest.approx(value, abs=1e-10)
