"""Runs: content-addressed run folders, atomic writes and the ``latest`` pointer.

A run's id is a hash of everything that determines its results: the bytes of
every input file in order, the analysis settings, and the panelpipe code. The
same inputs give the same id (so a rerun finds its outputs and does no work);
any change gives a new folder, and no run writes into another run's folder.
"""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import json
import os
import secrets
from collections.abc import Iterable, Iterator, Mapping
from pathlib import Path
from typing import Any

from . import __version__
from .config import REPO_ROOT, analysis_settings, resolve_sources
from .findings import PanelpipeError

__all__ = [
    "atomic_write_text",
    "code_fingerprint",
    "file_digest",
    "plan_runs",
    "run_id",
    "run_lock",
    "update_latest",
]

_CHUNK = 1 << 20


def file_digest(path: Path) -> str:
    """SHA-256 of a file's bytes, read in chunks."""
    h = hashlib.sha256()
    with Path(path).open("rb") as fh:
        while chunk := fh.read(_CHUNK):
            h.update(chunk)
    return h.hexdigest()


def code_fingerprint(root: Path = REPO_ROOT) -> str:
    """Hash of the package, the workflow rules and scripts and the templates."""
    h = hashlib.sha256(__version__.encode())
    patterns = (
        "workflow/panelpipe/**/*.py",
        "workflow/panelpipe/templates/*",
        "workflow/rules/*.smk",
        "workflow/scripts/*.py",
        "Snakefile",
    )
    # Tools that never touch a run's results (benchmark, demo generator, file
    # survey) stay out of the hash, so editing them does not start new runs.
    outside = {"bench.py", "demo.py", "survey.py"}
    files = sorted(
        {p for pat in patterns for p in root.glob(pat) if p.is_file() and p.name not in outside}
    )
    for p in files:
        h.update(p.relative_to(root).as_posix().encode())
        h.update(p.read_bytes())
    return h.hexdigest()


def run_id(digests: Iterable[str], settings: Mapping[str, Any], code: str) -> str:
    """The run id: 16 hex digits of a hash over inputs, settings and code.

    Source paths are not hashed, only their contents in order, so moving a
    delivery to another folder does not start a new run.
    """
    payload = {
        "inputs": list(digests),
        "settings": {k: v for k, v in settings.items() if k != "sources"},
        "code": code,
    }
    blob = json.dumps(payload, sort_keys=True, separators=(",", ":")).encode()
    return hashlib.sha256(blob).hexdigest()[:16]


def atomic_write_text(path: Path, text: str) -> None:
    """Write a file so that readers see either nothing or the whole file."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    # Created with mode 0666 so that the kernel applies the user's umask, as for any
    # file the user writes (tempfile.mkstemp would give 0600: unreadable by colleagues).
    tmp = path.parent / f".{path.name}.{secrets.token_hex(8)}.tmp"
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_CLOEXEC, 0o666)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def update_latest(analysis_dir: Path, run: str) -> None:
    """Point ``<analysis_dir>/latest`` at a completed run (a file holding its id)."""
    atomic_write_text(Path(analysis_dir) / "latest", run + "\n")


def plan_runs(config: Mapping[str, Any]) -> dict[str, str]:
    """The run id of every analysis of a validated configuration."""
    code = code_fingerprint()
    planned = {}
    for name in config["analyses"]:
        settings = analysis_settings(config, name)
        paths = resolve_sources(settings.sources, analysis=name)
        planned[name] = run_id([file_digest(p) for p in paths], settings.to_dict(), code)
    return planned


@contextlib.contextmanager
def run_lock(output_dir: Path) -> Iterator[None]:
    """Hold an exclusive lock on an output folder for the length of a run.

    The operating system releases the lock when the process ends, however it
    ends (even SIGKILL), so a killed run never blocks the next one.
    """
    output_dir = Path(output_dir)
    output_dir.mkdir(parents=True, exist_ok=True)
    path = output_dir / ".panelpipe.lock"
    with path.open("a+", encoding="utf-8") as fh:
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            fh.seek(0)
            holder = fh.read().strip() or "unknown"
            raise PanelpipeError(
                f"another panelpipe run (process {holder}) is writing to {output_dir}; "
                "wait for it to finish, then run again."
            ) from None
        fh.seek(0)
        fh.truncate()
        fh.write(str(os.getpid()))
        fh.flush()
        try:
            yield
        finally:
            fcntl.flock(fh, fcntl.LOCK_UN)
