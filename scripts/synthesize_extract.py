"""Snakemake rule synthesize_extract: wires the rule's files to emulant.stages.synthesize_extract."""

from typing import TYPE_CHECKING

from emulant.stages import synthesize_extract, run

if TYPE_CHECKING:  # for editors; Snakemake injects the object
    from snakemake.script import snakemake

run(snakemake, synthesize_extract)
