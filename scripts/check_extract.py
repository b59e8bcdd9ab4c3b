"""Snakemake rule check_extract: wires the rule's files to emulant.stages.check_extract."""

from typing import TYPE_CHECKING

from emulant.stages import check_extract, run

if TYPE_CHECKING:  # for editors; Snakemake injects the object
    from snakemake.script import snakemake

run(snakemake, check_extract)
