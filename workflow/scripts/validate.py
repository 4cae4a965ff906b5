from panelpipe.runs import enter_step
from panelpipe.steps import script_guard, validate_step

enter_step("validate")
with script_guard(snakemake.log[0]):
    validate_step(
        snakemake.params.settings,
        snakemake.input.panel,
        snakemake.output.panel,
        snakemake.output.validation,
    )
