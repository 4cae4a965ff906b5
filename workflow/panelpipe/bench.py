r"""Benchmark: the full default pipeline against a bare script, on simulated panels.

``python -m panelpipe.bench`` answers two questions on the machine it runs on:
what the whole pipeline costs compared with the least a hand-written analysis
must do, and how that cost grows with the number of rows.

It writes a seeded N x T panel as Parquet into a work folder, with a panelpipe
configuration that leaves ``estimators`` and ``inference`` out (so the
package's defaults apply), sets ``period_effects: true`` and clusters by the
unit. Then, in one run, it measures

* the full pipeline, ``python -m panelpipe run --config FILE --cores 2``, as a
  subprocess: wall time and peak memory;
* a no-change rerun of the same command (wall time; nothing should be redone);
* a bare script, written into the work folder and run the same way, that only
  reads the same Parquet file with pandas and fits pooled OLS (constant and
  period dummies), two-way fixed effects and random effects (constant and
  period dummies) with standard errors clustered by unit, through linearmodels;
* the wild cluster bootstrap alone (`panelpipe.bootstrap.wild_cluster_bootstrap`,
  9,999 draws, 50 clusters), in-process, on as many rows and regressors as the
  panel;
* a sweep over the number of units (both sides at each size), with the slope of
  log seconds on log rows (1 means cost proportional to rows) and a straight-line
  fit of seconds on rows (fixed overhead plus seconds per million rows).

Peak memory is measured from outside: every ``POLL_SECONDS`` the benchmark lists
the process tree of the command (the process and all its live descendants) with
psutil and sums their resident set sizes; the peak is the largest such sum. The
largest single process is reported too, as the larger of the polled figure and
the kernel's own high-water mark (``ru_maxrss`` of the reaped process, which on
Linux covers every descendant it waited for), so a spike shorter than one poll
is still seen there. A page shared by several processes counts in each of them,
so the tree sum is an upper bound on the memory the tree needs at that moment.
The polls also keep each kind of process's own peak (a Snakemake step by its
rule name), and the kernel's account of the reaped tree gives its CPU seconds,
which other work on the machine hardly changes, unlike the wall time.

The run id of a pipeline run hashes the package code, so an edit to the code
between the first run and the rerun makes the rerun a new run; the rerun is
then repeated once, and the report says so. The code measured (commit, edits,
run-id fingerprint) and the machine's load average are recorded.

The same figures are written as JSON with ``--json FILE``; each run folder's
``benchmarks/*.tsv`` (Snakemake's per-step timings and memory) is read back and
reported as the profile of the pipeline's steps, at the main size and at each
size of the sweep.

Notes
-----
For unit :math:`i = 1..N` and period :math:`t = 1..T`, with :math:`K` regressors:

.. math::

    \alpha_i &\sim N(0, 1), \quad \lambda_t \sim N(0, 0.5^2) \\
    x_{1,it} &= 0.8\,\alpha_i + 0.05\,t + N(0, 1) \\
    x_{k,it} &= 0.5\,w_{k,i} + N(0, 1), \quad w_{k,i} \sim N(0, 1), \quad k = 2..K \\
    e_{it} &= 0.5\, e_{i,t-1} + N(0, 1), \quad e_{i1} \sim N(0, 1/(1 - 0.5^2)) \\
    y_{it} &= 1 + \sum_k \beta_k x_{k,it} + \alpha_i + \lambda_t + e_{it},
        \quad \beta_k = (-1)^{k-1} / k

so pooled OLS and random effects are biased for :math:`\beta_1` while fixed
effects are not, and the errors are serially correlated within a unit (which is
why the standard errors are clustered by unit). Unit ids are text
(``"u000001"``), periods are integer years from 2001.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import math
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import psutil
import yaml

from .bootstrap import wild_cluster_bootstrap

__all__ = [
    "BARE_SCRIPT",
    "DEFAULT_PERIODS",
    "DEFAULT_REGRESSORS",
    "DEFAULT_SEED",
    "DEFAULT_SWEEP",
    "DEFAULT_UNITS",
    "TARGETS",
    "CaseResult",
    "Measurement",
    "format_report",
    "main",
    "measure",
    "process_label",
    "read_step_profile",
    "run_bare",
    "run_benchmark",
    "run_pipeline",
    "simulate_panel",
    "sweep_fit",
    "time_bootstrap",
    "write_bare_script",
    "write_config",
    "write_panel",
]

DEFAULT_UNITS = 100_000
DEFAULT_PERIODS = 10
DEFAULT_REGRESSORS = 10
DEFAULT_SWEEP = (10_000, 30_000, 100_000)
DEFAULT_SEED = 20260301
DEFAULT_CORES = 2
FIRST_PERIOD = 2001
POLL_SECONDS = 0.05
BOOTSTRAP_DRAWS = 9999
BOOTSTRAP_CLUSTERS = 50
ANALYSIS = "bench"
_MIB = float(1 << 20)
_AR = 0.5

TARGETS: dict[str, float] = {
    "wall_ratio": 1.0,
    "peak_ratio": 1.0,
    "rerun_s": 3.0,
    "bootstrap_s": 5.0,
}
"""Targets on a 2-core, 24 GiB machine at 1,000,000 rows (upper bounds)."""

BARE_SCRIPT = '''\
"""Bare comparison: read the Parquet panel and fit three estimators, clustered by unit.

Usage: python bare.py PANEL.parquet N_REGRESSORS
Prints one JSON line with the x1 estimate and standard error of each estimator.
"""

import json
import sys

import pandas as pd
from linearmodels.panel import PanelOLS, PooledOLS, RandomEffects

path, n_regressors = sys.argv[1], int(sys.argv[2])
regressors = [f"x{k}" for k in range(1, n_regressors + 1)]
frame = pd.read_parquet(path).set_index(["unit", "period"])
y = frame["y"]
x = frame[regressors]
dummies = pd.get_dummies(
    frame.index.get_level_values("period"), prefix="p", drop_first=True, dtype=float
)
dummies.index = frame.index
exog = pd.concat([x, dummies], axis=1)
exog.insert(0, "const", 1.0)
fits = {
    "pooled_ols": PooledOLS(y, exog).fit(cov_type="clustered", cluster_entity=True),
    "fixed_effects": PanelOLS(y, x, entity_effects=True, time_effects=True).fit(
        cov_type="clustered", cluster_entity=True
    ),
    "random_effects": RandomEffects(y, exog).fit(cov_type="clustered", cluster_entity=True),
}
print(
    json.dumps(
        {
            name: {"x1": float(res.params["x1"]), "se": float(res.std_errors["x1"])}
            for name, res in fits.items()
        }
    )
)
'''
"""The bare script, written into the work folder and run as a subprocess."""


# --------------------------------------------------------------------------- data


def slopes(n_regressors: int) -> np.ndarray:
    """True slopes of the simulation, :math:`\\beta_k = (-1)^{k-1}/k`."""
    k = np.arange(1, n_regressors + 1, dtype=float)
    out: np.ndarray = np.where(k % 2 == 1, 1.0, -1.0) / k
    return out


def simulate_panel(
    n_units: int, n_periods: int, n_regressors: int, seed: int = DEFAULT_SEED
) -> pd.DataFrame:
    """Simulate a balanced panel (see the module notes for the model).

    Parameters
    ----------
    n_units, n_periods
        Units N and periods T; the panel has N x T rows, sorted by unit, then period.
    n_regressors
        Number of regressors K (columns ``x1`` .. ``xK``).
    seed
        Seed of ``numpy.random.default_rng``; the same arguments give the same panel.

    Returns
    -------
    pandas.DataFrame
        Columns ``unit`` (text), ``period`` (int64), ``y`` and ``x1`` .. ``xK``.
    """
    if n_units < 2 or n_periods < 2 or n_regressors < 1:
        raise ValueError("need at least 2 units, 2 periods and 1 regressor")
    rng = np.random.default_rng(seed)
    n_rows = n_units * n_periods
    shape = (n_units, n_periods)
    alpha = rng.normal(size=n_units)[:, None]
    lam = rng.normal(scale=0.5, size=n_periods)[None, :]
    t = np.arange(1, n_periods + 1, dtype=float)[None, :]
    beta = slopes(n_regressors)
    y = 1.0 + alpha + lam
    columns: dict[str, Any] = {}
    for k in range(1, n_regressors + 1):
        if k == 1:
            xk = 0.8 * alpha + 0.05 * t + rng.normal(size=shape)
        else:
            xk = 0.5 * rng.normal(size=n_units)[:, None] + rng.normal(size=shape)
        y = y + beta[k - 1] * xk
        columns[f"x{k}"] = xk.reshape(n_rows)
    shocks = rng.normal(size=shape)
    e = np.empty(shape)
    e[:, 0] = shocks[:, 0] / math.sqrt(1.0 - _AR**2)
    for j in range(1, n_periods):
        e[:, j] = _AR * e[:, j - 1] + shocks[:, j]
    y = y + e
    width = len(str(n_units))
    ids = pd.array([f"u{i:0{width}d}" for i in range(1, n_units + 1)], dtype="string")
    frame = pd.DataFrame(
        {
            "unit": ids.take(np.repeat(np.arange(n_units), n_periods)),
            "period": np.tile(np.arange(FIRST_PERIOD, FIRST_PERIOD + n_periods), n_units),
            "y": y.reshape(n_rows),
            **columns,
        }
    )
    return frame


def write_panel(frame: pd.DataFrame, path: Path) -> Path:
    """Write a simulated panel as Parquet (no index) and return the path."""
    path.parent.mkdir(parents=True, exist_ok=True)
    frame.to_parquet(path, index=False)
    return path


def write_config(folder: Path, panel: Path, n_regressors: int) -> Path:
    """Write a panelpipe configuration for one simulated panel.

    ``estimators`` and ``inference`` are left out, so the package's defaults
    apply; ``period_effects`` is true and ``cluster_by`` is the unit. Runs land
    in ``folder/out``.

    Returns
    -------
    pathlib.Path
        ``folder/panelpipe.yaml``.
    """
    config = {
        "output_dir": "out",
        "analyses": {
            ANALYSIS: {
                "sources": [str(panel.resolve())],
                "unit": "unit",
                "period": "period",
                "outcome": "y",
                "regressors": [f"x{k}" for k in range(1, n_regressors + 1)],
                "period_effects": True,
                "cluster_by": ["unit"],
            }
        },
    }
    path = folder / "panelpipe.yaml"
    path.write_text(yaml.safe_dump(config, sort_keys=False), encoding="utf-8")
    return path


def write_bare_script(folder: Path) -> Path:
    """Write `BARE_SCRIPT` to ``folder/bare.py`` and return the path."""
    path = folder / "bare.py"
    path.write_text(BARE_SCRIPT, encoding="utf-8")
    return path


# ---------------------------------------------------------------------- measuring


@dataclass(frozen=True)
class Measurement:
    """Wall time and peak memory of one command.

    Parameters
    ----------
    wall_s
        Seconds from start to exit.
    peak_mib
        Largest sum, over the polls, of the resident memory of every live process
        in the command's tree (MiB).
    peak_single_mib
        Largest resident memory of any one process of the tree (MiB): the larger of
        the polled figure and the kernel's high-water mark for the reaped tree.
    cpu_s
        CPU seconds (user and system) of the whole tree, from the kernel's account of
        the reaped process and every descendant it waited for; unlike the wall time
        it hardly moves when other work shares the machine.
    polls
        Number of polls of the process tree.
    processes
        Largest polled resident memory (MiB) of each kind of process in the tree:
        a Snakemake step by its rule (``estimate``, ``compare``, ...), otherwise the
        module or script run (``panelpipe``, ``snakemake``, ``bare.py``).
    returncode
        Exit status of the command.
    stdout
        Path of the file holding the command's standard output.
    stderr
        Path of the file holding its standard error.
    """

    wall_s: float
    peak_mib: float
    peak_single_mib: float
    cpu_s: float
    polls: int
    returncode: int
    stdout: str
    stderr: str
    processes: dict[str, float] = field(default_factory=dict)


def process_label(cmdline: Sequence[str]) -> str | None:
    """A short name for a process of the measured tree, from its command line.

    A Snakemake script (``.snakemake/scripts/tmpXXXX.estimate.py``) is named by
    its rule, ``python -m MODULE`` by the module, ``python FILE.py`` by the file.
    None for an empty command line (a process that has exited but not been
    reaped, or one caught inside exec): there is no name to read.
    """
    args = list(cmdline)
    if not args:
        return None
    for arg in args[1:]:
        name = Path(arg).name
        if "/.snakemake/scripts/" in arg and name.endswith(".py"):
            parts = name.split(".")
            return parts[-2] if len(parts) >= 3 else name
    if "-m" in args[:-1]:
        return args[args.index("-m") + 1]
    for arg in args[1:]:
        if arg.endswith(".py"):
            return Path(arg).name
    return Path(args[0]).name


def _tree_rss(root: psutil.Process, root_label: str, peaks: dict[str, int]) -> tuple[int, int]:
    """Sum and maximum of the resident sizes of ``root`` and its live descendants.

    ``peaks`` is updated with the largest size seen per label. The root is named
    ``root_label``, from the command the benchmark started, since a poll can
    catch it before its command line is readable. A descendant is named from its
    command line on every poll: one seen between fork and exec still shows its
    parent's, and one whose command line is empty (caught in exec or exiting)
    is counted in the sums but under no name.
    """
    try:
        procs = [root, *root.children(recursive=True)]
    except psutil.Error:
        return 0, 0
    total = largest = 0
    for proc in procs:
        try:
            rss = int(proc.memory_info().rss)
            label = root_label if proc.pid == root.pid else process_label(proc.cmdline())
        except psutil.Error:  # gone between the listing and the reading
            continue
        total += rss
        largest = max(largest, rss)
        if label is not None:
            peaks[label] = max(peaks.get(label, 0), rss)
    return total, largest


def _kill_tree(pid: int) -> None:
    """Kill a process this module started and every descendant still alive."""
    try:
        root = psutil.Process(pid)
        procs = [*root.children(recursive=True), root]
    except psutil.Error:
        return
    for proc in procs:
        with contextlib.suppress(psutil.Error):
            proc.kill()
    psutil.wait_procs(procs, timeout=10)


def measure(
    cmd: Sequence[str],
    cwd: Path,
    *,
    label: str,
    interval: float = POLL_SECONDS,
    timeout: float | None = None,
) -> Measurement:
    """Run a command and measure its wall time and peak memory.

    Parameters
    ----------
    cmd
        The command and its arguments.
    cwd
        Folder to run it in; its output goes to ``cwd/logs/<label>.out`` and ``.err``.
    label
        Name of the log files.
    interval
        Seconds between polls of the process tree.
    timeout
        Seconds after which the tree is killed and `TimeoutError` raised.

    Returns
    -------
    Measurement
        Figures of the run (the command's exit status is recorded, not checked).
    """
    logs = cwd / "logs"
    logs.mkdir(parents=True, exist_ok=True)
    out_path, err_path = logs / f"{label}.out", logs / f"{label}.err"
    peak = peak_single = polls = 0
    root_label = process_label(cmd) or label
    per_label: dict[str, int] = {}
    status: int | None = None
    rusage_maxrss_kib = 0
    cpu = 0.0
    wall = 0.0
    with out_path.open("wb") as out, err_path.open("wb") as err:
        start = time.perf_counter()
        proc = subprocess.Popen(list(cmd), cwd=cwd, stdout=out, stderr=err)
        try:
            root = psutil.Process(proc.pid)
            while True:
                pid, raw, usage = os.wait4(proc.pid, os.WNOHANG)
                if pid == proc.pid:
                    wall = time.perf_counter() - start
                    status = os.waitstatus_to_exitcode(raw)
                    rusage_maxrss_kib = int(usage.ru_maxrss)
                    cpu = float(usage.ru_utime + usage.ru_stime)
                    break
                total, largest = _tree_rss(root, root_label, per_label)
                polls += 1
                peak, peak_single = max(peak, total), max(peak_single, largest)
                if timeout is not None and time.perf_counter() - start > timeout:
                    raise TimeoutError(f"{label}: no exit after {timeout:.0f} s")
                time.sleep(interval)
        finally:
            if status is None:
                _kill_tree(proc.pid)
                with contextlib.suppress(ChildProcessError):
                    os.waitpid(proc.pid, 0)
            proc.returncode = -1 if status is None else status  # reaped here, not by Popen
    single = max(peak_single / _MIB, rusage_maxrss_kib / 1024.0)  # ru_maxrss is in KiB
    return Measurement(
        wall_s=wall,
        peak_mib=max(peak / _MIB, single if polls == 0 else 0.0),
        peak_single_mib=single,
        cpu_s=cpu,
        polls=polls,
        returncode=int(status),
        stdout=str(out_path),
        stderr=str(err_path),
        processes={k: v / _MIB for k, v in sorted(per_label.items())},
    )


def _tail(path: str, lines: int = 30) -> str:
    text = Path(path).read_text(encoding="utf-8", errors="replace").splitlines()
    return "\n".join(text[-lines:])


@dataclass(frozen=True)
class PipelineRun:
    """One ``panelpipe run``: its measurement, status and run folder."""

    measurement: Measurement
    status: str
    run_folder: str


def run_pipeline(config: Path, cwd: Path, *, label: str, cores: int = DEFAULT_CORES) -> PipelineRun:
    """Run ``python -m panelpipe run --config CONFIG --cores CORES`` and measure it.

    Raises
    ------
    RuntimeError
        If the run fails, with the end of its error output and the log folder.
    """
    cmd = [
        sys.executable,
        "-m",
        "panelpipe",
        "run",
        "--config",
        str(config),
        "--cores",
        str(cores),
    ]
    m = measure(cmd, cwd, label=label)
    lines = [ln for ln in Path(m.stdout).read_text(encoding="utf-8").splitlines() if ln.strip()]
    status, folder = "failed", ""
    for line in lines:
        with contextlib.suppress(ValueError):
            doc = json.loads(line)
            if isinstance(doc, dict) and doc.get("analysis") == ANALYSIS:
                status = str(doc.get("status"))
                folder = str(cwd / "out" / ANALYSIS / str(doc.get("run_id")))
    if m.returncode != 0 or status not in {"ok", "unchanged"}:
        raise RuntimeError(
            f"panelpipe run failed (exit status {m.returncode}, status {status!r}); "
            f"logs in {cwd / 'logs'} and the run folder's logs/:\n{_tail(m.stderr)}"
        )
    return PipelineRun(measurement=m, status=status, run_folder=folder)


def run_bare(script: Path, panel: Path, n_regressors: int, cwd: Path, *, label: str) -> Measurement:
    """Run the bare script on a panel and measure it.

    Raises
    ------
    RuntimeError
        If the script fails, with the end of its error output.
    """
    cmd = [sys.executable, str(script), str(panel), str(n_regressors)]
    m = measure(cmd, cwd, label=label)
    if m.returncode != 0:
        raise RuntimeError(f"bare script failed (exit status {m.returncode}):\n{_tail(m.stderr)}")
    return m


def read_step_profile(run_folder: Path) -> dict[str, dict[str, float]]:
    """Snakemake's per-step figures from a run folder's ``benchmarks/*.tsv``.

    Returns
    -------
    dict
        ``{step: {column: value}}`` for every numeric column (``s``, ``max_rss``,
        ``max_uss``, ``cpu_time``, ... ; memory in MB as Snakemake writes it), steps
        in file-name order; empty when the folder has no benchmarks.
    """
    profile: dict[str, dict[str, float]] = {}
    for tsv in sorted((run_folder / "benchmarks").glob("*.tsv")):
        try:
            row = pd.read_csv(tsv, sep="\t").iloc[0]
        except (OSError, ValueError, IndexError):
            continue
        figures: dict[str, float] = {}
        for key, value in row.items():
            number = pd.to_numeric(value, errors="coerce")
            if isinstance(number, (int, float, np.number)) and math.isfinite(float(number)):
                figures[str(key)] = float(number)
        profile[tsv.stem] = figures
    return profile


def time_bootstrap(
    n_rows: int,
    n_regressors: int,
    *,
    clusters: int = BOOTSTRAP_CLUSTERS,
    draws: int = BOOTSTRAP_DRAWS,
    seed: int = DEFAULT_SEED,
) -> dict[str, Any]:
    """Time `wild_cluster_bootstrap` alone, in this process.

    The data (``n_rows`` x ``n_regressors`` standard normal regressors, clusters
    of equal size with a shared error component) are made before the clock
    starts; the clock covers one call testing the first coefficient.

    Returns
    -------
    dict
        ``wall_s``, ``rows``, ``regressors``, ``clusters``, ``draws`` and the
        bootstrap p-value (a check that the call did its work).
    """
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n_rows, n_regressors))
    groups = np.arange(n_rows) * clusters // n_rows
    y = X @ slopes(n_regressors) + rng.normal(size=clusters)[groups] + rng.normal(size=n_rows)
    start = time.perf_counter()
    result = wild_cluster_bootstrap(y, X, groups, term_index=0, term="x1", draws=draws, seed=seed)
    wall = time.perf_counter() - start
    return {
        "wall_s": wall,
        "rows": n_rows,
        "regressors": n_regressors,
        "clusters": clusters,
        "draws": draws,
        "p_value": result.p_value,
    }


# -------------------------------------------------------------------------- cases


@dataclass(frozen=True)
class CaseResult:
    """Both sides of the benchmark on one panel size.

    Parameters
    ----------
    units, periods, regressors, rows
        Size of the panel.
    pipeline
        The full pipeline's first run.
    bare
        The bare script.
    rerun
        The no-change rerun of the pipeline, when it was measured.
    rerun_status
        What ``panelpipe run`` reported for the rerun (``unchanged`` when nothing was redone).
    rerun_retried
        Whether the first rerun redid work (the code changed in between, or the
        rerun is not a no-op) and was followed by a second one, which is reported.
    run_folder
        The pipeline's run folder (holds ``benchmarks/*.tsv``).
    bare_estimates
        The bare script's x1 estimate and standard error per estimator (what it printed).
    steps
        Snakemake's per-step figures of the first pipeline run (`read_step_profile`).
    """

    units: int
    periods: int
    regressors: int
    rows: int
    pipeline: Measurement
    bare: Measurement
    rerun: Measurement | None = None
    rerun_status: str = ""
    rerun_retried: bool = False
    run_folder: str = ""
    bare_estimates: dict[str, Any] = field(default_factory=dict)
    steps: dict[str, dict[str, float]] = field(default_factory=dict)

    @property
    def wall_ratio(self) -> float:
        """Pipeline wall time over the bare script's."""
        return self.pipeline.wall_s / self.bare.wall_s

    @property
    def peak_ratio(self) -> float:
        """Pipeline peak memory (tree sum) over the bare script's."""
        return self.pipeline.peak_mib / self.bare.peak_mib


def bench_case(
    folder: Path,
    *,
    units: int,
    periods: int,
    regressors: int,
    seed: int = DEFAULT_SEED,
    rerun: bool = False,
    cores: int = DEFAULT_CORES,
    log: Any = None,
) -> CaseResult:
    """Simulate one panel in ``folder`` and measure the pipeline and the bare script on it."""
    say = log or (lambda _msg: None)
    folder.mkdir(parents=True, exist_ok=True)
    rows = units * periods
    say(f"simulating {units:,} units x {periods} periods ({rows:,} rows), {regressors} regressors")
    panel = write_panel(
        simulate_panel(units, periods, regressors, seed=seed), folder / "panel.parquet"
    )
    config = write_config(folder, panel, regressors)
    script = write_bare_script(folder)
    say("  full pipeline ...")
    first = run_pipeline(config, folder, label="pipeline", cores=cores)
    say(f"  full pipeline: {first.measurement.wall_s:.1f} s ({first.status})")
    again: PipelineRun | None = None
    retried = False
    if rerun:
        again = run_pipeline(config, folder, label="rerun", cores=cores)
        say(f"  no-change rerun: {again.measurement.wall_s:.1f} s ({again.status})")
        if again.status != "unchanged":
            # The run id hashes the package code: an edit to it between the two runs
            # gives a new run. A second rerun tells that apart from a rerun that
            # always redoes its work.
            retried = True
            again = run_pipeline(config, folder, label="rerun2", cores=cores)
            say(f"  no-change rerun, again: {again.measurement.wall_s:.1f} s ({again.status})")
    say("  bare script ...")
    bare = run_bare(script, panel, regressors, folder, label="bare")
    say(f"  bare script: {bare.wall_s:.1f} s")
    estimates: dict[str, Any] = {}
    with contextlib.suppress(ValueError, IndexError):
        estimates = json.loads(Path(bare.stdout).read_text(encoding="utf-8").splitlines()[-1])
    return CaseResult(
        units=units,
        periods=periods,
        regressors=regressors,
        rows=rows,
        pipeline=first.measurement,
        bare=bare,
        rerun=again.measurement if again else None,
        rerun_status=again.status if again else "",
        rerun_retried=retried,
        run_folder=first.run_folder,
        bare_estimates=estimates,
        steps=read_step_profile(Path(first.run_folder)),
    )


def _slope(x: Sequence[float] | np.ndarray, y: Sequence[float] | np.ndarray) -> tuple[float, float]:
    """Least-squares intercept and slope of y on x."""
    slope, intercept = np.polyfit(np.asarray(x, float), np.asarray(y, float), 1)
    return float(intercept), float(slope)


def sweep_fit(cases: Sequence[CaseResult]) -> dict[str, dict[str, float]]:
    """How cost grows with rows across a sweep, for each side.

    Returns
    -------
    dict
        For ``pipeline`` and ``bare``: ``loglog_slope_s`` (slope of log seconds on
        log rows; 1 is proportional to rows, below 1 means a fixed overhead still
        weighs), ``loglog_slope_mib`` and ``loglog_slope_cpu`` (the same for peak
        memory and CPU seconds), ``fixed_s`` and
        ``s_per_million_rows`` (straight line of seconds on rows). Empty with fewer
        than two distinct sizes.
    """
    if len({c.rows for c in cases}) < 2:
        return {}
    rows = [float(c.rows) for c in cases]
    out: dict[str, dict[str, float]] = {}
    for side in ("pipeline", "bare"):
        ms: list[Measurement] = [getattr(c, side) for c in cases]
        secs = [m.wall_s for m in ms]
        fixed, per_row = _slope(rows, secs)
        out[side] = {
            "loglog_slope_s": _slope(np.log(rows), np.log(secs))[1],
            "loglog_slope_mib": _slope(np.log(rows), np.log([m.peak_mib for m in ms]))[1],
            "loglog_slope_cpu": _slope(np.log(rows), np.log([m.cpu_s for m in ms]))[1],
            "fixed_s": fixed,
            "s_per_million_rows": per_row * 1e6,
        }
    return out


def _measurement_doc(m: Measurement) -> dict[str, Any]:
    doc = asdict(m)
    for key in ("stdout", "stderr"):
        doc.pop(key)
    return doc


def _case_doc(case: CaseResult) -> dict[str, Any]:
    per_m = 1e6 / case.rows
    return {
        "units": case.units,
        "periods": case.periods,
        "regressors": case.regressors,
        "rows": case.rows,
        "pipeline": {
            **_measurement_doc(case.pipeline),
            "s_per_million_rows": case.pipeline.wall_s * per_m,
        },
        "bare": {**_measurement_doc(case.bare), "s_per_million_rows": case.bare.wall_s * per_m},
        "wall_ratio": case.wall_ratio,
        "peak_ratio": case.peak_ratio,
        "peak_single_ratio": case.pipeline.peak_single_mib / case.bare.peak_single_mib,
        "cpu_ratio": case.pipeline.cpu_s / case.bare.cpu_s,
        "steps": case.steps,
    }


def _machine() -> dict[str, Any]:
    from importlib import metadata

    versions = {}
    for pkg in ("panelpipe", "snakemake", "linearmodels", "pandas", "numpy", "pyarrow"):
        try:
            versions[pkg] = metadata.version(pkg)
        except metadata.PackageNotFoundError:
            versions[pkg] = "not installed"
    return {
        "code": _code_version(),
        "cpus": os.cpu_count() or 0,
        "memory_gib": psutil.virtual_memory().total / float(1 << 30),
        "python": platform.python_version(),
        "platform": platform.platform(),
        "versions": versions,
    }


def _code_version() -> dict[str, Any]:
    """The code measured: the run-id fingerprint of the package, the commit and edits."""
    from .config import REPO_ROOT
    from .runs import code_fingerprint

    doc: dict[str, Any] = {"root": str(REPO_ROOT), "fingerprint": code_fingerprint()}
    git = shutil.which("git")
    if git is not None:
        for key, args in (("commit", ["rev-parse", "HEAD"]), ("edited", ["status", "--short"])):
            with contextlib.suppress(OSError, subprocess.SubprocessError):
                res = subprocess.run(
                    [git, "-C", str(REPO_ROOT), *args], capture_output=True, text=True, timeout=30
                )
                if res.returncode == 0:
                    doc[key] = res.stdout.split("\n") if key == "edited" else res.stdout.strip()
        if isinstance(doc.get("edited"), list):
            doc["edited"] = [line.strip() for line in doc["edited"] if line.strip()]
    return doc


@contextlib.contextmanager
def _work_folder(keep: Path | None) -> Iterator[Path]:
    if keep is not None:
        keep.mkdir(parents=True, exist_ok=True)
        yield keep.resolve()
        return
    folder = Path(tempfile.mkdtemp(prefix="panelpipe-bench-"))
    try:
        yield folder
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def run_benchmark(
    *,
    units: int = DEFAULT_UNITS,
    periods: int = DEFAULT_PERIODS,
    regressors: int = DEFAULT_REGRESSORS,
    sweep: Sequence[int] = DEFAULT_SWEEP,
    keep: Path | None = None,
    seed: int = DEFAULT_SEED,
    cores: int = DEFAULT_CORES,
    log: Any = None,
) -> dict[str, Any]:
    """Run the whole benchmark and return its figures.

    Parameters
    ----------
    units, periods, regressors
        Size of the main panel.
    sweep
        Unit counts of the sweep (each at ``periods`` periods); a count equal to
        ``units`` reuses the main measurement. Empty: no sweep.
    keep
        Folder to work in and keep; ``None`` works in a temporary folder that is
        removed afterwards.
    seed
        Seed of the simulations and of the bootstrap.
    cores
        ``--cores`` passed to ``panelpipe run``.
    log
        Called with one line of progress at a time (e.g. ``print``); ``None`` is quiet.

    Returns
    -------
    dict
        ``machine``, ``size``, ``pipeline``, ``bare``, ``ratios``, ``rerun``,
        ``bootstrap``, ``profile`` (per pipeline step), ``bare_estimates``, ``sweep``
        (one entry per size), ``sweep_fit``, ``targets``, ``work_folder`` and
        ``code_changed_during_run``; the document ``--json`` writes.
    """
    say = log or (lambda _msg: None)
    load_before = os.getloadavg()[0]
    code_before = _code_version()["fingerprint"]
    with _work_folder(keep) as work:
        main_case = bench_case(
            work / f"n{units}",
            units=units,
            periods=periods,
            regressors=regressors,
            seed=seed,
            rerun=True,
            cores=cores,
            log=say,
        )
        say(f"wild bootstrap alone: {main_case.rows:,} rows x {regressors} regressors ...")
        boot = time_bootstrap(main_case.rows, regressors, seed=seed)
        say(f"  wild bootstrap: {boot['wall_s']:.2f} s")
        cases: list[CaseResult] = []
        for n in sorted(set(sweep)):
            if n == units:
                cases.append(main_case)
                continue
            cases.append(
                bench_case(
                    work / f"n{n}",
                    units=n,
                    periods=periods,
                    regressors=regressors,
                    seed=seed,
                    cores=cores,
                    log=say,
                )
            )
    main_doc = _case_doc(main_case)
    assert main_case.rerun is not None
    return {
        "code_changed_during_run": _code_version()["fingerprint"] != code_before,
        "machine": {
            **_machine(),
            "load_1min_before": load_before,
            "load_1min_after": os.getloadavg()[0],
        },
        "size": {
            "units": units,
            "periods": periods,
            "regressors": regressors,
            "rows": main_case.rows,
            "seed": seed,
            "cores": cores,
        },
        "pipeline": main_doc["pipeline"],
        "bare": main_doc["bare"],
        "ratios": {
            "wall": main_case.wall_ratio,
            "peak": main_case.peak_ratio,
            "peak_single": main_doc["peak_single_ratio"],
            "cpu": main_doc["cpu_ratio"],
        },
        "rerun": {
            **_measurement_doc(main_case.rerun),
            "status": main_case.rerun_status,
            "retried": main_case.rerun_retried,
        },
        "bootstrap": boot,
        "profile": main_case.steps,
        "bare_estimates": main_case.bare_estimates,
        "sweep": [_case_doc(c) for c in cases],
        "sweep_fit": sweep_fit(cases),
        "targets": dict(TARGETS),
        "work_folder": str(keep.resolve()) if keep is not None else None,
    }


# ------------------------------------------------------------------------- report


def _table(header: Sequence[str], rows: Sequence[Sequence[str]]) -> list[str]:
    widths = [max(len(str(r[i])) for r in [header, *rows]) for i in range(len(header))]
    fmt = [lambda s, w=w, i=i: s.ljust(w) if i == 0 else s.rjust(w) for i, w in enumerate(widths)]
    out = ["  ".join(f(str(c)) for f, c in zip(fmt, header, strict=True))]
    out.append("  ".join("-" * w for w in widths))
    out.extend("  ".join(f(str(c)) for f, c in zip(fmt, r, strict=True)) for r in rows)
    return out


def _sweep_steps(sweep: Sequence[Mapping[str, Any]]) -> list[str]:
    """Seconds, CPU seconds and max_rss of each pipeline step at each sweep size."""
    steps = sorted({step for c in sweep for step in c.get("steps", {})})
    if not steps:
        return []
    rows = []
    for step in steps:
        row = [step]
        for c in sweep:
            f = c.get("steps", {}).get(step, {})
            row.append(
                f"{f.get('s', math.nan):.1f} / {f.get('cpu_time', math.nan):.1f} / "
                f"{f.get('max_rss', math.nan):.0f}"
            )
        rows.append(row)
    header = ["step: s / CPU s / max_rss MB", *(f"{c['rows']:,} rows" for c in sweep)]
    return [
        "",
        "pipeline steps across the sweep (Snakemake benchmarks/*.tsv):",
        *_table(header, rows),
    ]


def _describe_code(code: Mapping[str, Any]) -> str:
    commit = str(code.get("commit", "unknown"))[:10]
    edited = code.get("edited")
    edits = f" with {len(edited)} uncommitted changes" if edited else ""
    return f"{code['root']} at {commit}{edits}, run-id code fingerprint {code['fingerprint'][:12]}"


def _verdict(value: float, limit: float) -> str:
    return "met" if value <= limit else "NOT met"


def format_report(doc: Mapping[str, Any]) -> str:
    """The benchmark's figures as a plain-text table (what ``main`` prints)."""
    size, machine = doc["size"], doc["machine"]
    pipe, bare, ratios, rerun, boot = (
        doc["pipeline"],
        doc["bare"],
        doc["ratios"],
        doc["rerun"],
        doc["bootstrap"],
    )
    lines = [
        f"panelpipe benchmark: {size['rows']:,} rows ({size['units']:,} units x "
        f"{size['periods']} periods), {size['regressors']} regressors, seed {size['seed']}",
        f"machine: {machine['cpus']} CPUs, {machine['memory_gib']:.1f} GiB, Python "
        f"{machine['python']}; panelpipe run --cores {size['cores']}, default estimators "
        "and inference",
        f"code: {_describe_code(machine['code'])}",
        f"1-minute load average before {machine['load_1min_before']:.1f}, after "
        f"{machine['load_1min_after']:.1f} (other work on the machine inflates wall times)",
        "",
    ]
    lines += _table(
        ["", "wall s", "CPU s", "peak MiB (tree)", "peak MiB (1 process)"],
        [
            [
                "full pipeline",
                f"{pipe['wall_s']:.2f}",
                f"{pipe['cpu_s']:.2f}",
                f"{pipe['peak_mib']:.0f}",
                f"{pipe['peak_single_mib']:.0f}",
            ],
            [
                "bare script",
                f"{bare['wall_s']:.2f}",
                f"{bare['cpu_s']:.2f}",
                f"{bare['peak_mib']:.0f}",
                f"{bare['peak_single_mib']:.0f}",
            ],
            [
                "pipeline / bare",
                f"{ratios['wall']:.2f}",
                f"{ratios['cpu']:.2f}",
                f"{ratios['peak']:.2f}",
                f"{ratios['peak_single']:.2f}",
            ],
        ],
    )
    lines += [
        "",
        f"no-change rerun: {rerun['wall_s']:.2f} s (status {rerun['status']}"
        + ("; the first rerun redid work and was repeated" if rerun.get("retried") else "")
        + ")",
        f"wild bootstrap alone: {boot['wall_s']:.2f} s ({boot['draws']:,} draws, "
        f"{boot['clusters']} clusters, {boot['rows']:,} rows x {boot['regressors']} regressors)",
    ]
    if doc["profile"]:
        lines += ["", "pipeline steps at this size (Snakemake benchmarks/*.tsv; MB as written):"]
        cols = ["s", "cpu_time", "max_rss", "max_uss", "io_in", "io_out"]
        rows = []
        for step, figs in doc["profile"].items():
            rows.append([step, *(f"{figs[c]:.1f}" if c in figs else "" for c in cols)])
        total = sum(f.get("s", 0.0) for f in doc["profile"].values())
        rows.append(["(sum of steps)", f"{total:.1f}", "", "", "", "", ""])
        lines += _table(["step", *cols], rows)
    procs = pipe.get("processes") or {}
    if procs:
        lines += [
            "",
            "largest resident memory per process of the pipeline (polled every "
            f"{POLL_SECONDS * 1000:.0f} ms, MiB): "
            + ", ".join(f"{k} {v:.0f}" for k, v in sorted(procs.items(), key=lambda kv: -kv[1])),
        ]
    if doc["sweep"]:
        lines += _sweep_steps(doc["sweep"])
    if doc["sweep"]:
        lines += ["", f"sweep over units (T = {size['periods']}, {size['regressors']} regressors):"]
        rows = []
        for c in doc["sweep"]:
            p, b = c["pipeline"], c["bare"]
            rows.append(
                [
                    f"{c['units']:,}",
                    f"{c['rows']:,}",
                    f"{p['wall_s']:.2f}",
                    f"{p['s_per_million_rows']:.1f}",
                    f"{p['peak_mib']:.0f}",
                    f"{p['cpu_s']:.1f}",
                    f"{b['wall_s']:.2f}",
                    f"{b['s_per_million_rows']:.1f}",
                    f"{b['peak_mib']:.0f}",
                    f"{b['cpu_s']:.1f}",
                    f"{c['wall_ratio']:.2f}",
                    f"{c['peak_ratio']:.2f}",
                ]
            )
        lines += _table(
            [
                "units",
                "rows",
                "pipe s",
                "pipe s/M rows",
                "pipe MiB",
                "pipe CPU s",
                "bare s",
                "bare s/M rows",
                "bare MiB",
                "bare CPU s",
                "ratio s",
                "ratio MiB",
            ],
            rows,
        )
        for side, fit in doc["sweep_fit"].items():
            lines.append(
                f"{side}: log-log slope of seconds on rows {fit['loglog_slope_s']:.2f} "
                f"(CPU {fit['loglog_slope_cpu']:.2f}, memory {fit['loglog_slope_mib']:.2f}; "
                "1 = proportional to rows); "
                f"straight line {fit['fixed_s']:.1f} s + {fit['s_per_million_rows']:.1f} s "
                "per million rows"
            )
    t = doc["targets"]
    lines += [
        "",
        "targets (upper bounds on 2 cores, 24 GiB, 1,000,000 rows): the pipeline's wall time "
        "and peak memory against the bare script's, a rerun with nothing new, the wild bootstrap "
        "alone:",
        f"  wall-time ratio <= {t['wall_ratio']:.1f}: {ratios['wall']:.2f} "
        f"{_verdict(ratios['wall'], t['wall_ratio'])}",
        f"  peak-memory ratio <= {t['peak_ratio']:.1f}: {ratios['peak']:.2f} "
        f"{_verdict(ratios['peak'], t['peak_ratio'])}",
        f"  no-change rerun <= {t['rerun_s']:.0f} s: {rerun['wall_s']:.2f} s "
        f"{_verdict(rerun['wall_s'], t['rerun_s'])}",
        f"  wild bootstrap <= {t['bootstrap_s']:.0f} s: {boot['wall_s']:.2f} s "
        f"{_verdict(boot['wall_s'], t['bootstrap_s'])}",
    ]
    if doc.get("code_changed_during_run"):
        lines.append(
            "  WARNING: the package code changed during the benchmark; figures mix versions"
        )
    if size["rows"] != 1_000_000:
        lines.append("  (this run is not at 1,000,000 rows; the targets are stated for that size)")
    return "\n".join(lines)


# ---------------------------------------------------------------------- interface


def _unit_list(text: str) -> list[int]:
    try:
        values = [int(v.replace("_", "")) for v in text.split(",") if v.strip()]
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"not a comma-separated list of integers: {text}") from exc
    if not values or min(values) < 2:
        raise argparse.ArgumentTypeError("each sweep size must be at least 2 units")
    return values


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m panelpipe.bench``: run the benchmark and print its table."""
    parser = argparse.ArgumentParser(
        prog="python -m panelpipe.bench",
        description=(
            "Time the full default pipeline against a bare script on a simulated panel "
            "(wall time and peak memory), a no-change rerun, the wild bootstrap alone, "
            "and a sweep over the number of units."
        ),
    )
    parser.add_argument("--units", type=int, default=DEFAULT_UNITS, help="units N (100000)")
    parser.add_argument("--periods", type=int, default=DEFAULT_PERIODS, help="periods T (10)")
    parser.add_argument(
        "--regressors", type=int, default=DEFAULT_REGRESSORS, help="regressors K (10)"
    )
    parser.add_argument(
        "--sweep",
        type=_unit_list,
        default=list(DEFAULT_SWEEP),
        help="comma-separated unit counts of the sweep (10000,30000,100000)",
    )
    parser.add_argument("--no-sweep", action="store_true", help="skip the sweep")
    parser.add_argument(
        "--keep", type=Path, metavar="DIR", help="work in DIR and keep its files (data, runs, logs)"
    )
    parser.add_argument("--json", type=Path, metavar="FILE", help="also write the figures as JSON")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="simulation seed")
    parser.add_argument(
        "--cores", type=int, default=DEFAULT_CORES, help="--cores of panelpipe run (2)"
    )
    args = parser.parse_args(argv)
    if args.units < 2 or args.periods < 2 or args.regressors < 1:
        parser.error("need at least 2 units, 2 periods and 1 regressor")

    def progress(msg: str) -> None:
        print(f"[bench] {msg}", file=sys.stderr, flush=True)

    try:
        doc = run_benchmark(
            units=args.units,
            periods=args.periods,
            regressors=args.regressors,
            sweep=[] if args.no_sweep else args.sweep,
            keep=args.keep,
            seed=args.seed,
            cores=args.cores,
            log=progress,
        )
    except RuntimeError as exc:
        sys.stderr.write(f"panelpipe.bench: {exc}\n")
        return 1
    if args.json:  # first, so that the figures survive whatever happens next
        args.json.write_text(json.dumps(doc, indent=2) + "\n", encoding="utf-8")
    print(format_report(doc))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
