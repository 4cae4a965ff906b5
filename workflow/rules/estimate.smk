rule estimate:
    input:
        panel=RUN_DIR + "/work/panel.parquet",
    output:
        models=RUN_DIR + "/work/models.json",
    params:
        settings=analysis_settings_of,
    log:
        RUN_DIR + "/logs/estimate.log",
    benchmark:
        RUN_DIR + "/benchmarks/estimate.tsv"
    script:
        "../scripts/estimate.py"
