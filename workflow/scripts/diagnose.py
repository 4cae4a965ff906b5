from panelpipe.steps import diagnose_step, script_guard

with script_guard(snakemake.log[0]):
    diagnose_step(
        snakemake.params.settings,
        snakemake.input.panel,
        snakemake.output.diagnostics,
    )
