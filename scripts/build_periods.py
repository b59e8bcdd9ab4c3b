"""Snakemake rule build_periods: wires the rule's files to emulant.stages.build_periods."""

from typing import TYPE_CHECKING

from emulant.stages import build_periods, run

if TYPE_CHECKING:  # for editors; Snakemake injects the object
    from snakemake.script import snakemake

run(snakemake, build_periods)
