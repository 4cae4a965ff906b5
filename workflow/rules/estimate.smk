rule estimate:
    input:
        panel=run_path("work/panel.parquet"),
    output:
        models=run_path("work/models.json"),
    log:
        run_path("logs/estimate.log"),
    benchmark:
        run_path("benchmarks/estimate.tsv")
    threads: 1
    resources:
        mem_mb=memory_mb(15),
    params:
        settings=analysis_settings_of,
    script:
        "../scripts/estimate.py"
