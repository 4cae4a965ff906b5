from panelpipe.runs import enter_step
from panelpipe.steps import ingest_step, script_guard

enter_step("ingest")
with script_guard(snakemake.log[0]):
    ingest_step(
        snakemake.params.settings,
        snakemake.output.panel,
        snakemake.output.sources,
        run=snakemake.wildcards.run_id,
        planned=snakemake.params.planned,
    )
