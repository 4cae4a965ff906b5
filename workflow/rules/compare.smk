rule compare:
    input:
        panel=run_path("work/panel.parquet"),
        models=run_path("work/models.json"),
    output:
        tests=run_path("work/tests.json"),
    log:
        run_path("logs/compare.log"),
    benchmark:
        run_path("benchmarks/compare.tsv")
    threads: 1
    resources:
        mem_mb=memory_mb(15),
    params:
        settings=analysis_settings_of,
    script:
        "../scripts/compare.py"
