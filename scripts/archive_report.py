"""Snakemake rule archive_report: wires the rule's files to emulant.stages.archive_report."""

from typing import TYPE_CHECKING

from emulant.stages import archive_report, run

if TYPE_CHECKING:  # for editors; Snakemake injects the object
    from snakemake.script import snakemake

run(snakemake, archive_report)
