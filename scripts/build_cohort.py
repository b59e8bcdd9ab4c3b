"""Snakemake rule build_cohort: wires the rule's files to emulant.stages.build_cohort."""

from typing import TYPE_CHECKING

from emulant.stages import build_cohort, run

if TYPE_CHECKING:  # for editors; Snakemake injects the object
    from snakemake.script import snakemake

run(snakemake, build_cohort)
