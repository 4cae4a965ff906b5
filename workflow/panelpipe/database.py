"""Database sources: the rows a query returns from PostgreSQL or SQLite.

A ``{database, query}`` entry of ``sources`` is read with the query as written,
in a read-only session (PostgreSQL: a read-only transaction that sees one
snapshot; SQLite: the file opened read-only, so a missing file is never created),
fetched in chunks (SQLite: :data:`CHUNK_ROWS` rows at a time; PostgreSQL: the
CSV stream of ``COPY (query) TO STDOUT``, as the server sends it).

The password never enters panelpipe: libpq reads it from ``PGPASSWORD`` or the
password file (``~/.pgpass``, or ``PGPASSFILE``). A URL that carries one is
refused before any connection, so no config, manifest, log or report can hold it.

Every row gets ``_source`` = the source's label (the URL, see
`panelpipe.config.DatabaseSpec`) and ``_line`` = its row number in the result
(first row = 1), so messages read "<label>, row N".

The rows are hashed in a canonical form (`RowHasher`) while they are fetched:
the run id hashes them at planning, and the ingest step refuses rows whose hash
differs from the plan, just as it refuses a file whose bytes changed.
"""

from __future__ import annotations

import decimal
import hashlib
import marshal
import os
import sqlite3
import stat
import urllib.parse
from collections.abc import Iterator, Sequence
from contextlib import closing, contextmanager
from typing import Any, cast

import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv

from .config import DatabaseSpec, renamed_columns
from .findings import PanelpipeError

__all__ = [
    "CHUNK_ROWS",
    "LABEL_PREFIXES",
    "RowHasher",
    "read_database",
    "rows_digest",
    "server_of",
    "sqlite_path",
]

CHUNK_ROWS = 50_000
"""Rows handled at a time (fetched from SQLite, joined from PostgreSQL's stream): a few
megabytes, whatever the size of the result."""

LABEL_PREFIXES = ("postgresql://", "postgres://", "sqlite://")
"""How a database source's label starts (a file path never does)."""

_TIMEOUT_S = 15
"""Seconds to wait for a PostgreSQL server to answer before calling it unreachable."""

_PASSWORD_HELP = (
    "put the password in the PGPASSWORD environment variable or in the password file "
    "~/.pgpass (one line host:port:database:user:password, mode 0600)"
)


def _cut(query: str, limit: int = 200) -> str:
    flat = " ".join(query.split())
    return repr(flat if len(flat) <= limit else flat[:limit] + "...")


def _where(spec: DatabaseSpec) -> str:
    return f"{spec.label}, query {_cut(spec.query)}"


class RowHasher:
    """SHA-256 of a query result in a canonical form.

    Notes
    -----
    The hash covers, in order: the column names with the type the engine
    reports for each (PostgreSQL's type name; SQLite reports none), then the
    rows in the order the query returns them, in chunks of :data:`CHUNK_ROWS`.
    SQLite's rows are fetched as Python values; PostgreSQL's arrive as the CSV
    text the server writes (`update_text`, see ``_fetch_postgres``). From SQLite,
    a chunk of plain values (integers, floats, text, bytes, NULL) is encoded with
    Python's ``marshal`` format version 2, which writes each value with its type
    and floats as their exact 8 bytes and shares no objects between values, so
    equal rows always give equal bytes; a chunk holding other values (exact
    decimals, dates) is encoded as the ``repr`` of each row, which also keeps
    each value's type and exact digits. One changed cell, a changed type or a
    changed row order therefore gives another hash, and the same rows give the
    same hash on every machine with the same driver.
    """

    def __init__(self, names: Sequence[str], types: Sequence[str]) -> None:
        self._h = hashlib.sha256(repr([list(names), list(types)]).encode())
        self.size = 0  # rows (or bytes of text) hashed: zero for an empty result

    def update(self, rows: Sequence[tuple[Any, ...]]) -> None:
        try:
            blob = b"M" + marshal.dumps(list(rows), 2)
        except ValueError:  # a value marshal cannot write
            blob = b"R" + "".join(f"{row!r}\n" for row in rows).encode()
        self._h.update(len(blob).to_bytes(8, "little"))
        self._h.update(blob)
        self.size += len(rows)

    def update_text(self, data: bytes) -> None:
        """Rows as text the server wrote (PostgreSQL's CSV output), hashed as they come."""
        self._h.update(data)
        self.size += len(data)

    def hexdigest(self) -> str:
        return self._h.hexdigest()


def sqlite_path(spec: DatabaseSpec) -> str:
    """The file of a ``sqlite:///path`` URL (``sqlite:////abs/path`` for an absolute one).

    Raises
    ------
    PanelpipeError
        If the URL names no file, or the file is missing or not a regular file.
    """
    rest = spec.database.removeprefix("sqlite://")
    path = urllib.parse.unquote(rest[1:]) if rest.startswith("/") else ""
    if not path:
        raise PanelpipeError(
            f"{spec.label}: a SQLite URL names a file after three slashes: sqlite:///relative/"
            "path.db, or sqlite:////absolute/path.db. Fix 'database' in 'sources'."
        )
    try:
        mode = os.stat(path).st_mode
    except OSError as exc:
        raise PanelpipeError(
            f"{spec.label}: the SQLite file {path!r} cannot be opened ({exc.strerror}; looked "
            f"from {os.getcwd()}). Check 'database' in 'sources'."
        ) from exc
    if not stat.S_ISREG(mode):
        raise PanelpipeError(
            f"{spec.label}: {path!r} is not a regular file, so not a SQLite database. "
            "Check 'database' in 'sources'."
        )
    return path


@contextmanager
def _sqlite_cursor(spec: DatabaseSpec) -> Iterator[sqlite3.Cursor]:
    path = sqlite_path(spec)
    uri = f"file:{urllib.parse.quote(os.path.abspath(path))}?mode=ro"
    try:
        with closing(sqlite3.connect(uri, uri=True)) as conn, closing(conn.cursor()) as cur:
            cur.execute(spec.query)
            yield cur
    except sqlite3.DatabaseError as exc:
        if "not a database" in str(exc):
            raise PanelpipeError(
                f"{spec.label}: {path!r} is not a SQLite database (or it is damaged). Check "
                "'database' in 'sources', or deliver the file again."
            ) from exc
        raise PanelpipeError(
            f"{_where(spec)}: the query failed ({exc}). Correct the query in 'sources'."
        ) from exc


def _postgres_password_refused(spec: DatabaseSpec) -> dict[str, str]:
    """The URL's connection parameters; refuse one that carries a password."""
    import psycopg.conninfo

    try:
        params = psycopg.conninfo.conninfo_to_dict(spec.database)
    except psycopg.ProgrammingError as exc:
        raise PanelpipeError(
            f"{spec.label}: not a PostgreSQL URL libpq can read ({exc}). Write it as "
            "postgresql://user@host:port/database."
        ) from None
    if "password" in params:
        # The label is the URL itself: it must not be echoed here.
        raise PanelpipeError(
            "a PostgreSQL URL in 'sources' carries a password; a password never goes in the "
            f"configuration: remove it from the URL and {_PASSWORD_HELP}."
        )
    return {k: str(v) for k, v in params.items()}


def server_of(spec: DatabaseSpec) -> dict[str, str]:
    """The server and database a source reads, for the manifest (no password)."""
    if spec.database.startswith("sqlite:"):
        return {"server": "sqlite (a file)", "database": sqlite_path(spec)}
    params = _postgres_password_refused(spec)
    host = params.get("host") or "local socket"
    return {
        "server": f"{host}:{params['port']}" if params.get("port") else host,
        "database": params.get("dbname") or params.get("user") or "",
    }


# Fixed for the session so that the server writes every value the same way
# whatever its own defaults: the hashed CSV text is then canonical.
_SESSION = (
    "SET client_encoding = 'UTF8'",
    "SET DateStyle = 'ISO, YMD'",
    "SET IntervalStyle = 'iso_8601'",
    "SET TimeZone = 'UTC'",
    "SET extra_float_digits = 1",
    "SET bytea_output = 'hex'",
)

_ARROW_TYPES = {
    "int2": pa.int64(),
    "int4": pa.int64(),
    "int8": pa.int64(),
    "float4": pa.float64(),
    "float8": pa.float64(),
    "numeric": pa.float64(),
    "bool": pa.bool_(),
}
"""How a PostgreSQL column is parsed from its CSV text, by the type name psycopg
reports (any other type is read as text, which validation reads as it reads a CSV)."""


@contextmanager
def _postgres_session(spec: DatabaseSpec) -> Iterator[Any]:
    """A read-only, repeatable-read transaction: every statement sees one snapshot."""
    import psycopg

    _postgres_password_refused(spec)
    try:
        conn = psycopg.connect(spec.database, connect_timeout=_TIMEOUT_S)
    except psycopg.OperationalError as exc:
        reason = " ".join(str(exc).split())
        if "password" in reason or "authentication" in reason:
            raise PanelpipeError(
                f"{spec.label}: the server refused the login ({reason}). Check the user in "
                f"the URL and {_PASSWORD_HELP}."
            ) from None
        raise PanelpipeError(
            f"{spec.label}: cannot connect to the database server ({reason}). Check the host, "
            "port and database name in the URL, and that the server is running and reachable."
        ) from None
    try:
        with conn:
            conn.read_only = True  # the delivery is only ever read
            conn.isolation_level = psycopg.IsolationLevel.REPEATABLE_READ
            for statement in _SESSION:
                conn.execute(statement)
            yield conn
    except psycopg.Error as exc:
        reason = " ".join(str(exc).split())
        raise PanelpipeError(
            f"{_where(spec)}: the query failed ({reason}). Correct the query in 'sources'."
        ) from None
    finally:
        conn.close()


def _header(spec: DatabaseSpec, description: Any) -> tuple[list[str], list[str]]:
    if description is None:
        raise PanelpipeError(
            f"{_where(spec)}: the statement returns no rows (it is not a query). Write a "
            "SELECT that returns the panel's rows."
        )
    names = [str(col[0]) for col in description]
    types = [str(getattr(col, "type_display", "") or "") for col in description]
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise PanelpipeError(
            f"{_where(spec)}: the result has column(s) {', '.join(map(repr, repeated))} more "
            "than once; give each column its own name (SELECT a.x AS x_a, ...)."
        )
    return names, types


def _named(spec: DatabaseSpec, names: Sequence[str], columns: Sequence[str]) -> list[str]:
    """The result's column names after 'rename'; refuse when a wanted column is missing."""
    return renamed_columns(
        _where(spec),
        spec.rename,
        names,
        columns,
        holder="the result",
        fix="Select them in the query, or map a column of another name with 'rename' on "
        "this source.",
    )


def _empty(spec: DatabaseSpec) -> PanelpipeError:
    return PanelpipeError(
        f"{_where(spec)}: the query returned no rows. Check the query (a WHERE clause "
        "that selects nothing, an empty table), or remove the entry from 'sources'."
    )


def _fetch_postgres(
    spec: DatabaseSpec, columns: Sequence[str], text: Sequence[str], *, keep: bool
) -> tuple[pa.Table | None, str]:
    """Run the query: its rows as an Arrow table (if ``keep``), and their hash.

    The header (names and types) comes from a cursor declared on the query; the
    rows stream as CSV through ``COPY (query) TO STDOUT`` in the same snapshot,
    chunk by chunk, and pyarrow parses them (NULL is an unquoted empty field,
    an empty text a quoted one). The hash is `RowHasher`'s header followed by
    that CSV text, which the session settings above make canonical.
    """
    from psycopg import sql

    chunks: list[bytes] = []
    with _postgres_session(spec) as conn:
        with conn.cursor(name="panelpipe_header") as cur:
            cur.execute(spec.query)
            names, types = _header(spec, cur.description)
        seen = _named(spec, names, columns)
        hasher = RowHasher(names, types)
        # A final semicolon cannot stand inside COPY (...), and a final "-- comment"
        # would hide the closing parenthesis were it on the same line.
        query = spec.query.strip().rstrip(";").rstrip()
        copy_sql = sql.SQL("COPY ({}\n) TO STDOUT WITH (FORMAT csv)").format(sql.SQL(query))
        with conn.cursor() as cur, cur.copy(copy_sql) as copy:
            # The server sends one message per row: they are joined CHUNK_ROWS at a time.
            pending: list[bytes | memoryview] = []
            for row in copy:
                pending.append(row)
                if len(pending) == CHUNK_ROWS:
                    chunks.append(b"".join(pending))
                    pending.clear()
                    hasher.update_text(chunks[-1])
                    if not keep:
                        chunks.clear()
            chunks.append(b"".join(pending))
            hasher.update_text(chunks[-1])
    if not hasher.size:
        raise _empty(spec)
    if not keep:
        return None, hasher.hexdigest()
    wanted = {c: names[seen.index(c)] for c in columns}
    kinds = dict(zip(names, types, strict=True))
    convert = pacsv.ConvertOptions(
        include_columns=list(wanted.values()),
        column_types={
            name: pa.string()
            if col in text
            else _ARROW_TYPES.get(kinds[name].split("(")[0], pa.string())
            for col, name in wanted.items()
        },
        null_values=[""],
        strings_can_be_null=True,
        quoted_strings_can_be_null=False,
        true_values=["t"],
        false_values=["f"],
    )
    try:
        table = pacsv.read_csv(
            pa.BufferReader(b"".join(chunks)),
            read_options=pacsv.ReadOptions(column_names=names),
            parse_options=pacsv.ParseOptions(newlines_in_values=True),
            convert_options=convert,
        )
    except pa.ArrowInvalid as exc:
        raise PanelpipeError(
            f"{_where(spec)}: the rows could not be read ({exc}). Cast the column in the query "
            "(e.g. CAST(x AS double precision)) or report it as a bug."
        ) from exc
    return table.rename_columns([seen[names.index(c)] for c in table.column_names]), (
        hasher.hexdigest()
    )


def _fetch_sqlite(
    spec: DatabaseSpec, columns: Sequence[str], *, keep: bool
) -> tuple[list[str], list[tuple[Any, ...]], str]:
    """Run the query: names (after 'rename'), rows (if ``keep``) and the rows' hash."""
    rows: list[tuple[Any, ...]] = []
    with _sqlite_cursor(spec) as cur:
        names, types = _header(spec, cur.description)
        seen = _named(spec, names, columns)
        hasher = RowHasher(names, types)
        while chunk := cur.fetchmany(CHUNK_ROWS):
            hasher.update(chunk)
            if keep:
                rows.extend(chunk)
    if not hasher.size:
        raise _empty(spec)
    return seen, rows, hasher.hexdigest()


def rows_digest(spec: DatabaseSpec, columns: Sequence[str]) -> str:
    """Run the query and return the SHA-256 of its rows (see `RowHasher`).

    Raises
    ------
    PanelpipeError
        As `read_database` does, so that a bad query stops a run before it starts.
    """
    if spec.database.startswith("sqlite:"):
        return _fetch_sqlite(spec, columns, keep=False)[2]
    return _fetch_postgres(spec, columns, (), keep=False)[1]


def _frame_of_rows(
    seen: Sequence[str], rows: list[tuple[Any, ...]], columns: Sequence[str], text: Sequence[str]
) -> pd.DataFrame:
    by_name = dict(zip(seen, zip(*rows, strict=True), strict=True))
    frame = pd.DataFrame(index=pd.RangeIndex(len(rows)))
    for col in columns:
        values = by_name[col]
        kinds = set(map(type, values))
        if col in text:
            # From the values themselves: an integer column with NULLs stays "2020", not "2020.0".
            if not kinds <= {str, type(None)}:
                values = tuple(None if v is None else str(v) for v in values)
            frame[col] = pd.array(values, dtype="string")
        elif kinds <= {int, float, decimal.Decimal, type(None)}:
            # Exact numerics (NUMERIC) are read as floats, like a number in a CSV file.
            frame[col] = pd.to_numeric(pd.Series(values, dtype=object))
        else:
            frame[col] = pd.Series(values, dtype=object).infer_objects()
    return frame


def read_database(
    spec: DatabaseSpec, columns: Sequence[str], *, text: Sequence[str]
) -> pd.DataFrame:
    """Read the named columns of a query's result; ``text`` columns are kept as text.

    Raises
    ------
    PanelpipeError
        If the server cannot be reached, refuses the login, the query fails or
        returns no rows, a column is missing, or the rows differ from
        ``spec.expect`` (when set), naming the database and the query.
    """
    if spec.database.startswith("sqlite:"):
        seen, rows, digest = _fetch_sqlite(spec, columns, keep=True)
        frame = _frame_of_rows(seen, rows, columns, text)
    else:
        table, digest = _fetch_postgres(spec, columns, text, keep=True)
        frame = cast(pa.Table, table).to_pandas()[list(columns)]
        for col in text:
            frame[col] = frame[col].astype("string")
    if spec.expect and digest != spec.expect:
        raise PanelpipeError(
            f"{_where(spec)}: the rows the query returns changed while the run was reading "
            f"them (SHA-256 {spec.expect[:12]}... when the run was planned, {digest[:12]}... "
            "now). The table may still be loading: wait until it is complete, then run again."
        )
    frame["_source"] = spec.label
    frame["_line"] = pd.RangeIndex(1, len(frame) + 1)
    return frame
