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


rule all:
    default_target: True
    input:
        all_reports(),
