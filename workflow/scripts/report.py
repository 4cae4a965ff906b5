from panelpipe.runs import enter_step
from panelpipe.steps import report_step, script_guard

enter_step("report")
with script_guard(snakemake.log[0]):
    report_step(
        snakemake.params.settings,
        snakemake.wildcards.run_id,
        sources_in=snakemake.input.sources,
        panel_in=snakemake.input.panel,
        validation_in=snakemake.input.validation,
        models_in=snakemake.input.models,
        tests_in=snakemake.input.tests,
        diagnostics_in=snakemake.input.diagnostics,
        outputs=dict(snakemake.output.items()),
        config=snakemake.params.config,
    )
