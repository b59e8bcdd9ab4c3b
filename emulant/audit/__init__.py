"""The audit trail: manifest, run stamp, archive, ledger and the comparison with the previous run
(:mod:`.provenance`)."""
