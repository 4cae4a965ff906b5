# panelpipe: ingest -> validate -> estimate -> compare and diagnose -> report, one run folder per analysis.
from snakemake.utils import min_version

min_version("8.0")


# `panelpipe run --config FILE` passes its file with --configfile; a plain
# `snakemake` reads the demo configuration.
if not config:

    configfile: "config/config.yaml"


include: "workflow/rules/common.smk"
include: "workflow/rules/ingest.smk"
include: "workflow/rules/validate.smk"
include: "workflow/rules/estimate.smk"
include: "workflow/rules/compare.smk"
include: "workflow/rules/diagnose.smk"
include: "workflow/rules/report.smk"
include: "workflow/rules/seal.smk"


localrules:
    all,
    seal,


# No output, so Snakemake runs it every time, even when nothing else is to be done:
# it points each `latest` at the run of the current inputs once that run is
# complete (a withdrawn delivery included).
rule all:
    default_target: True
    input:
        all_sealed(),
    log:
        os.path.join(OUT, ".publish.log"),
    params:
        folders=FOLDERS,
    script:
        "workflow/scripts/publish.py"
