"""Reading speed of a database source against the same panel in Parquet.

Run by hand (not a test: timings depend on the machine)::

    python tests/bench_database.py [ROWS]

It starts a throwaway PostgreSQL server (tests/_postgres.py), stores an invented
panel of ROWS rows (default 1,000,000: region, year and five numbers) as a
Parquet file, a SQLite file and a PostgreSQL table, reads each through
``panelpipe.ingest.read_panel`` as a run does (best of three), and prints the
seconds and the ratio to the Parquet read. README.md quotes the figures.
"""

from __future__ import annotations

import os
import sqlite3
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).parent))

import _postgres
from panelpipe.config import DatabaseSpec, SourceSpec
from panelpipe.ingest import read_panel

COLUMNS = ["region", "year", "y", "x1", "x2", "x3", "x4"]
TEXT = ["region", "year"]


def invented_panel(rows: int) -> pd.DataFrame:
    rng = np.random.default_rng(7)
    years = 20
    regions = rows // years
    frame = pd.DataFrame(
        {
            "region": np.repeat([f"r{i:06d}" for i in range(regions)], years),
            "year": np.tile(np.arange(2005, 2005 + years), regions),
        }
    )
    for col in COLUMNS[2:]:
        frame[col] = rng.normal(size=len(frame))
    return frame


def best_of(read: Callable[[], pd.DataFrame], n: int = 3) -> float:
    times = []
    for _ in range(n):
        start = time.perf_counter()
        read()
        times.append(time.perf_counter() - start)
    return min(times)


def main(rows: int) -> None:
    import psycopg

    frame = invented_panel(rows)
    folder = Path(tempfile.mkdtemp(prefix="panelpipe-bench-db-"))
    frame.to_parquet(folder / "p.parquet", index=False)
    with sqlite3.connect(folder / "p.db") as conn:
        frame.to_sql("panel", conn, index=False)
    conn.close()
    server = _postgres.start()
    if isinstance(server, str):
        raise SystemExit(server)
    try:
        with psycopg.connect(server.admin(), autocommit=True) as conn:
            conn.execute(
                "CREATE TABLE panel (region TEXT, year INTEGER, "
                + ", ".join(f"{c} DOUBLE PRECISION" for c in COLUMNS[2:])
                + ")"
            )
            conn.execute("ALTER TABLE panel OWNER TO analyst")
            with conn.cursor().copy(f"COPY panel ({', '.join(COLUMNS)}) FROM STDIN") as copy:
                for row in frame.itertuples(index=False, name=None):
                    copy.write_row(row)
        os.environ["PGPASSWORD"] = _postgres.PASSWORD
        query = f"SELECT {', '.join(COLUMNS)} FROM panel"
        sqlite_url = f"sqlite:///{folder / 'p.db'}"
        sources = {
            "parquet": SourceSpec(folder / "p.parquet"),
            "sqlite": DatabaseSpec(sqlite_url, query, sqlite_url),
            "postgresql": DatabaseSpec(server.url(), query, server.url()),
        }
        seconds = {
            name: best_of(lambda spec=spec: read_panel([spec], COLUMNS, text=TEXT))
            for name, spec in sources.items()
        }
    finally:
        server.stop()
    for name, s in seconds.items():
        print(f"{name:>10}: {s:6.2f} s  ({s / seconds['parquet']:5.1f} x the Parquet read)")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 1_000_000)
