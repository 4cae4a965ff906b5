rule report:
    input:
        sources=RUN_DIR + "/work/sources.json",
        panel=RUN_DIR + "/work/panel.parquet",
        validation=RUN_DIR + "/work/validation.json",
        models=RUN_DIR + "/work/models.json",
        tests=RUN_DIR + "/work/tests.json",
    output:
        html=protected(RUN_DIR + "/report.html"),
        results=protected(RUN_DIR + "/results.json"),
        estimates=protected(RUN_DIR + "/estimates.csv"),
        manifest=protected(RUN_DIR + "/manifest.json"),
    params:
        settings=analysis_settings_of,
        config=analysis_config,
    log:
        RUN_DIR + "/logs/report.log",
    benchmark:
        RUN_DIR + "/benchmarks/report.tsv"
    script:
        "../scripts/report.py"
