"""Column names of the analysis tables: the one place that spells them.

cohort.parquet (one row per person):
    person_id, arm (arm name), treated (1 for ``strategies.treated``, else 0), time_zero (date),
    one column per covariate (its ``name``) and ``<name>_missing`` (0/1) for every covariate whose
    value may be missing (``Covariate.may_be_missing``), filled as CONTRACTS §3a says,
    end_day, end_reason                       -- the primary time-to-event outcome (if any)
    end_day__<o>, end_reason__<o>             -- every time-to-event outcome o (primary included)
    value__<m>, measured__<m>, baseline__<m>  -- every measured outcome m (value NaN when unmeasured)
    died_before__<m>                          -- 0/1: died on a day from 0 to at_day - 1 (measured outcome m)
    coverage_end_day                          -- last day of the merged coverage period holding day 0
    stop_day, switch_day, deviation_day, deviation_reason   -- with per_protocol only (§5b)
    initiation_day                            -- design clone only (§5d): one row per person and arm
person_periods.parquet: person_id, arm, period, start_day, deviated, each time-varying covariate
    (and <name>_missing where its value may be missing) -- with per_protocol only (§5g).
periods.parquet: the same rows, then weight_<method>_<ESTIMAND> (method ipw | standardization)
    for each estimand: the per-protocol weights over time the point estimate used.
weights.parquet: person_id, arm, propensity, weight_<ESTIMAND> for each estimand of the protocol.
"""

from __future__ import annotations

END_REASONS = ("outcome", "competing", "administrative_end", "max_follow_up", "coverage_end")


def missing_flag(covariate: str) -> str:
    return f"{covariate}_missing"


def end_day(outcome: str) -> str:
    return f"end_day__{outcome}"


def end_reason(outcome: str) -> str:
    return f"end_reason__{outcome}"


def value(measure: str) -> str:
    return f"value__{measure}"


def measured(measure: str) -> str:
    return f"measured__{measure}"


def baseline(measure: str) -> str:
    return f"baseline__{measure}"


def died_before(measure: str) -> str:
    return f"died_before__{measure}"


def weight(estimand: str) -> str:
    return f"weight_{estimand}"


# person-time (CONTRACTS §5b, §5g): cohort.parquet gains these when per_protocol is asked for
STOP_DAY = "stop_day"  # the day the supply ran out by more than gap_days (empty past max_days)
SWITCH_DAY = "switch_day"  # the first day >= 1 with a record of a switch concept
DEVIATION_DAY = "deviation_day"  # the earlier of the two, empty after end_day
DEVIATION_REASON = "deviation_reason"  # stopped | switched (switched on a tie) | empty
DEVIATION_REASONS = ("stopped", "switched")
# design clone (CONTRACTS §5d): the first day >= 0 with a record of the arm's concept (a none
# arm: of any other arm's concept), within max_days; reasons a clone leaves its arm
INITIATION_DAY = "initiation_day"
CLONE_REASONS = ("started_early", "not_started", "started", "stopped", "switched")
# periods.parquet: one row per person and period under per-protocol follow-up
PERIOD_COLUMNS = ("person_id", "arm", "period", "start_day", "deviated")


def period_weight(method: str, estimand: str) -> str:
    """periods.parquet: the weight over time of a per-protocol method (ipw | standardization)."""
    return f"weight_{method}_{estimand}"
