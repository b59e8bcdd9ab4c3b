"""The cohort stage: eligibility and time zero in DuckDB (:mod:`.eligibility`; the sequential
design's person-trials in :mod:`.sequential`; the clone design's clones in :mod:`.clones`) and
covariates summarised over windows relative to time zero (:mod:`.covariates`)."""

from emulant.cohort.clones import build_clone_cohort
from emulant.cohort.eligibility import CohortError, CohortResult
from emulant.cohort.eligibility import build_cohort as _build_initiators
from emulant.cohort.sequential import build_sequential, plan_of
from emulant.extract import Extract
from emulant.protocol import Protocol


def build_cohort(extract: Extract, protocol: Protocol, steps_only: bool = False) -> CohortResult:
    """The cohort of the protocol's design: :func:`emulant.cohort.eligibility.build_cohort`
    (initiators, CONTRACTS §3a), :func:`emulant.cohort.sequential.build_sequential`
    (sequential, §5c: one row per person-trial) or :func:`emulant.cohort.clones.build_clone_cohort`
    (clone, §5d: one row per person and arm, with the deviation columns)."""
    if protocol.strategies.design == "sequential":
        return build_sequential(extract, protocol, plan_of(protocol), steps_only)
    if protocol.strategies.design == "clone":
        return build_clone_cohort(extract, protocol, steps_only)
    return _build_initiators(extract, protocol, steps_only)


__all__ = ["CohortError", "CohortResult", "build_cohort"]
