"""Snakemake rule bootstrap_chunk: wires the rule's files to emulant.stages.bootstrap_chunk."""

from typing import TYPE_CHECKING

from emulant.stages import bootstrap_chunk, run

if TYPE_CHECKING:  # for editors; Snakemake injects the object
    from snakemake.script import snakemake

run(snakemake, bootstrap_chunk)
