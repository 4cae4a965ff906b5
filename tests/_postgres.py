"""A throwaway PostgreSQL server from Debian's packages, for the database tests.

``initdb`` makes a cluster in a temporary folder (run as the ``postgres`` system
user when the tests run as root, since the server refuses to run as root), the
server listens on a free localhost port with password (SCRAM) logins only, and
``stop`` shuts it down and removes the folder. A login ``analyst`` (password
:data:`PASSWORD`) owns a database ``stats``.
"""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

PASSWORD = "Ledger-Otter-4417"
"""The analyst's password: the tests assert it appears in no output."""

_ADMIN_PASSWORD = "Quarry-Heron-9052"


def _binaries() -> Path | None:
    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"))
    return Path(found[-1]).parent if found else None


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class Server:
    """A running server: its port and the folder that holds it."""

    port: int
    folder: Path
    bin: Path
    as_user: list[str]

    def url(self, user: str = "analyst", database: str = "stats", port: int | None = None) -> str:
        return f"postgresql://{user}@127.0.0.1:{port or self.port}/{database}"

    def admin(self, database: str = "stats") -> str:
        return (
            f"host=127.0.0.1 port={self.port} dbname={database} user=postgres "
            f"password={_ADMIN_PASSWORD}"
        )

    def stop(self) -> None:
        subprocess.run(
            [
                *self.as_user,
                str(self.bin / "pg_ctl"),
                "-D",
                str(self.folder / "data"),
                "-m",
                "immediate",
                "stop",
            ],
            capture_output=True,
            check=False,
        )
        shutil.rmtree(self.folder, ignore_errors=True)


def start() -> Server | str:
    """Start a server; on failure, the reason (the tests that need it are skipped)."""
    import psycopg

    binaries = _binaries()
    if binaries is None:
        return (
            "PostgreSQL's server is not installed (Debian: apt-get install postgresql; "
            ".ci/run installs it)"
        )
    folder = Path(tempfile.mkdtemp(prefix="panelpipe-pg-"))
    as_user: list[str] = []
    if os.geteuid() == 0:
        try:
            owner = pwd.getpwnam("postgres")
        except KeyError:
            return "running as root and there is no 'postgres' user to run the server as"
        os.chown(folder, owner.pw_uid, owner.pw_gid)
        as_user = ["runuser", "-u", "postgres", "--"]
    (folder / "pw").write_text(_ADMIN_PASSWORD + "\n", encoding="utf-8")
    if as_user:
        os.chown(folder / "pw", owner.pw_uid, owner.pw_gid)
    port = _free_port()
    server = Server(port, folder, binaries, as_user)
    steps = [
        [
            *as_user,
            str(binaries / "initdb"),
            "-D",
            str(folder / "data"),
            "-U",
            "postgres",
            "--auth=scram-sha-256",
            f"--pwfile={folder / 'pw'}",
            "-E",
            "UTF8",
            "--no-sync",
        ],
        [
            *as_user,
            str(binaries / "pg_ctl"),
            "-D",
            str(folder / "data"),
            "-w",
            "-l",
            str(folder / "log"),
            "-o",
            f"-p {port} -k {folder} -c listen_addresses=127.0.0.1 -c fsync=off",
            "start",
        ],
    ]
    for cmd in steps:
        done = subprocess.run(cmd, capture_output=True, text=True, check=False)
        if done.returncode != 0:
            server.stop()
            return f"could not start PostgreSQL ({' '.join(cmd[:2])}: {done.stderr[-500:]})"
    with psycopg.connect(server.admin("postgres"), autocommit=True) as conn:
        conn.execute(f"CREATE ROLE analyst LOGIN PASSWORD '{PASSWORD}'")
        conn.execute("CREATE DATABASE stats OWNER analyst")
    return server
