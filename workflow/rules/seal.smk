# The seal is written after every published file of the run and lists their
# checksums; `latest` follows it. A killed seal job is redone at no cost.
rule seal:
    input:
        rules.report.output,
    output:
        seal=protected(run_path("checksums.json")),
    log:
        run_path("logs/seal.log"),
    benchmark:
        run_path("benchmarks/seal.tsv")
    threads: 1
    resources:
        mem_mb=memory_mb(0),
    script:
        "../scripts/seal.py"
