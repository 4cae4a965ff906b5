from panelpipe.steps import compare_step, script_guard

with script_guard(snakemake.log[0]):
    compare_step(
        snakemake.params.settings,
        snakemake.input.panel,
        snakemake.input.models,
        snakemake.output.tests,
    )
