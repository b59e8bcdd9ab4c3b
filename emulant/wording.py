"""Wording the estimators and the report share: one place, so the report never imports an estimator.

Each function takes the parsed protocol and returns the words the report prints beside the
estimates the protocol's settings produce.
"""

from __future__ import annotations

from typing import Any


def censoring_assumption(protocol: Any) -> str:
    """The censoring assumption the time-to-event estimates rest on, in words for the report."""
    if protocol.analysis.censoring_weights:
        return ("Censoring (coverage end, administrative end) is assumed non-informative "
                "given arm, time and the covariates: inverse probability of censoring weights "
                "from a pooled logistic model of the daily censoring hazard (time basis in "
                f"periods of {protocol.analysis.period_days} days) are used in the IPW curves "
                "and the doubly robust risks. Reaching the end of follow-up (max_days, or an "
                "end every person still followed reaches on the same day) is the planned end "
                "of the study window and does not enter that model as censoring.")
    return ("Censoring (coverage end, administrative end, end of follow-up) is assumed "
            "non-informative within each arm: the weighted Aalen–Johansen/Kaplan–Meier curves "
            "keep censored persons in the risk set until they leave, and the doubly robust risks "
            "use the censoring distribution estimated by Kaplan–Meier in each arm "
            "(analysis.censoring_weights is false).")


def methods_note(protocol: Any) -> str:
    """How the model-based time-to-event methods of the protocol are computed, for the report's
    analysis plan ('' when it uses neither)."""
    a, o = protocol.analysis, protocol.outcomes
    out = []
    models = {"standardization", "doubly_robust"} & set(a.methods) or a.censoring_weights
    if o.time_to_event() and models:
        out.append("Hazards are pooled logistic models of the daily hazard on the exact "
                   f"day-level risk set, constant within periods of {a.period_days} days.")
    if "doubly_robust" in a.methods:
        out.append("The doubly robust estimates (time-to-event and measured outcomes) use the "
                   "untruncated propensity in their augmentation term, which keeps them doubly "
                   "robust" + ("; weight truncation applies to the IPW estimates only."
                               if a.weights.truncate else "."))
    return " ".join(out)


def variance_note(protocol: Any) -> str:
    """Which rows' intervals come from influence functions (``analysis.variance: influence``),
    for the report's analysis plan ('' with the bootstrap alone)."""
    if protocol.analysis.variance != "influence":
        return ""
    return ("Variance: influence functions of the stacked estimating equations (M-estimation "
            "sandwich, Stefanski & Boos 2002), which account for the estimated propensity, "
            "measurement and outcome models (Lunceford & Davidian 2004), give Wald intervals for "
            "the unadjusted and IPW risks, risk differences, risk ratios (log scale), risk curves "
            "and rates, and for the unadjusted, IPW and doubly robust means and mean differences "
            "of measured outcomes; IPW rows with truncated weights or (time to event) censoring "
            "weights, and every other row, keep the bootstrap. Each row's note says which.")


def hazard_ratio_label(protocol: Any) -> str:
    """'cause-specific hazard ratio' when the protocol has competing events, else 'hazard ratio'."""
    return "cause-specific hazard ratio" if protocol.outcomes.competing else "hazard ratio"
