"""Snakemake rule render_report: wires the rule's files to emulant.stages.render_report."""

from typing import TYPE_CHECKING

from emulant.stages import render_report, run

if TYPE_CHECKING:  # for editors; Snakemake injects the object
    from snakemake.script import snakemake

run(snakemake, render_report)
