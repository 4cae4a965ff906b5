from panelpipe.runs import enter_step
from panelpipe.steps import diagnose_step, script_guard

enter_step("diagnose")
with script_guard(snakemake.log[0]):
    diagnose_step(
        snakemake.params.settings,
        snakemake.input.panel,
        snakemake.output.diagnostics,
    )
