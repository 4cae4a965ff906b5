rule ingest:
    input:
        sources=analysis_sources,
    output:
        panel=RUN_DIR + "/work/raw.parquet",
        sources=RUN_DIR + "/work/sources.json",
    params:
        settings=analysis_settings_of,
    log:
        RUN_DIR + "/logs/ingest.log",
    benchmark:
        RUN_DIR + "/benchmarks/ingest.tsv"
    script:
        "../scripts/ingest.py"
