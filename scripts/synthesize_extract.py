"""Snakemake rule synthesize_extract: wires the rule's files to emulant.stages.synthesize_extract."""

from typing import TYPE_CHECKING

from emulant.stages import run, synthesize_extract

if TYPE_CHECKING:  # for editors; Snakemake injects the object
    from snakemake.script import snakemake

run(snakemake, synthesize_extract)
