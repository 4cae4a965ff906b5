from panelpipe.findings import PanelpipeError
from panelpipe.runs import enter_step, publish_latest
from panelpipe.steps import script_guard

enter_step("publish")
with script_guard(snakemake.log[0]):
    for name, check in publish_latest(snakemake.params.folders).items():
        if check.state != "complete":
            raise PanelpipeError(f"analysis {name!r}: the run is not complete ({check.reason}).")
