from panelpipe.runs import enter_step
from panelpipe.steps import estimate_step, script_guard

enter_step("estimate")
with script_guard(snakemake.log[0]):
    estimate_step(snakemake.params.settings, snakemake.input.panel, snakemake.output.models)
