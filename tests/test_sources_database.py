"""Database sources against the real engines: SQLite (Python's sqlite3) and a
throwaway PostgreSQL server (the ``postgres`` fixture of conftest.py).

The panel is the invented region-by-year panel of the hostile-input tests, or
the simulated panel of conftest.py, stored as a CSV file and as a table.
"""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from _postgres import PASSWORD
from _support import (
    hostile_analysis,
    hostile_rows,
    panel_settings,
    run_panelpipe,
    start_paused,
    wait_paused,
    write_hostile_config,
)
from panelpipe.config import DatabaseSpec, SourceSpec
from panelpipe.database import read_database, rows_digest
from panelpipe.findings import PanelpipeError
from panelpipe.ingest import read_panel

# "grant" is a reserved word in PostgreSQL: quoted, as both engines allow.
QUERY = 'SELECT region, year, jobs, "grant", coastal FROM panel ORDER BY region, year'
COLUMNS = ["region", "year", "jobs"]
CREATE = (
    'CREATE TABLE panel (region TEXT, year INTEGER, jobs INTEGER, "grant" DOUBLE PRECISION, '
    "coastal INTEGER)"
)


def hostile_table() -> list[tuple[Any, ...]]:
    """The rows of ``hostile_rows()`` as typed values (region stays text: "001")."""
    out = []
    for line in hostile_rows().splitlines():
        region, year, jobs, grant, coastal = line.split(",")
        out.append((region, int(year), int(jobs), float(grant), int(coastal)))
    return out


def fill_sqlite(path: Path, rows: list[tuple[Any, ...]], create: str = CREATE) -> None:
    with sqlite3.connect(path) as conn:
        conn.execute(create)
        marks = ", ".join("?" * len(rows[0]))
        conn.executemany(f"INSERT INTO panel VALUES ({marks})", rows)
    conn.close()


def fill_postgres(admin: str, rows: list[tuple[Any, ...]], create: str = CREATE) -> None:
    import psycopg

    with psycopg.connect(admin, autocommit=True) as conn:
        conn.execute("DROP TABLE IF EXISTS panel")
        conn.execute(create)
        conn.execute("ALTER TABLE panel OWNER TO analyst")
        marks = ", ".join(["%s"] * len(rows[0]))
        with conn.cursor() as cur:
            cur.executemany(f"INSERT INTO panel VALUES ({marks})", rows)


@pytest.fixture
def with_password(monkeypatch: pytest.MonkeyPatch) -> Iterator[None]:
    """libpq reads the analyst's password from PGPASSWORD (the only way panelpipe allows)."""
    monkeypatch.setenv("PGPASSWORD", PASSWORD)
    monkeypatch.setenv("PGPASSFILE", os.devnull)  # no stray ~/.pgpass
    yield


# ------------------------------------------------------------------ quick (SQLite)


def test_the_rows_hash_follows_every_cell_and_type(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    rows = hostile_table()
    fill_sqlite(tmp_path / "a.db", rows)
    spec = DatabaseSpec("sqlite:///a.db", QUERY, "sqlite:///a.db")
    monkeypatch.chdir(tmp_path)
    first = rows_digest(spec, COLUMNS)
    assert rows_digest(spec, COLUMNS) == first
    with sqlite3.connect(tmp_path / "a.db") as conn:
        conn.execute(
            'UPDATE panel SET "grant" = "grant" + 1e-9 WHERE region = \'003\' AND year = 2021'
        )
    conn.close()
    changed = rows_digest(spec, COLUMNS)
    assert changed != first
    # The same numbers as floats (14.0 for 14): another type, another hash.
    as_float = QUERY.replace("jobs,", "CAST(jobs AS REAL) AS jobs,")
    assert (
        rows_digest(DatabaseSpec("sqlite:///a.db", as_float, "sqlite:///a.db"), COLUMNS) != changed
    )


def test_rows_from_sqlite_carry_the_database_and_row_number(tmp_path: Path) -> None:
    fill_sqlite(tmp_path / "a.db", hostile_table())
    url = f"sqlite:///{tmp_path / 'a.db'}"  # an absolute path: four slashes
    assert url.startswith("sqlite:////")
    spec = DatabaseSpec(url, QUERY, url, rename={"jobs": "employed"})
    frame = read_database(spec, ["region", "year", "employed"], text=["region", "year"])
    assert list(frame["region"][:2]) == ["001", "001"]  # leading zeros kept
    assert list(frame["year"][:2]) == ["2018", "2019"]  # text, not "2018.0"
    assert frame["employed"].dtype == np.int64
    assert set(frame["_source"]) == {url}
    assert list(frame["_line"][:3]) == [1, 2, 3]


def test_rows_that_changed_since_the_plan_are_refused(tmp_path: Path) -> None:
    fill_sqlite(tmp_path / "a.db", hostile_table())
    url = f"sqlite:///{tmp_path / 'a.db'}"
    spec = DatabaseSpec(url, QUERY, url, expect="0" * 64)
    with pytest.raises(PanelpipeError, match=r"changed while the run was reading them"):
        read_database(spec, ["region"], text=["region"])


# ------------------------------------------------- estimates equal to the CSV's


def _estimates(panel: pd.DataFrame) -> dict[str, pd.Series]:
    from panelpipe.estimate import estimate_all, make_design
    from panelpipe.validate import validate_panel

    settings = panel_settings(estimators=("pooled_ols", "fixed_effects", "random_effects"))
    result = validate_panel(panel, settings)
    design, _ = make_design(result.panel, settings)
    models, _ = estimate_all(design)
    return {
        k: pd.concat([m.params, *(i.std_errors for i in m.inference.values())])
        for k, m in models.items()
    }


@pytest.mark.slow
def test_a_panel_from_sqlite_and_postgresql_estimates_as_from_csv(
    make_panel: Callable[..., pd.DataFrame],
    postgres: Any,
    tmp_path: Path,
    with_password: None,
) -> None:
    data = make_panel().drop(columns=["_source", "_line"])
    data["unit"] = data["unit"].astype(str)
    data.to_csv(tmp_path / "p.csv", index=False)
    rows = list(data.itertuples(index=False, name=None))
    create = (
        "CREATE TABLE panel (unit TEXT, period INTEGER, y DOUBLE PRECISION, "
        "x1 DOUBLE PRECISION, x2 DOUBLE PRECISION, z DOUBLE PRECISION)"
    )
    fill_sqlite(tmp_path / "p.db", [tuple(map(_plain, r)) for r in rows], create)
    fill_postgres(postgres.admin(), [tuple(map(_plain, r)) for r in rows], create)
    query = "SELECT * FROM panel"
    columns, text = ["unit", "period", "y", "x1", "x2", "z"], ["unit", "period"]
    sqlite_url = f"sqlite:///{tmp_path / 'p.db'}"
    panels = {
        "csv": read_panel([SourceSpec(tmp_path / "p.csv")], columns, text=text),
        "sqlite": read_panel([DatabaseSpec(sqlite_url, query, sqlite_url)], columns, text=text),
        "postgresql": read_panel(
            [DatabaseSpec(postgres.url(), query, postgres.url())], columns, text=text
        ),
    }
    reference = _estimates(panels["csv"])
    assert set(reference) == {"pooled_ols", "fixed_effects", "random_effects"}
    for engine in ("sqlite", "postgresql"):
        got = _estimates(panels[engine])
        for model, values in reference.items():
            # The same doubles in a CSV file (Python's float repr) and in a table:
            # equal estimates, common practice, no source.
            np.testing.assert_allclose(
                got[model].to_numpy(), values.to_numpy(), rtol=0, atol=1e-10, err_msg=engine
            )


def _plain(value: Any) -> Any:
    return value.item() if isinstance(value, np.generic) else value


# ------------------------------------------------------------------ whole runs


def _status(done: subprocess.CompletedProcess[str]) -> dict[str, Any]:
    (line,) = [json.loads(x) for x in done.stdout.splitlines() if x.startswith("{")]
    return dict(line)


def _no_password_anywhere(folder: Path, *outputs: str) -> None:
    """Not in any file under ``folder`` (run folders, Snakemake's .snakemake), nor output."""
    secret = PASSWORD.encode()
    for path in folder.rglob("*"):
        if path.is_file():
            assert secret not in path.read_bytes(), f"the password is in {path}"
    for text in outputs:
        assert PASSWORD not in text


@pytest.mark.slow
@pytest.mark.parametrize("engine", ["sqlite", "postgresql"])
def test_an_unchanged_table_is_unchanged_and_one_updated_cell_is_a_new_run(
    engine: str, tmp_path: Path, with_password: None, request: pytest.FixtureRequest
) -> None:
    postgres: Any = request.getfixturevalue("postgres") if engine == "postgresql" else None
    if engine == "sqlite":
        fill_sqlite(tmp_path / "a.db", hostile_table())
        url = "sqlite:///a.db"

        def update(sql: str) -> None:
            with sqlite3.connect(tmp_path / "a.db") as conn:
                conn.execute(sql)
            conn.close()

    else:
        import psycopg

        fill_postgres(postgres.admin(), hostile_table())
        url = postgres.url()

        def update(sql: str) -> None:
            with psycopg.connect(postgres.admin(), autocommit=True) as conn:
                conn.execute(sql)

    config = write_hostile_config(
        tmp_path, hostile_analysis(sources=[{"database": url, "query": QUERY}])
    )
    first = run_panelpipe(tmp_path, "run", "--config", str(config))
    assert first.returncode == 0, first.stderr[-3000:]
    assert _status(first)["status"] == "ok"
    again = run_panelpipe(tmp_path, "run", "--config", str(config))
    assert again.returncode == 0, again.stderr[-3000:]
    assert _status(again) == {**_status(first), "status": "unchanged"}

    update("UPDATE panel SET jobs = 99 WHERE region = '004' AND year = 2020")
    revised = run_panelpipe(tmp_path, "run", "--config", str(config))
    assert revised.returncode == 0, revised.stderr[-3000:]
    status = _status(revised)
    assert status["status"] == "ok" and status["run_id"] != _status(first)["run_id"]
    run_dir = tmp_path / "out" / "t" / status["run_id"]
    changes = json.loads((run_dir / "results.json").read_text())["changes"]
    assert changes["revised_cells"] == 1
    (cell,) = changes["revisions"]
    assert (cell["unit"], cell["period"], cell["column"], cell["new"]) == (
        "004",
        "2020",
        "jobs",
        99.0,
    )
    (record,) = json.loads((run_dir / "manifest.json").read_text())["inputs"]
    assert record["query"] == QUERY and record["rows"] == 36 and record["path"] == url
    if engine == "postgresql":
        assert record["server"] == f"127.0.0.1:{postgres.port}"
        assert record["database"] == "stats"
    outputs = [d.stdout + d.stderr for d in (first, again, revised)]
    _no_password_anywhere(tmp_path, *outputs)


@pytest.mark.slow
def test_a_table_changed_while_the_run_starts_is_refused(
    postgres: Any, tmp_path: Path, with_password: None
) -> None:
    import psycopg

    fill_postgres(postgres.admin(), hostile_table())
    config = write_hostile_config(
        tmp_path, hostile_analysis(sources=[{"database": postgres.url(), "query": QUERY}])
    )
    mark = tmp_path / "paused"
    proc = start_paused(tmp_path, config, "ingest", mark)
    try:
        wait_paused(proc, mark)
        with psycopg.connect(postgres.admin(), autocommit=True) as conn:
            conn.execute("UPDATE panel SET \"grant\" = 0.25 WHERE region = '002' AND year = 2019")
        os.kill(int(mark.read_text()), signal.SIGUSR1)
        out, err = proc.communicate(timeout=600)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode != 0
    assert "the rows the query returns changed while the run was reading them" in err
    assert "Traceback" not in err
    run_dir = (
        tmp_path / "out" / "t" / _status(subprocess.CompletedProcess([], 1, out, err))["run_id"]
    )
    assert not (run_dir / "work" / "raw.parquet").exists()
    assert not (run_dir / "report.html").exists()
    _no_password_anywhere(tmp_path, out, err)


def test_validation_names_the_database_and_row(tmp_path: Path) -> None:
    rows = hostile_table()
    rows[4] = (*rows[4][:2], "twelve", *rows[4][3:])  # row 5 of the result
    create = CREATE.replace("jobs INTEGER", "jobs TEXT")
    fill_sqlite(tmp_path / "a.db", rows, create)
    config = write_hostile_config(
        tmp_path, hostile_analysis(sources=[{"database": "sqlite:///a.db", "query": QUERY}])
    )
    done = run_panelpipe(tmp_path, "check", "--config", str(config))
    assert done.returncode == 1, done.stderr[-3000:]
    assert "non_numeric" in done.stderr
    assert "sqlite:///a.db, row 5" in done.stderr
    assert "Traceback" not in done.stderr


@pytest.mark.slow
def test_a_query_ending_in_a_comment_or_semicolon_reads(postgres: Any, with_password: None) -> None:
    fill_postgres(postgres.admin(), hostile_table())
    url = postgres.url()
    for query in (QUERY + " -- every region", QUERY + ";\n"):
        frame = read_database(DatabaseSpec(url, query, url), COLUMNS, text=["region"])
        assert len(frame) == 36 and frame["jobs"].dtype == np.int64
