"""Ingest and validation: each bad input gets its documented finding, naming file and line."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest

from panelpipe.config import AnalysisSettings, Gates, SourceSpec
from panelpipe.findings import PanelpipeError
from panelpipe.ingest import read_panel
from panelpipe.validate import validate_panel

HEADER = "region,year,jobs,grant,coastal\n"


def settings(**over: object) -> AnalysisSettings:
    base: dict = dict(
        name="t",
        sources=(),
        unit="region",
        period="year",
        outcome="jobs",
        regressors=("grant", "coastal"),
        period_effects=True,
        cluster_by=("region",),
        estimators=("pooled_ols", "fixed_effects", "random_effects"),
        inference=("classical", "cluster"),
        level=0.95,
    )
    base.update(over)
    if isinstance(base.get("gates"), dict):
        base["gates"] = Gates.from_mapping(base["gates"])
    return AnalysisSettings(**base)


def good_rows(units: int = 4, years: range = range(2020, 2024)) -> str:
    return "".join(
        f"{u:03d},{y},{10 + u + y % 7},{(u * 3 + y) % 5 + 0.5},{u % 2}\n"
        for u in range(1, units + 1)
        for y in years
    )


def load(tmp_path: Path, *texts: str, s: AnalysisSettings | None = None):
    s = s or settings()
    paths = []
    for i, text in enumerate(texts):
        p = tmp_path / f"delivery_{i}.csv"
        p.write_text(text, encoding="utf-8")
        paths.append(p)
    return validate_panel(read(paths, s), s)


def read(paths: list[Path], s: AnalysisSettings, **options: object) -> pd.DataFrame:
    specs = [SourceSpec(Path(p), **options) for p in paths]  # type: ignore[arg-type]
    return read_panel(specs, s.columns, text=[s.unit, s.period])


def codes(result, severity: str | None = None) -> set[str]:
    return {f.code for f in result.findings if severity is None or f.severity == severity}


def test_clean_panel_passes_and_keeps_leading_zeros(tmp_path: Path) -> None:
    result = load(tmp_path, HEADER + good_rows())
    assert result.status == "warn"
    assert codes(result, "warning") == {"few_clusters"}  # 4 clusters < 30
    assert result.summary["units"] == 4 and result.summary["periods"] == 4
    assert result.summary["balanced"] is True
    assert result.panel["region"].iloc[0] == "001"
    assert codes(result) >= {"balance", "time_invariant_regressor"}


def test_two_deliveries_stack_and_rows_keep_their_origin(tmp_path: Path) -> None:
    s = settings()
    p1, p2 = tmp_path / "hist.csv", tmp_path / "new.csv"
    p1.write_text(HEADER + good_rows(years=range(2020, 2023)))
    p2.write_text(HEADER + good_rows(years=range(2023, 2024)))
    raw = read([p1, p2], s)
    assert len(raw) == 16
    assert raw["_source"].iloc[-1] == str(p2) and raw["_line"].iloc[-1] == 5
    assert raw["_line"].iloc[0] == 2  # header is line 1


def test_parquet_source(tmp_path: Path) -> None:
    s = settings()
    csv = tmp_path / "a.csv"
    csv.write_text(HEADER + good_rows())
    frame = pd.read_csv(csv, dtype={"region": str})
    pq = tmp_path / "a.parquet"
    frame.to_parquet(pq)
    raw = read([pq], s)
    assert raw["_line"].iloc[0] == 1
    assert validate_panel(raw, s).status != "fail"


def test_missing_column_names_file_and_columns(tmp_path: Path) -> None:
    p = tmp_path / "renamed.csv"
    p.write_text("region,year,jobs,grant_rate,coastal\n001,2020,1,2,0\n")
    with pytest.raises(
        PanelpipeError,
        match=r"renamed.csv: column\(s\) 'grant' not found; "
        r"the file has 'region', 'year'",
    ):
        read([p], settings())


def test_duplicate_keys_list_file_and_line(tmp_path: Path) -> None:
    text = HEADER + good_rows() + "002,2021,5,1.5,0\n"
    result = load(tmp_path, text)
    assert result.status == "fail"
    msg = next(f.message for f in result.findings if f.code == "duplicate_keys")
    assert "(002, 2021)" in msg and "delivery_0.csv line 7" in msg and "line 18" in msg


def test_later_delivery_revises_an_earlier_value(tmp_path: Path) -> None:
    result = load(tmp_path, HEADER + good_rows(), HEADER + "001,2023,99,1.5,1\n")
    f = next(f for f in result.findings if f.code == "revised")
    assert f.severity == "warning"
    assert "(001, 2023) jobs:" in f.message and "→ 99" in f.message
    assert "delivery_0.csv line 5" in f.message
    row = result.panel[(result.panel.region == "001") & (result.panel.year == 2023)]
    assert len(row) == 1 and row["jobs"].iloc[0] == 99


def test_identical_redelivery_is_kept_once(tmp_path: Path) -> None:
    first = good_rows()
    result = load(tmp_path, HEADER + first, HEADER + first.splitlines()[0] + "\n")
    assert "redelivered" in codes(result, "info")
    assert len(result.panel) == 16


def test_non_numeric_value_lists_rows(tmp_path: Path) -> None:
    result = load(tmp_path, HEADER + good_rows() + "005,2020,n/a?,1.0,0\n")
    f = next(f for f in result.findings if f.code == "non_numeric")
    assert f.severity == "error" and "'jobs'" in f.message and "line 18" in f.message
    assert "'n/a?'" in f.message


def test_infinite_value_is_an_error(tmp_path: Path) -> None:
    result = load(tmp_path, HEADER + good_rows() + "005,2020,inf,1.0,0\n")
    assert "non_finite" in codes(result, "error")


def test_missing_unit_and_text_period(tmp_path: Path) -> None:
    result = load(tmp_path, HEADER + good_rows() + ",2020,1,1,0\n")
    assert "missing_unit" in codes(result, "error")
    result = load(tmp_path, HEADER + good_rows() + "009,twenty,1,1,0\n")
    f = next(f for f in result.findings if f.code == "bad_period")
    assert "line 18" in f.message


def test_unit_whitespace_is_normalised_with_a_warning(tmp_path: Path) -> None:
    result = load(tmp_path, HEADER + good_rows().replace("001,2021", "001 ,2021"))
    assert "unit_whitespace" in codes(result, "warning")
    assert result.summary["units"] == 4


def test_too_few_units_fails_the_gate(tmp_path: Path) -> None:
    result = load(tmp_path, HEADER + good_rows(units=3), s=settings(gates={"min_units": 5}))
    f = next(f for f in result.findings if f.code == "too_few_units")
    assert f.severity == "error" and "min_units" in f.message


def test_missing_values_and_dropped_share_gate(tmp_path: Path) -> None:
    rows = (HEADER + good_rows()).splitlines()
    rows[1] = "001,2020,,2.5,1"
    rows[2] = "001,2021,,2.5,1"
    result = load(tmp_path, "\n".join(rows) + "\n", s=settings(gates={"max_dropped_share": 0.1}))
    assert "missing_values" in codes(result, "warning")
    assert "rows_dropped" in codes(result, "error")


def test_unbalanced_panel_counts_gaps(tmp_path: Path) -> None:
    lines = (HEADER + good_rows()).splitlines()
    del lines[2]  # unit 001, 2021
    result = load(tmp_path, "\n".join(lines) + "\n")
    assert result.summary["balanced"] is False and result.summary["gaps"] == 1
    assert result.status != "fail"


def test_input_frame_is_not_modified(tmp_path: Path) -> None:
    s = settings()
    p = tmp_path / "a.csv"
    p.write_text(HEADER + good_rows().replace("001,2021", " 001,2021"))
    raw = read([p], s)
    before = raw.copy()
    validate_panel(raw, s)
    pd.testing.assert_frame_equal(raw, before)
