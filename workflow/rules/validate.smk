rule validate:
    input:
        panel=RUN_DIR + "/work/raw.parquet",
    output:
        panel=RUN_DIR + "/work/panel.parquet",
        validation=RUN_DIR + "/work/validation.json",
    params:
        settings=analysis_settings_of,
    log:
        RUN_DIR + "/logs/validate.log",
    benchmark:
        RUN_DIR + "/benchmarks/validate.tsv"
    script:
        "../scripts/validate.py"
