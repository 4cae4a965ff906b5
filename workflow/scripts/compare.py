from panelpipe.runs import enter_step
from panelpipe.steps import compare_step, script_guard

enter_step("compare")
with script_guard(snakemake.log[0]):
    compare_step(
        snakemake.params.settings,
        snakemake.input.panel,
        snakemake.input.models,
        snakemake.output.tests,
    )
