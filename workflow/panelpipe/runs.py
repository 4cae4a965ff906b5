"""Runs: content-addressed run folders, atomic writes, the seal and ``latest``.

A run's id is a hash of everything that determines its results: the bytes of
every input file in order with the options it is read with, the analysis
settings, and the panelpipe code. The same inputs give the same id (so a rerun
finds its outputs and does no work); any change gives a new folder, and no run
writes into another run's folder.

A run is *complete* when its folder holds ``checksums.json`` (the seal, written
after every published file) and every file it lists still has its recorded
SHA-256. ``latest`` is only ever set to a complete run.
"""

from __future__ import annotations

import contextlib
import ctypes
import fcntl
import hashlib
import json
import os
import secrets
import signal
import stat
import sys
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

from . import __version__
from .config import WORKFLOW_ROOT, DatabaseSpec, analysis_settings, source_entries
from .findings import PanelpipeError

__all__ = [
    "FAULT_ENV",
    "FAULT_MARK_ENV",
    "PLAN_ENV",
    "SEAL",
    "RunCheck",
    "RunPlan",
    "atomic_write_text",
    "check_plan",
    "check_run",
    "code_fingerprint",
    "die_with_parent",
    "enter_step",
    "fault_point",
    "file_digest",
    "input_change",
    "live_snakemake",
    "plan_runs",
    "publish_latest",
    "refuse_damaged",
    "run_id",
    "run_lock",
    "seal_step",
    "update_latest",
    "workdir_lock",
]

_CHUNK = 1 << 20
SEAL = "checksums.json"
PLAN_ENV = "PANELPIPE_PLAN"
FAULT_ENV = "PANELPIPE_FAULT"
FAULT_MARK_ENV = "PANELPIPE_FAULT_MARK"


def file_digest(path: Path | str) -> str:
    """SHA-256 of a regular file's bytes, read in chunks.

    The file is opened without blocking and checked to be a regular file on the
    open descriptor, so a named pipe put in a file's place cannot hang the run.

    Raises
    ------
    PanelpipeError
        If the file is missing, unreadable or not a regular file, naming it.
    """
    path = Path(path)
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK)
    except OSError as exc:
        raise PanelpipeError(
            f"{path}: cannot be read ({exc.strerror}); check that it exists and that the "
            "user running panelpipe may read it."
        ) from exc
    h = hashlib.sha256()
    with os.fdopen(fd, "rb") as fh:
        if not stat.S_ISREG(os.fstat(fd).st_mode):
            raise PanelpipeError(f"{path}: not a regular file; only regular files can be read.")
        try:
            while chunk := fh.read(_CHUNK):
                h.update(chunk)
        except OSError as exc:
            raise PanelpipeError(f"{path}: reading failed ({exc.strerror}).") from exc
    return h.hexdigest()


_PACKAGE = Path(__file__).resolve().parent


def code_fingerprint(package: Path = _PACKAGE, root: Path = WORKFLOW_ROOT) -> str:
    """Hash of the package, its templates, and the workflow's Snakefile, rules and scripts.

    Files are named as in the repository (``workflow/panelpipe/...``), so an editable
    and a non-editable install of the same code give the same fingerprint; the copy
    of the workflow inside an installed package is hashed once, as the workflow.
    """
    h = hashlib.sha256(__version__.encode())
    # Tools that never touch a run's results (benchmark, demo generator, file
    # survey) stay out of the hash, so editing them does not start new runs.
    outside = {"bench.py", "demo.py", "readspeed.py", "survey.py"}
    code = [
        p
        for pat in ("**/*.py", "templates/*")
        for p in package.glob(pat)
        if p.is_file() and p.name not in outside and "_workflow" not in p.relative_to(package).parts
    ]
    named = {f"workflow/panelpipe/{p.relative_to(package).as_posix()}": p for p in code}
    for pat in ("workflow/rules/*.smk", "workflow/scripts/*.py", "Snakefile"):
        named.update({p.relative_to(root).as_posix(): p for p in root.glob(pat) if p.is_file()})
    for name in sorted(named):
        h.update(name.encode())
        h.update(named[name].read_bytes())
    return h.hexdigest()


def run_id(inputs: Iterable[Mapping[str, Any]], settings: Mapping[str, Any], code: str) -> str:
    """The run id: 16 hex digits of a hash over inputs, settings and code.

    ``inputs`` holds, per source in reading order, its ``sha256`` and the
    ``options`` of its ``sources`` entry (every key but ``path``), so that any
    reading option, including one added later, is part of the id. Paths are not
    hashed: moving a delivery to another folder does not start a new run. For a
    database source the hash is that of the rows the query returned
    (`panelpipe.database.RowHasher`) and the options are the query and renames;
    the URL, like a path, is not hashed.
    """
    payload = {
        "inputs": [dict(i) for i in inputs],
        "settings": {k: v for k, v in settings.items() if k != "sources"},
        "code": code,
    }
    blob = json.dumps(payload, sort_keys=True, separators=(",", ":")).encode()
    return hashlib.sha256(blob).hexdigest()[:16]


@dataclass(frozen=True)
class RunPlan:
    """The run an analysis's current inputs and settings make.

    ``inputs`` lists (path, sha256) of every source in reading order, as hashed
    when the run was planned (a database source: its label and the hash of the
    rows its query returned); the ingest step reads nothing else.
    """

    analysis: str
    run_id: str
    inputs: tuple[tuple[str, str], ...]

    def to_dict(self) -> dict[str, Any]:
        return {"run_id": self.run_id, "inputs": [list(pair) for pair in self.inputs]}


def plan_runs(config: Mapping[str, Any]) -> dict[str, RunPlan]:
    """The run of every analysis of a validated configuration.

    Database queries are run here and their rows hashed; the ingest step runs
    each query again and refuses rows whose hash differs (nothing is kept in
    between, so an unchanged run's folder is never written to).
    """
    from .database import rows_digest

    code = code_fingerprint()
    planned = {}
    for name in config["analyses"]:
        settings = analysis_settings(config, name)
        digests, ident = [], []
        for item in source_entries(settings.sources, analysis=name):
            if isinstance(item, DatabaseSpec):
                try:
                    digest = rows_digest(item, settings.columns)
                except PanelpipeError as err:
                    raise PanelpipeError(f"analysis {name!r}: {err}") from None
                label, options = item.label, item.options
            else:
                label, digest, options = str(item[0]), file_digest(item[0]), item[1]
            digests.append((label, digest))
            ident.append({"sha256": digest, "options": options})
        planned[name] = RunPlan(name, run_id(ident, settings.to_dict(), code), tuple(digests))
    return planned


def input_change(planned: Sequence[Sequence[str]], now: Sequence[Sequence[str]]) -> str | None:
    """How the sources differ from the plan (path or label, sha256 pairs), or None."""
    before = [str(p) for p, _ in planned]
    after = [str(p) for p, _ in now]
    if before != after:
        new = [p for p in after if p not in before]
        gone = [p for p in before if p not in after]
        return (
            f"the files that 'sources' names changed (new: {', '.join(new) or 'none'}; "
            f"gone: {', '.join(gone) or 'none'})"
        )
    for (path, was), (_, is_) in zip(planned, now, strict=True):
        if was != is_:
            return (
                f"{path} changed (SHA-256 {was[:12]}... when the run was planned, "
                f"{is_[:12]}... now)"
            )
    return None


def check_plan(plans: Mapping[str, RunPlan], earlier: str | None) -> None:
    """Refuse when a run planned earlier (JSON of `RunPlan.to_dict`) no longer holds.

    ``panelpipe run`` plans before it starts Snakemake and passes its plan in the
    environment; Snakemake plans again when it reads the workflow. A difference
    means a source (or the configuration) changed in between.
    """
    if not earlier:
        return
    for name, was in json.loads(earlier).items():
        plan = plans.get(name)
        if plan is None or plan.run_id == was["run_id"]:
            continue
        what = input_change(was["inputs"], plan.inputs) or (
            "the configuration or the panelpipe code changed"
        )
        raise PanelpipeError(
            f"analysis {name!r}: {what} while the run was starting. A delivery may still "
            "be arriving: wait until it is complete, then run again. Nothing was run."
        )


@dataclass(frozen=True)
class RunCheck:
    """Whether a run folder is complete, incomplete (no seal yet) or damaged."""

    state: Literal["complete", "incomplete", "damaged"]
    reason: str = ""


def check_run(run_dir: Path) -> RunCheck:
    """Verify a run folder against its seal.

    Complete: the seal exists and every file it lists has its recorded SHA-256.
    Incomplete: no seal (the run never finished, or was killed). Damaged: the
    seal exists but a listed file is gone or differs.
    """
    run_dir = Path(run_dir)
    seal = run_dir / SEAL
    if not seal.is_file():
        return RunCheck("incomplete", f"{seal} does not exist")
    try:
        listed = json.loads(seal.read_text(encoding="utf-8"))["files"]
        items = sorted(listed.items())
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        return RunCheck("damaged", f"{seal} cannot be read as a list of checksums")
    if not items:
        return RunCheck("damaged", f"{seal} lists no file")
    for name, digest in items:
        rel = Path(name)
        if rel.is_absolute() or ".." in rel.parts:
            return RunCheck("damaged", f"{seal} lists {name!r}, outside the run folder")
        try:
            now = file_digest(run_dir / rel)
        except PanelpipeError:
            return RunCheck("damaged", f"{run_dir / rel} is missing or unreadable")
        if now != digest:
            return RunCheck("damaged", f"{run_dir / rel} differs from its recorded checksum")
    return RunCheck("complete")


def refuse_damaged(folders: Mapping[str, Path | str]) -> dict[str, RunCheck]:
    """Check the run folder of every analysis; refuse if one changed after it completed.

    Returns the check of every analysis. A damaged folder is never rewritten:
    the user moves it away and the next run redoes it.
    """
    checks = {name: check_run(Path(folder)) for name, folder in folders.items()}
    for name, check in checks.items():
        if check.state == "damaged":
            folder = Path(folders[name])
            raise PanelpipeError(
                f"analysis {name!r}: the run folder {folder} was changed after it completed "
                f"({check.reason}). panelpipe never rewrites a completed run: move the folder "
                f"out of {folder.parent} to have it redone, then run again."
            )
    return checks


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
    """Point ``<analysis_dir>/latest`` at a run (a file holding its id); no write if it does."""
    latest = Path(analysis_dir) / "latest"
    with contextlib.suppress(OSError):
        if latest.read_text(encoding="utf-8") == run + "\n":
            return
    atomic_write_text(latest, run + "\n")


def publish_latest(folders: Mapping[str, Path | str]) -> dict[str, RunCheck]:
    """Point each analysis's ``latest`` at its planned run folder if that run is complete.

    ``folders`` maps analysis to the run folder of its current inputs and
    settings, so ``latest`` follows the inputs both ways: a new delivery and a
    withdrawn one. An analysis whose run is not complete keeps its ``latest``.
    """
    checks = {name: check_run(Path(folder)) for name, folder in folders.items()}
    for name, check in checks.items():
        if check.state == "complete":
            update_latest(Path(folders[name]).parent, Path(folders[name]).name)
    return checks


def seal_step(files: Sequence[str], seal_out: str) -> None:
    """Seal a run folder once every published file is written, then update ``latest``.

    Temporary files that a killed step left behind are removed first, so a
    complete folder holds nothing half-written.
    """
    seal = Path(seal_out)
    run_dir = seal.parent
    for leftover in run_dir.rglob(".*.tmp"):
        leftover.unlink(missing_ok=True)
    listed = {Path(f).relative_to(run_dir).as_posix(): file_digest(f) for f in files}
    atomic_write_text(seal, json.dumps({"files": listed}, indent=2, sort_keys=True) + "\n")
    fault_point("seal:written")
    update_latest(run_dir.parent, run_dir.name)


@contextlib.contextmanager
def _exclusive(path: Path, busy: str) -> Iterator[None]:
    """Hold an exclusive, non-blocking lock on ``path``; ``busy`` names the holder."""
    with path.open("a+", encoding="utf-8") as fh:
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            fh.seek(0)
            # replace, not format: the message holds a path, which may hold braces
            raise PanelpipeError(busy.replace("{holder}", fh.read().strip() or "unknown")) from None
        fh.seek(0)
        fh.truncate()
        fh.write(str(os.getpid()))
        fh.flush()
        try:
            yield
        finally:
            fcntl.flock(fh, fcntl.LOCK_UN)


@contextlib.contextmanager
def _folder_lock(folder: Path, name: str, busy: str, unwritable: str) -> Iterator[None]:
    """Create ``folder`` if needed and hold the exclusive lock file ``folder/name``."""
    with contextlib.ExitStack() as stack:
        try:
            folder.mkdir(parents=True, exist_ok=True)
            stack.enter_context(_exclusive(folder / name, busy))
        except OSError as exc:
            raise PanelpipeError(unwritable.replace("{reason}", str(exc.strerror))) from exc
        yield


@contextlib.contextmanager
def run_lock(output_dir: Path) -> Iterator[None]:
    """Hold an exclusive lock on an output folder for the length of a run.

    The operating system releases the lock when the process ends, however it
    ends (even SIGKILL), so a killed run never blocks the next one.
    """
    output_dir = Path(output_dir)
    if output_dir.exists() and not output_dir.is_dir():
        raise PanelpipeError(
            f"the output folder {output_dir} is a file; set output_dir to a folder "
            "(it is created if missing)."
        )
    with _folder_lock(
        output_dir,
        ".panelpipe.lock",
        f"another panelpipe run (process {{holder}}) is writing to {output_dir}; "
        "wait for it to finish, then run again.",
        f"cannot write to the output folder {output_dir} ({{reason}}); choose a writable "
        "output_dir or give the user running panelpipe write access to it.",
    ):
        yield


@contextlib.contextmanager
def workdir_lock(workdir: Path) -> Iterator[None]:
    """Hold panelpipe's lock on the folder Snakemake runs in, for a whole run.

    Snakemake keeps its own locks in ``<workdir>/.snakemake/locks``; while this
    lock is held no other panelpipe run uses that folder, whatever its output
    folder, so no other panelpipe run can remove those locks.
    """
    with _folder_lock(
        Path(workdir) / ".snakemake",
        "panelpipe-run.lock",
        f"another panelpipe run (process {{holder}}) is running in {workdir}; "
        "wait for it to finish, then run again.",
        f"cannot write to {Path(workdir) / '.snakemake'} ({{reason}}); run panelpipe from a "
        "folder the user may write to.",
    ):
        yield


def live_snakemake(workdir: Path) -> list[int]:
    """Process ids of running Snakemake processes whose working folder is ``workdir``."""
    import psutil

    target = Path(workdir).resolve()
    found = []
    for proc in psutil.process_iter(["pid", "cmdline", "status"]):
        cmdline = proc.info["cmdline"] or []
        if proc.info["status"] == psutil.STATUS_ZOMBIE or proc.info["pid"] == os.getpid():
            continue
        if not any(Path(arg).name == "snakemake" for arg in cmdline[:3]):
            continue
        with contextlib.suppress(psutil.Error, OSError):
            if Path(proc.cwd()).resolve() == target:
                found.append(proc.info["pid"])
    return found


def die_with_parent(parent: int | None = None) -> None:
    """Have the kernel kill this process when its parent dies (Linux; elsewhere nothing).

    A Snakemake whose ``panelpipe`` was killed, or a step whose Snakemake was,
    must not go on writing into a run folder that the next run redoes. If the
    parent (``parent``, or any but init when not given) is already gone, exit.
    """
    if not sys.platform.startswith("linux"):
        return
    pr_set_pdeathsig = 1  # from <linux/prctl.h>
    ctypes.CDLL(None, use_errno=True).prctl(pr_set_pdeathsig, signal.SIGKILL, 0, 0, 0)
    ppid = os.getppid()
    if ppid != parent if parent is not None else ppid == 1:
        os._exit(1)


def fault_point(name: str) -> None:
    """Test hook: pause at the point ``name`` when ``PANELPIPE_FAULT`` names it.

    The process writes its id to the file ``PANELPIPE_FAULT_MARK`` names and
    waits for SIGUSR1 (then goes on) or for a signal that ends it, so a test can
    act at exactly this point without racing the run (DEVELOPERS.md lists the
    points). SIGINT ends it as Ctrl-C ends a running step: with ``KeyboardInterrupt``.
    """
    if os.environ.get(FAULT_ENV) != name:
        return
    awaited = {signal.SIGUSR1, signal.SIGINT}
    signal.pthread_sigmask(signal.SIG_BLOCK, awaited)  # a signal sent early is kept
    mark = os.environ.get(FAULT_MARK_ENV)
    if mark:
        atomic_write_text(Path(mark), str(os.getpid()))
    got = signal.sigwait(awaited)
    signal.pthread_sigmask(signal.SIG_UNBLOCK, awaited)
    if got == signal.SIGINT:
        raise KeyboardInterrupt


def enter_step(name: str) -> None:
    """The first call of every workflow script: die with Snakemake; the fault hook."""
    die_with_parent()
    fault_point(name)
