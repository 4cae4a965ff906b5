import sys

from panelpipe.runs import enter_step, publish_latest

enter_step("publish")
for name, check in publish_latest(snakemake.params.output_dir, snakemake.params.runs).items():
    if check.state != "complete":
        sys.stderr.write(f"panelpipe: analysis {name!r}: {check.reason}\n")
        raise SystemExit(1)
