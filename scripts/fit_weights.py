"""Snakemake rule fit_weights: wires the rule's files to emulant.stages.fit_weights."""

from typing import TYPE_CHECKING

from emulant.stages import fit_weights, run

if TYPE_CHECKING:  # for editors; Snakemake injects the object
    from snakemake.script import snakemake

run(snakemake, fit_weights)
