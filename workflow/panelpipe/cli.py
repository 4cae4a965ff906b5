"""The ``panelpipe`` command: run, inspect, init, compare.

``run`` calls the Snakemake command line in a subprocess (its Python API is
thinly documented and changes between releases) and passes extra arguments
through unchanged.
"""

from __future__ import annotations

import argparse
import contextlib
import glob
import json
import os
import signal
import subprocess
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import yaml

from .config import (
    REPO_ROOT,
    WORKFLOW_ROOT,
    SourceSpec,
    analysis_settings,
    load_config,
    source_specs,
    validate_config,
)
from .findings import PanelpipeError
from .ingest import read_panel
from .progress import StepProgress
from .runs import (
    PLAN_ENV,
    die_with_parent,
    live_snakemake,
    plan_runs,
    publish_latest,
    refuse_damaged,
    run_lock,
    workdir_lock,
)
from .validate import validate_panel

__all__ = ["main"]

# Snakemake's whole output of a `panelpipe run`, in the logs/ folder of each new run.
SNAKEMAKE_LOG = "snakemake.log"


def _config_path(given: str | None) -> Path:
    """The configuration to use: ``--config``, else ``config/config.yaml`` here.

    Without ``--config`` outside a folder holding ``config/config.yaml`` the
    command refuses rather than quietly running some other configuration. The
    file used is named on standard error.
    """
    if given:
        path = Path(given).resolve()
    else:
        path = Path.cwd() / "config" / "config.yaml"
        if not path.is_file():
            demo = REPO_ROOT / "config" / "config.yaml"
            raise PanelpipeError(
                f"no --config given and {path} does not exist; pass --config FILE"
                + (f" (the demo analysis is {demo})." if demo.is_file() else ".")
            )
    sys.stderr.write(f"panelpipe: using the configuration {path}\n")
    return path


def _states(folders: dict[str, Path]) -> dict[str, str]:
    """complete / incomplete per analysis; a damaged run folder refuses the run."""
    return {name: check.state for name, check in refuse_damaged(folders).items()}


def _published(folders: dict[str, Path]) -> dict[str, str]:
    """Point ``latest`` at every complete planned run; the state of each."""
    return {name: check.state for name, check in publish_latest(folders).items()}


def _run(args: argparse.Namespace, extra: Sequence[str]) -> int:
    config_path = _config_path(args.config)
    workdir = Path.cwd()  # relative paths in the config resolve against it
    config = load_config(config_path)
    plans = plan_runs(config)
    runs = {name: plan.run_id for name, plan in plans.items()}
    out = Path(config["output_dir"])
    out = out if out.is_absolute() else workdir / out
    folders = {name: out / name / run for name, run in runs.items()}
    cmd = [
        sys.executable,
        "-m",
        "snakemake",
        "--snakefile",
        str(WORKFLOW_ROOT / "Snakefile"),
        "--directory",
        str(workdir),
        "--configfile",
        str(config_path),
        "--cores",
        str(args.cores),
        "--keep-going",
        "--rerun-incomplete",
    ]
    if args.dry_run:
        cmd.append("--dry-run")
    if "--resources" not in extra and "--executor" not in extra and "--profile" not in extra:
        # Steps declare mem_mb; on one machine keep their sum within 80% of its memory.
        import psutil

        cmd += ["--resources", f"mem_mb={int(psutil.virtual_memory().total / 2**20 * 0.8)}"]
    cmd.extend(extra)
    # Snakemake plans again when it reads the workflow; it refuses if its plan differs.
    env = {**os.environ, PLAN_ENV: json.dumps({n: p.to_dict() for n, p in plans.items()})}
    with run_lock(out), workdir_lock(workdir):
        before = _states(folders)
        if all(s == "complete" for s in before.values()) and not args.dry_run and not extra:
            # Every run folder matches its seal, and its id covers inputs, settings
            # and code: nothing can be out of date, so Snakemake is not started.
            sys.stderr.write("panelpipe: every analysis is up to date; nothing to do\n")
            code = 0
        else:
            if not args.dry_run:
                _clear_stale_snakemake_lock(workdir)
            # A complete run folder is never written to; a dry run writes nothing.
            logs = [
                folders[name] / "logs" / SNAKEMAKE_LOG
                for name, state in before.items()
                if state != "complete" and not args.dry_run
            ]
            code = _snakemake(cmd, env, logs, verbose=args.verbose or args.dry_run)
        after = before if args.dry_run else _published(folders)
    failed = False
    for name, folder in folders.items():
        done = after[name] == "complete"
        if done:
            status = "unchanged" if before[name] == "complete" else "ok"
        else:
            status = "planned" if args.dry_run else "failed"
            failed = failed or not args.dry_run
        print(
            json.dumps(
                {
                    "analysis": name,
                    "status": status,
                    "run_id": folder.name,
                    "report": str(folder / "report.html") if done else None,
                }
            ),
            flush=True,
        )
    if code != 0 or failed:
        sys.stderr.write(
            f"panelpipe: the workflow failed (Snakemake exit status {code}); the messages "
            "above name the analysis and the file at fault, and each run folder keeps its "
            f"logs/ folder (Snakemake's whole output in logs/{SNAKEMAKE_LOG}).\n"
        )
    return code or int(failed)


def _snakemake(cmd: list[str], env: dict[str, str], logs: list[Path], *, verbose: bool) -> int:
    """Run Snakemake; its whole output to ``logs``, a line per step to the terminal.

    With ``verbose`` the terminal gets Snakemake's whole output as well. On
    Ctrl-C (SIGINT to this process) Snakemake is asked to stop its steps, which
    remove what they left half-written, and ``KeyboardInterrupt`` is raised
    again once it has ended.
    """
    parent = os.getpid()
    with contextlib.ExitStack() as stack:
        files = []
        for path in logs:
            path.parent.mkdir(parents=True, exist_ok=True)
            files.append(stack.enter_context(path.open("a", encoding="utf-8")))
        progress = StepProgress(lambda line: sys.stderr.write(line + "\n"))
        proc = subprocess.Popen(
            cmd,
            env=env,
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
            text=True,
            errors="replace",
            # Its own session: a Ctrl-C at the terminal reaches this process only,
            # which passes it on once (a second would cut short Snakemake's own
            # shutdown of its steps). The kernel kills Snakemake if this
            # process dies, however it dies (each step in turn dies with
            # Snakemake): no orphan writes on.
            start_new_session=True,
            preexec_fn=lambda: die_with_parent(parent),
        )
        assert proc.stdout is not None
        try:
            for line in proc.stdout:
                for fh in files:
                    fh.write(line)
                    fh.flush()
                if verbose:
                    sys.stderr.write(line)
                else:
                    progress.feed([line])
        except KeyboardInterrupt:
            # As Ctrl-C at a terminal does: to Snakemake and its steps, which stop
            # and remove what they left unfinished. A second Ctrl-C leaves at once;
            # the kernel then kills them all (see above).
            os.killpg(proc.pid, signal.SIGINT)
            for line in proc.stdout:
                for fh in files:
                    fh.write(line)
                    fh.flush()
            proc.wait()
            raise
        code = proc.wait()
    if code != 0 and not verbose and not progress.messages:
        sys.stderr.write("panelpipe: Snakemake ended with these lines:\n")
        sys.stderr.writelines(f"  {line}\n" for line in progress.tail())
    if logs:
        where = logs[0] if len(logs) == 1 else f"logs/{SNAKEMAKE_LOG} of each new run folder"
        sys.stderr.write(f"panelpipe: Snakemake's whole output is in {where}\n")
    return code


def _clear_stale_snakemake_lock(workdir: Path) -> None:
    """Remove the lock of a Snakemake process that was killed.

    Called while panelpipe's own locks on the output folder and on ``workdir``
    are held, so no other panelpipe run works here; a lock left in
    .snakemake/locks is stale unless a Snakemake started by hand is still
    running in ``workdir``, in which case the run stops. Removing the files is
    what ``snakemake --unlock`` does, without parsing the workflow again.
    """
    locks = workdir / ".snakemake" / "locks"
    stale = [p for p in locks.iterdir() if p.is_file()] if locks.is_dir() else []
    if not stale:
        return
    live = live_snakemake(workdir)
    if live:
        raise PanelpipeError(
            f"Snakemake (process {', '.join(map(str, live))}) is running in {workdir} and holds "
            "its lock there; wait for it to finish, then run again."
        )
    sys.stderr.write("panelpipe: removing a stale Snakemake lock left by an interrupted run\n")
    for path in stale:
        path.unlink(missing_ok=True)


def _check(args: argparse.Namespace) -> int:
    """Ingest and validate every analysis without estimating: a delivery check."""
    config = load_config(_config_path(args.config))
    status = 0
    for name in config["analyses"]:
        settings = analysis_settings(config, name)
        specs = source_specs(settings.sources, settings.csv, analysis=name)
        text = list(dict.fromkeys((settings.unit, settings.period, *settings.cluster_by)))
        try:
            raw = read_panel(specs, settings.columns, text=text)
        except PanelpipeError as err:
            sys.stderr.write(f"panelpipe: analysis {name!r}: {err}\n")
            status = max(status, 2)
            continue
        result = validate_panel(raw, settings)
        stream = sys.stderr if result.status == "fail" else sys.stdout
        stream.write(f"{name}: validation {result.status}\n")
        for f in result.findings:
            if f.severity != "info" or args.verbose:
                stream.write(f"  [{f.severity}] {f.code}: {f.message}\n")
        if result.status == "fail":
            status = max(status, 1)
    return status


_READING = ("delimiter", "decimal", "thousands", "encoding", "sheet", "header_row")
"""The reading options of ``inspect`` and ``init``, named as a sources entry's keys."""


def _reading(args: argparse.Namespace) -> dict[str, Any]:
    """The reading options given on the command line, as a sources entry holds them."""
    return {key: getattr(args, key) for key in _READING if getattr(args, key) is not None}


def _source_spec(args: argparse.Namespace) -> SourceSpec:
    """The file of ``inspect``/``init`` with the options given, as ``run`` would read it."""
    return SourceSpec(Path(args.file), **_reading(args))


def _inspect(args: argparse.Namespace) -> int:
    from .survey import inspect_file, render_profile

    profile = inspect_file(_source_spec(args), unit=args.unit, period=args.period)
    print(json.dumps(profile, indent=2, default=str) if args.json else render_profile(profile))
    return 0


def _init(args: argparse.Namespace) -> int:
    from .survey import analysis_name, inspect_file

    path = Path(args.file)
    profile = inspect_file(_source_spec(args), unit=args.unit, period=args.period)
    columns = [c["name"] for c in profile["columns"]]
    if args.regressors:
        regressors = [r.strip() for r in args.regressors.split(",") if r.strip()]
    else:
        numeric = [c["name"] for c in profile["columns"] if c["numeric"]]
        regressors = [c for c in numeric if c not in {args.unit, args.period, args.outcome}]
    for col in [args.unit, args.period, args.outcome, *regressors]:
        if col not in columns:
            raise PanelpipeError(
                f"{path}: column {col!r} not found; the file has {', '.join(map(repr, columns))}."
            )
    name = analysis_name(path.stem)
    config = {
        "output_dir": "reports",
        "analyses": {
            name: {
                # Sources may be globs: a file whose name has [, * or ? is written escaped.
                # The options it was read with go with it, so that run reads it alike.
                "sources": [
                    {"path": glob.escape(str(path)), **_reading(args)}
                    if _reading(args)
                    else glob.escape(str(path))
                ],
                "unit": args.unit,
                "period": args.period,
                "outcome": args.outcome,
                "regressors": regressors,
                "period_effects": True,
                "cluster_by": [args.unit],
                "estimators": ["pooled_ols", "fixed_effects", "random_effects"],
                "inference": ["classical", "robust", "cluster"],
            }
        },
    }
    validate_config(config, origin="generated configuration")
    text = "# Written by `panelpipe init`; see config/README.md for every key.\n" + yaml.safe_dump(
        config, sort_keys=False, allow_unicode=True
    )
    if args.output:
        out = Path(args.output)
        if out.exists():
            raise PanelpipeError(f"{out} already exists; choose another --output or remove it.")
        out.write_text(text, encoding="utf-8")
        print(f"wrote {out}")
    else:
        sys.stdout.write(text)
    return 0


def _compare(args: argparse.Namespace) -> int:
    from .changes import compare_runs, render_changes

    changes = compare_runs(Path(args.run_a), Path(args.run_b))
    print(json.dumps(changes, indent=2, default=str) if args.json else render_changes(changes))
    return 0


def _reading_arguments(parser: argparse.ArgumentParser) -> None:
    """The options that say how to read the file, as a sources entry says it."""
    group = parser.add_argument_group(
        "reading the file (the keys of a 'sources' entry; see config/README.md)"
    )
    group.add_argument("--delimiter", help="CSV field separator (default ',', tab for .tsv)")
    group.add_argument("--decimal", choices=[".", ","], help="decimal mark of CSV numbers")
    group.add_argument(
        "--thousands", choices=["", ".", ",", "'", " "], help="thousands separator of CSV"
    )
    group.add_argument("--encoding", help="text encoding of a CSV file (default utf-8)")
    group.add_argument("--sheet", help="workbook sheet to read (default: the first)")
    group.add_argument(
        "--header-row",
        type=int,
        help="workbook row holding the column names (default: the first that holds anything)",
    )


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="panelpipe",
        description="Validate, estimate, compare and audit panel regressions; one report per run.",
    )
    sub = parser.add_subparsers(dest="command", required=True)
    run = sub.add_parser(
        "run",
        help="run every analysis of a config through the workflow",
        description="Extra arguments after -- go to Snakemake unchanged.",
    )
    run.add_argument("--config", help="configuration file (default: config/config.yaml)")
    run.add_argument("--cores", type=int, default=2, help="cores Snakemake may use (default 2)")
    run.add_argument("--dry-run", action="store_true", help="show what would run, run nothing")
    run.add_argument(
        "--verbose", "-v", action="store_true", help="show Snakemake's whole output as well"
    )
    chk = sub.add_parser("check", help="read and validate every analysis's data without estimating")
    chk.add_argument("--config", help="configuration file (default: config/config.yaml)")
    chk.add_argument("--verbose", "-v", action="store_true", help="also list information")
    ins = sub.add_parser("inspect", help="profile a source file as a panel")
    ins.add_argument("file")
    ins.add_argument("--unit")
    ins.add_argument("--period")
    ins.add_argument("--json", action="store_true", help="print the profile as JSON")
    _reading_arguments(ins)
    ini = sub.add_parser("init", help="write a starting config for a file")
    ini.add_argument("file")
    _reading_arguments(ini)
    ini.add_argument("--unit", required=True)
    ini.add_argument("--period", required=True)
    ini.add_argument("--outcome", required=True)
    ini.add_argument("--regressors", help="comma-separated columns (default: every other numeric)")
    ini.add_argument("--output", "-o", help="write here instead of standard output")
    cmp = sub.add_parser("compare", help="what changed between two runs")
    cmp.add_argument("run_a")
    cmp.add_argument("run_b")
    cmp.add_argument("--json", action="store_true", help="print the changes as JSON")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    extra: list[str] = []
    if "--" in argv:
        cut = argv.index("--")
        argv, extra = argv[:cut], argv[cut + 1 :]
    args = _parser().parse_args(argv)
    try:
        if args.command == "run":
            return _run(args, extra)
        if args.command == "inspect":
            return _inspect(args)
        if args.command == "check":
            return _check(args)
        if args.command == "init":
            return _init(args)
        return _compare(args)
    except PanelpipeError as err:
        sys.stderr.write(f"panelpipe: {err}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write(
            "\npanelpipe: interrupted; the running steps were stopped, nothing half-written "
            "was kept and `latest` was not moved to an unfinished run; run the same command "
            "again to finish.\n"
        )
        return 130


if __name__ == "__main__":
    raise SystemExit(main())
