"""Snakemake rule estimate_point: wires the rule's files to emulant.stages.estimate_point."""

from typing import TYPE_CHECKING

from emulant.stages import estimate_point, run

if TYPE_CHECKING:  # for editors; Snakemake injects the object
    from snakemake.script import snakemake

run(snakemake, estimate_point)
