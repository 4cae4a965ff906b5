rule ingest:
    input:
        sources=analysis_sources,
    output:
        panel=run_path("work/raw.parquet"),
        sources=run_path("work/sources.json"),
    log:
        run_path("logs/ingest.log"),
    benchmark:
        run_path("benchmarks/ingest.tsv")
    threads: 1
    resources:
        mem_mb=memory_mb(6),
    params:
        settings=analysis_settings_of,
        planned=planned_run,
    script:
        "../scripts/ingest.py"
