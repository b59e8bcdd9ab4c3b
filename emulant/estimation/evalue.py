"""E-values for risk ratios and hazard ratios (VanderWeele & Ding 2017, Ann Intern Med 167:268).

The E-value is the minimum strength of association, on the risk ratio scale, that an unmeasured
confounder would need with both the treatment and the outcome, conditional on the measured
covariates, to fully explain away an observed risk ratio:

.. math::

    E = RR + \\sqrt{RR\\,(RR - 1)} \\quad (RR \\ge 1), \\qquad
    E(RR) = E(1/RR) \\quad (RR < 1).

For a confidence interval the E-value of the limit nearest the null is reported, and 1 when the
interval includes 1.

Hazard ratios: with a rare outcome (risk at the end of follow-up at most 15%, the paper's rule)
the hazard ratio approximates the risk ratio and is used as it is; with a common outcome
(above 15%) it is first transformed,

.. math::

    RR \\approx \\frac{1 - 0.5^{\\sqrt{HR}}}{1 - 0.5^{\\sqrt{1/HR}}},

as in that paper's table of approximations. "Common" is decided, as the paper defines it, by
the outcome's cumulative risk at the end of follow-up: here the larger of the two arms' estimated
risks at the latest horizon, from the same outcome, estimand and method as the hazard ratio (a
crude share ``events / n`` understates it when follow-up is censored). Without such a risk the
outcome is taken as common, the choice that gives the smaller E-value.

An E-value speaks about an adjusted estimate: none is written for ``unadjusted`` rows nor for
negative-control outcomes (whose ratio is a check of residual confounding, not an effect).

Rows (:func:`e_value_rows`): one ``e_value`` row per adjusted ratio row, with the ratio row's
``outcome``, ``contrast``, ``estimand``, ``method``, ``horizon_day``, ``arm``, ``comparator``,
``n`` and ``events``; ``estimate`` holds the E-value of the point estimate and ``ci_low`` the
E-value of the confidence limit nearest the null (empty when the ratio row has no interval);
``ci_high`` and ``se`` stay empty; a ratio that is not estimable passes its ``note`` on. It is
called after the bootstrap has added the intervals.
"""

from __future__ import annotations

import math

RARE_OUTCOME_RISK = 0.15
RATIO_MEASURES = ("risk_ratio", "hazard_ratio")


def _missing(x) -> bool:
    return x is None or (isinstance(x, float) and math.isnan(x))


def e_value(rr: float) -> float:
    """E-value of a risk ratio (NaN for a missing or non-positive ratio)."""
    if _missing(rr) or rr <= 0 or math.isinf(rr):
        return float("nan")
    r = rr if rr >= 1 else 1.0 / rr
    return r + math.sqrt(r * (r - 1.0))


def hr_to_rr(hr: float, common: bool) -> float:
    """Risk ratio a hazard ratio stands for: itself for a rare outcome, the square-root
    transform of VanderWeele & Ding 2017 for a common one."""
    if not common or _missing(hr) or hr <= 0:
        return hr
    return (1.0 - 0.5 ** math.sqrt(hr)) / (1.0 - 0.5 ** math.sqrt(1.0 / hr))


def e_value_ci(estimate: float, ci_low: float, ci_high: float) -> float:
    """E-value of the confidence limit nearest the null: 1 when the interval includes 1."""
    if _missing(estimate) or _missing(ci_low) or _missing(ci_high):
        return float("nan")
    if ci_low <= 1.0 <= ci_high:
        return 1.0
    return e_value(ci_low if estimate > 1 else ci_high)


def end_of_follow_up_risks(rows: list[dict]) -> dict[tuple, float]:
    """(outcome, estimand, method) -> the larger arm risk at the latest horizon with a risk."""
    latest: dict[tuple, tuple[float, float]] = {}
    for r in rows:
        if r.get("measure") != "risk" or r.get("comparator") or _missing(r.get("estimate")) \
                or _missing(r.get("horizon_day")):
            continue
        k = (r.get("outcome"), r.get("estimand"), r.get("method"))
        h, v = float(r["horizon_day"]), float(r["estimate"])
        old = latest.get(k)
        if old is None or h > old[0] or (h == old[0] and v > old[1]):
            latest[k] = (h, v)
    return {k: v for k, (_, v) in latest.items()}


def e_value_rows(estimate_rows: list[dict], negative_controls=()) -> list[dict]:
    """One ``e_value`` row for every adjusted ``risk_ratio`` and ``hazard_ratio`` row of an
    outcome that is not a negative control (see module docs)."""
    out = []
    risks = end_of_follow_up_risks(estimate_rows)
    for r in estimate_rows:
        if (r.get("measure") not in RATIO_MEASURES or r.get("method") == "unadjusted"
                or r.get("outcome") in negative_controls):
            continue
        est, lo, hi = r.get("estimate"), r.get("ci_low"), r.get("ci_high")
        if r["measure"] == "hazard_ratio":
            risk = risks.get((r.get("outcome"), r.get("estimand"), r.get("method")))
            common = risk is None or risk > RARE_OUTCOME_RISK
            est, lo, hi = (hr_to_rr(x, common) if not _missing(x) else x for x in (est, lo, hi))
        e_ci = e_value_ci(est, lo, hi)
        row = {k: r.get(k) for k in ("outcome", "contrast", "estimand", "method", "horizon_day",
                                     "arm", "comparator", "n", "events", "subgroup")
               if k != "subgroup" or r.get(k)}
        row.update(measure="e_value", estimate=e_value(est),
                   ci_low=None if math.isnan(e_ci) else e_ci, ci_high=None, se=None)
        if r.get("note") and _missing(r.get("estimate")):
            row["note"] = r["note"]
        out.append(row)
    return out
