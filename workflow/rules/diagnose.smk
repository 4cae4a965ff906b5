# The audit fits the fixed-effects model itself, so it runs beside estimate, not after it.
rule diagnose:
    input:
        panel=run_path("work/panel.parquet"),
    output:
        diagnostics=run_path("work/diagnostics.json"),
    log:
        run_path("logs/diagnose.log"),
    benchmark:
        run_path("benchmarks/diagnose.tsv")
    threads: 1
    resources:
        mem_mb=memory_mb(22),
    params:
        settings=analysis_settings_of,
    script:
        "../scripts/diagnose.py"
