rule compare:
    input:
        models=RUN_DIR + "/work/models.json",
    output:
        tests=RUN_DIR + "/work/tests.json",
    params:
        settings=analysis_settings_of,
    log:
        RUN_DIR + "/logs/compare.log",
    benchmark:
        RUN_DIR + "/benchmarks/compare.tsv"
    script:
        "../scripts/compare.py"
