"""The cohort stage: eligibility and time zero in DuckDB (:mod:`.eligibility`) and covariates
summarised over windows relative to time zero (:mod:`.covariates`)."""

from emulant.cohort.eligibility import CohortError, CohortResult, build_cohort

__all__ = ["CohortError", "CohortResult", "build_cohort"]
