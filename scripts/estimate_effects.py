"""Snakemake rule estimate_effects: wires the rule's files to emulant.stages.estimate_effects."""

from typing import TYPE_CHECKING

from emulant.stages import estimate_effects, run

if TYPE_CHECKING:  # for editors; Snakemake injects the object
    from snakemake.script import snakemake

run(snakemake, estimate_effects)
