from panelpipe.steps import ingest_step, script_guard

with script_guard(snakemake.log[0]):
    ingest_step(snakemake.params.settings, snakemake.output.panel, snakemake.output.sources)
