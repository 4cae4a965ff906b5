rule report:
    input:
        sources=run_path("work/sources.json"),
        panel=run_path("work/panel.parquet"),
        validation=run_path("work/validation.json"),
        models=run_path("work/models.json"),
        tests=run_path("work/tests.json"),
        diagnostics=run_path("work/diagnostics.json"),
    output:
        html=protected(run_path("report.html")),
        results=protected(run_path("results.json")),
        estimates=protected(run_path("estimates.csv")),
        manifest=protected(run_path("manifest.json")),
        markdown=protected(run_path("estimates.md")),
        latex=protected(run_path("estimates.tex")),
    log:
        run_path("logs/report.log"),
    benchmark:
        run_path("benchmarks/report.tsv")
    threads: 1
    resources:
        mem_mb=memory_mb(14),
    params:
        settings=analysis_settings_of,
        config=analysis_config,
    script:
        "../scripts/report.py"
