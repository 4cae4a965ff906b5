from panelpipe.steps import estimate_step, script_guard

with script_guard(snakemake.log[0]):
    estimate_step(snakemake.params.settings, snakemake.input.panel, snakemake.output.models)
