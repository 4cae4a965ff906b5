rule validate:
    input:
        panel=run_path("work/raw.parquet"),
    output:
        panel=run_path("work/panel.parquet"),
        validation=run_path("work/validation.json"),
    log:
        run_path("logs/validate.log"),
    benchmark:
        run_path("benchmarks/validate.tsv")
    threads: 1
    resources:
        mem_mb=memory_mb(9),
    params:
        settings=analysis_settings_of,
    script:
        "../scripts/validate.py"
