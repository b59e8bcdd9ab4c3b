# emulant: target trial emulation from a registry-style extract. A table of contents, no logic.
from snakemake.utils import validate


configfile: "config/config.yaml"


validate(config, schema="workflow/schemas/config.schema.yaml")


include: "workflow/rules/common.smk"


localrules: all, design, archive_report, archive_design  # file copies: never queued on a cluster


include: "workflow/rules/synthesize.smk"
include: "workflow/rules/extract.smk"
include: "workflow/rules/cohort.smk"
include: "workflow/rules/weights.smk"
include: "workflow/rules/effects.smk"
include: "workflow/rules/report.smk"


rule all:
    input:
        archived=result("archive.json"),
        periods=person_time_results(),


rule design:
    input:
        archived=result("design_archive.json"),
