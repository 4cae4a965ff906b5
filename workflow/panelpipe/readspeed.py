"""Reading speed of each kind of source against Parquet: ``python -m panelpipe.readspeed``.

Writes one invented panel (schools by year, three measurements) as Parquet, CSV,
gzip-compressed CSV, Arrow IPC, .xlsx and .ods into a temporary folder, then times
`panelpipe.ingest.read_source` on each (the best of ``--repeat`` reads, so a busy
machine's stalls count less) and prints seconds and the ratio to the Parquet read.
Writing the workbooks needs openpyxl and odfpy (the test extras); the .ods is written
at most at ``--ods-rows`` rows, since its writer is slow. A measurement to quote in
README, not a test: timings depend on the machine.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.feather as feather

from .config import SourceSpec
from .ingest import read_source

__all__ = ["main"]

COLUMNS = ["school", "year", "score", "tutoring", "class_size"]
TEXT = ["school", "year"]


def panel(rows: int, seed: int = 7) -> pd.DataFrame:
    """``rows`` rows of invented school scores (ten years per school)."""
    rng = np.random.default_rng(seed)
    years = 10
    schools = -(-rows // years)
    frame = pd.DataFrame(
        {
            "school": np.repeat([f"sch{i:06d}" for i in range(schools)], years)[:rows],
            "year": np.tile(np.arange(2015, 2015 + years), schools)[:rows],
            "score": rng.normal(60, 8, rows).round(3),
            "tutoring": rng.gamma(2.0, 1.5, rows).round(3),
            "class_size": rng.integers(12, 35, rows).astype(float),
        }
    )
    return frame


def _write_xlsx(frame: pd.DataFrame, path: Path) -> None:
    import openpyxl

    book = openpyxl.Workbook(write_only=True)
    sheet = book.create_sheet("panel")
    sheet.append(list(frame.columns))
    for row in frame.itertuples(index=False):
        sheet.append(list(row))
    book.save(path)


def write_all(frame: pd.DataFrame, folder: Path, ods_rows: int) -> dict[str, Path]:
    """The panel in every kind (the .ods cut to ``ods_rows`` rows); kind -> file."""
    files = {
        "parquet": folder / "p.parquet",
        "csv": folder / "p.csv",
        "csv.gz": folder / "p.csv.gz",
        "arrow": folder / "p.arrow",
        "xlsx": folder / "p.xlsx",
        "ods": folder / "p.ods",
    }
    frame.to_parquet(files["parquet"], index=False)
    frame.to_csv(files["csv"], index=False)
    with pa.output_stream(str(files["csv.gz"]), compression="gzip") as stream:
        stream.write(files["csv"].read_bytes())
    feather.write_feather(frame, files["arrow"])
    _write_xlsx(frame, files["xlsx"])
    with pd.ExcelWriter(files["ods"], engine="odf") as writer:
        frame.head(ods_rows).to_excel(writer, sheet_name="panel", index=False)
    return files


def best_read(path: Path, repeat: int) -> float:
    """The shortest of ``repeat`` reads of ``path`` (seconds)."""
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        read_source(SourceSpec(path), COLUMNS, text=TEXT)
        times.append(time.perf_counter() - start)
    return min(times)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m panelpipe.readspeed", description=__doc__)
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--ods-rows", type=int, default=100_000)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        frame = panel(args.rows)
        files = write_all(frame, Path(tmp), args.ods_rows)
        best_read(files["parquet"], 1)  # the first read pays for imports and caches
        base = best_read(files["parquet"], args.repeat)
        print(f"{'kind':<8} {'rows':>9} {'MB':>7} {'read s':>7} {'/ Parquet':>9}")
        for kind, path in files.items():
            rows = min(args.rows, args.ods_rows) if kind == "ods" else args.rows
            seconds = best_read(path, args.repeat) if kind != "parquet" else base
            ratio = seconds / base * (args.rows / rows)  # per row, against Parquet's rows
            size = path.stat().st_size / 1e6
            print(f"{kind:<8} {rows:>9,} {size:>7.1f} {seconds:>7.2f} {ratio:>9.1f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
