"""Snakemake rule check_balance: wires the rule's files to emulant.stages.check_balance."""

from typing import TYPE_CHECKING

from emulant.stages import check_balance, run

if TYPE_CHECKING:  # for editors; Snakemake injects the object
    from snakemake.script import snakemake

run(snakemake, check_balance)
