rule diagnose:
    input:
        panel=run_path("work/panel.parquet"),
        models=run_path("work/models.json"),
    output:
        diagnostics=run_path("work/diagnostics.json"),
    log:
        run_path("logs/diagnose.log"),
    benchmark:
        run_path("benchmarks/diagnose.tsv")
    threads: 1
    resources:
        mem_mb=panel_mem_mb,
    params:
        settings=analysis_settings_of,
    script:
        "../scripts/diagnose.py"
