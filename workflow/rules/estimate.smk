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
        mem_mb=panel_mem_mb,
    params:
        settings=analysis_settings_of,
    script:
        "../scripts/estimate.py"
