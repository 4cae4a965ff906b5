# Configuration checks, run ids and input functions shared by every rule.
import os
import sys

from panelpipe.config import (
    analysis_settings,
    load_config,
    resolve_sources,
    validate_config,
)
from panelpipe.findings import PanelpipeError
from panelpipe.runs import PLAN_ENV, SEAL, check_plan, plan_runs, refuse_damaged

# The plan hashes every source once; the ingest step reads exactly those bytes or
# refuses. A plan passed by `panelpipe run` must still hold, and a run folder that
# was changed after it completed is never redone over.
try:
    # Snakemake's own YAML reading lets a repeated key win silently and expands
    # aliases; the files are read once more with panelpipe's strict reader.
    for path in workflow.configfiles:
        load_config(path)
    config = validate_config(config, origin="configuration")
    PLANS = plan_runs(config)
    check_plan(PLANS, os.environ.get(PLAN_ENV))
    RUNS = {name: plan.run_id for name, plan in PLANS.items()}
    FOLDERS = {
        name: os.path.join(config["output_dir"], name, run)
        for name, run in RUNS.items()
    }
    CHECKS = refuse_damaged(FOLDERS)
except PanelpipeError as err:
    sys.stderr.write(f"panelpipe: {err}\n")
    raise SystemExit(2)

OUT = config["output_dir"].rstrip("/")


def run_path(leaf):
    """A file of a run folder: <output_dir>/<analysis>/<run_id>/<leaf>."""
    return os.path.join(OUT, "{analysis}", "{run_id}", leaf)


wildcard_constraints:
    analysis="[a-z0-9][a-z0-9_-]*",
    run_id="[0-9a-f]{16}",


def all_sealed():
    """The seal of every planned run that is not complete yet.

    A complete run is left out of the jobs altogether, so no rerun trigger of
    Snakemake (changed params after a delivery moved, a newer file, a mark of a
    job killed after its seal was written) can ever redo it.
    """
    return [
        os.path.join(folder, SEAL)
        for name, folder in FOLDERS.items()
        if CHECKS[name].state != "complete"
    ]


def planned_run(wildcards):
    return PLANS[wildcards.analysis].to_dict()


def analysis_settings_of(wildcards):
    return analysis_settings(config, wildcards.analysis)


def analysis_sources(wildcards):
    settings = analysis_settings(config, wildcards.analysis)
    paths = resolve_sources(settings.sources, analysis=wildcards.analysis)
    return [ancient(str(p)) for p in paths]


def memory_mb(factor):
    """mem_mb of a step: ``factor`` times the size of its input files, at least 1000.

    Factors from the peaks measured with python -m panelpipe.bench at 1,000,000 rows
    x 10 regressors (panel Parquet about 92 MB): diagnose 1.8 GB, estimate, compare
    and report 1.1 GB, validate 0.7 GB, ingest 0.5 GB, with some room above each.
    """

    def mem_mb(wildcards, input):
        return max(1000, int(factor * input.size_mb))

    return mem_mb


def analysis_config(wildcards):
    return {
        "output_dir": OUT,
        "analyses": {wildcards.analysis: config["analyses"][wildcards.analysis]},
    }
