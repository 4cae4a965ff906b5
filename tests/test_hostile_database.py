"""Hostile database sources: each is refused with the database and query, nothing is written.

Every case runs the whole workflow (``panelpipe run``) next to a copy of an
earlier complete run (the ``earlier_run`` fixture), then asserts the exit
status, the message, that no traceback was printed, that no run folder was
added, that the earlier run folder is byte-identical, that a SQLite delivery is
unchanged, and that no password appears in any output line or file.
"""

from __future__ import annotations

import socket
import sqlite3
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import pytest

from _postgres import PASSWORD
from _support import hostile_analysis, run_panelpipe, write_hostile_config
from test_sources_database import QUERY, fill_postgres, fill_sqlite, hostile_table

pytestmark = pytest.mark.slow  # the earlier run is a real workflow run

WRONG_PASSWORD = "Marsh-Kettle-2288"


@dataclass
class Case:
    database: str  # "{pg}" is replaced by the test server's host:port, "{closed}" by a dead port
    query: str
    expect: list[str]
    password: str = PASSWORD


CASES: dict[str, Case] = {
    "sqlite-empty-result": Case(
        "sqlite:///a.db",
        "SELECT * FROM panel WHERE year > 3000",
        ["sqlite:///a.db, query 'SELECT * FROM panel WHERE year > 3000'", "returned no rows"],
    ),
    "sqlite-no-period-column": Case(
        "sqlite:///a.db",
        'SELECT region, jobs, "grant" FROM panel',
        ["column(s) 'year' not found", "the result has 'region', 'jobs', 'grant'"],
    ),
    "sqlite-syntax-error": Case(
        "sqlite:///a.db",
        "SELECT region year FROM panel WHERE",
        ["sqlite:///a.db, query 'SELECT region year FROM panel WHERE': the query failed"],
    ),
    "sqlite-a-statement-that-writes": Case(
        "sqlite:///a.db",
        "DELETE FROM panel",
        ["the query failed (attempt to write a readonly database)"],
    ),
    "sqlite-file-missing": Case(
        "sqlite:///gone.db",
        QUERY,
        ["sqlite:///gone.db: the SQLite file 'gone.db' cannot be opened (No such file"],
    ),
    "sqlite-not-a-database": Case(
        "sqlite:///notes.db",
        QUERY,
        ["sqlite:///notes.db: 'notes.db' is not a SQLite database"],
    ),
    "postgresql-empty-result": Case(
        "postgresql://analyst@{pg}/stats",
        "SELECT * FROM panel WHERE false",
        ["/stats, query 'SELECT * FROM panel WHERE false': the query returned no rows"],
    ),
    "postgresql-no-period-column": Case(
        "postgresql://analyst@{pg}/stats",
        'SELECT region, jobs, "grant" FROM panel',
        ["column(s) 'year' not found; the result has 'region', 'jobs', 'grant'"],
    ),
    "postgresql-syntax-error": Case(
        "postgresql://analyst@{pg}/stats",
        "SELEC region FROM panel",
        ["query 'SELEC region FROM panel': the query failed", "syntax error"],
    ),
    "postgresql-unreachable-server": Case(
        "postgresql://analyst@{closed}/stats",
        QUERY,
        ["cannot connect to the database server", "Check the host, port and database name"],
    ),
    "postgresql-wrong-password": Case(
        "postgresql://analyst@{pg}/stats",
        QUERY,
        ["the server refused the login", "password authentication failed", "PGPASSWORD"],
        password=WRONG_PASSWORD,
    ),
    "postgresql-password-as-a-url-parameter": Case(
        f"postgresql://analyst@{{pg}}/stats?password={PASSWORD}",
        QUERY,
        ["carries a password", "remove it from the URL"],
    ),
    "postgresql-password-in-the-url": Case(
        f"postgresql://analyst:{PASSWORD}@{{pg}}/stats",
        QUERY,
        ["carries a password", "remove it from the URL", "PGPASSWORD", "~/.pgpass"],
    ),
}


def _closed_port() -> int:
    with socket.socket() as s:  # bound, never listening: a connection is refused
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.mark.parametrize("name", list(CASES), ids=list(CASES))
def test_a_bad_database_source_is_refused_and_nothing_is_written(
    name: str,
    earlier_run: Callable[[], Callable[[], None]],
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    request: pytest.FixtureRequest,
) -> None:
    case = CASES[name]
    # Only the PostgreSQL cases need (and are skipped without) the server.
    postgres = request.getfixturevalue("postgres") if name.startswith("postgresql") else None
    check = earlier_run()
    fill_sqlite(tmp_path / "a.db", hostile_table())
    (tmp_path / "notes.db").write_text("region,year\n001,2020\n", encoding="utf-8")
    delivered = {p.name: p.read_bytes() for p in tmp_path.glob("*.db")}
    if postgres is not None:
        fill_postgres(postgres.admin(), hostile_table())
    monkeypatch.setenv("PGPASSWORD", case.password)
    monkeypatch.setenv("PGPASSFILE", "/dev/null")
    database = case.database.format(
        pg=f"127.0.0.1:{postgres.port if postgres else 0}", closed=f"127.0.0.1:{_closed_port()}"
    )
    config = write_hostile_config(
        tmp_path, hostile_analysis(sources=[{"database": database, "query": case.query}])
    )
    done = run_panelpipe(tmp_path, "run", "--config", str(config))
    assert done.returncode == 2, done.stderr[-3000:]
    for text in ["panelpipe: analysis 't': ", *case.expect]:
        assert text in done.stderr, done.stderr[-3000:]
    assert "Traceback" not in done.stderr + done.stdout
    check()
    runs = [p.name for p in (tmp_path / "out" / "t").iterdir() if p.is_dir()]
    assert len(runs) == 1, f"a run folder was added: {runs}"
    assert {p.name: p.read_bytes() for p in tmp_path.glob("*.db")} == delivered
    with sqlite3.connect(tmp_path / "a.db") as conn:
        assert conn.execute("SELECT count(*) FROM panel").fetchone() == (36,)
    conn.close()
    for secret in (PASSWORD, WRONG_PASSWORD):
        assert secret not in done.stdout + done.stderr
        # Every file the run may have written: the run folders, Snakemake's own folder.
        for path in tmp_path.rglob("*"):
            if path.is_file() and path.name != "c.yaml":  # the config holds the bad URL
                assert secret.encode() not in path.read_bytes(), f"the password is in {path}"
