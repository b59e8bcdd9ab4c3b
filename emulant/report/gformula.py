"""The g-formula's part of the per-protocol section: its models with their terms, the natural
course against the observed risk (with a warning when they differ beyond the interval), and the
assumptions it rests on.

The models' terms are stated from the protocol (baseline covariates, time-varying covariates,
period length); every number is read from ``estimates.csv`` (rows ``method: gformula`` with the
measures ``natural_course_risk``, ``observed_risk``, ``natural_course_difference``).
"""

from __future__ import annotations

from typing import Any

import pandas as pd

from emulant.protocol import Protocol
from emulant.report import fmt
from emulant.report.results import _num

METHOD = "gformula"
NATURAL, OBSERVED, DIFFERENCE = "natural_course_risk", "observed_risk", "natural_course_difference"
NATURAL_MEASURES = (NATURAL, OBSERVED, DIFFERENCE)  # shown in their own table


def _pct(x: Any) -> str:
    return "" if fmt.missing(x) else fmt.num(float(x) * 100, 1) + "%"


def models(protocol: Protocol) -> list[dict]:
    """The g-formula's models, what each is fitted on, and its terms."""
    tv = [c.name for c in protocol.time_varying]
    base = "the baseline covariates (" + (", ".join(c.name for c in protocol.covariates) or "none") + ")"
    period = f"the period ({protocol.analysis.period_days} days; spline or indicators)"
    tv_text = ", ".join(tv) if tv else "none"
    out = [{"model": f"{c.name} in period k (k ≥ 1)",
            "kind": ("linear, residuals resampled" if (c.kind or "continuous") == "continuous"
                     else "logistic"),
            "terms": f"previous values of {tv_text}; arm; {period}; {base}",
            "rows": "periods started on protocol, free of the outcome and the competing event"}
           for c in protocol.time_varying]
    hazard = f"arm, {period}, arm × period, {base}, {tv_text} now, arm × {tv_text} now"
    out.append({"model": "outcome hazard (daily, constant within a period)", "kind": "pooled logistic",
                "terms": hazard, "rows": "person-time on protocol (follow-up ends at deviation)"})
    if protocol.outcomes.competing:
        out.append({"model": "competing event hazard", "kind": "pooled logistic", "terms": hazard,
                    "rows": "person-time on protocol"})
    out.append({"model": "deviating in period k, per arm (natural course only)", "kind": "logistic",
                "terms": f"{period}, {base}, {tv_text} now",
                "rows": "periods started on protocol, in periods in which someone of the arm deviates"})
    return out


def natural_course(est: pd.DataFrame, protocol: Protocol) -> tuple[list[dict], list[str]]:
    """Per outcome, arm and horizon: natural course, observed risk, difference with interval;
    and a warning for each whose interval of the difference excludes 0."""
    if est is None or "method" not in est.columns:
        return [], []
    g = est[(est["method"].astype(str) == METHOD) & est["measure"].isin([NATURAL, OBSERVED, DIFFERENCE])]
    rows, warn = [], []
    for (o, h, arm), gg in g.groupby(["outcome", "horizon_day", "arm"], sort=False):
        by = {r.measure: r for r in gg.itertuples(index=False)}
        if DIFFERENCE not in by:
            continue
        d = by[DIFFERENCE]
        lo, hi = _num(d.ci_low), _num(d.ci_high)
        beyond = (lo > 0 or hi < 0) if not (pd.isna(lo) or pd.isna(hi)) else False
        rows.append({"outcome": str(o), "horizon": fmt.integer(h), "arm": str(arm),
                     "natural": _pct(by[NATURAL].estimate) if NATURAL in by else "",
                     "observed": _pct(by[OBSERVED].estimate) if OBSERVED in by else "",
                     "difference": fmt.sig(d.estimate * 100, 2),
                     "ci": fmt.ci(lo * 100, hi * 100, 2), "beyond": beyond})
        if beyond:
            warn.append(f"g-formula natural course ({o}, {arm}, day {fmt.integer(h)}): the simulated "
                        f"risk differs from the observed risk up to deviation by "
                        f"{fmt.sig(d.estimate * 100, 2)} percentage points, beyond its 95% interval; "
                        "a model of the g-formula may be misspecified.")
    return rows, warn


def section(est: pd.DataFrame | None, protocol: Protocol) -> dict | None:
    """The g-formula's part of the per-protocol section, or None without ``method: gformula``."""
    if METHOD not in protocol.analysis.methods or not protocol.per_protocol:
        return None
    rows, warn = natural_course(est, protocol)
    return {"models": models(protocol), "natural_course": rows, "warnings": warn,
            "simulated_persons": fmt.integer(protocol.analysis.gformula.simulated_persons),
            "seed": protocol.analysis.gformula.seed}


def assumptions(protocol: Protocol, part: dict | None) -> list[dict[str, Any]]:
    """The assumptions of the g-formula, each tied to this run's evidence."""
    if part is None:
        return []
    tv = ", ".join(c.name for c in protocol.time_varying) or "none named"
    return [
        {"id": "gf-exchangeability", "name": "g-formula: sequential exchangeability",
         "statement": ("In every period, staying on protocol is independent of the potential "
                       "outcomes given the history the models condition on: the arm, the baseline "
                       f"covariates and the time-varying covariates ({tv})."),
         "evidence": ["The listed history is all the models use; an unmeasured cause of both "
                      "deviating and the outcome biases the g-formula as it biases the weights."],
         "threat": not protocol.time_varying},
        {"id": "gf-positivity", "name": "g-formula: positivity of following each strategy",
         "statement": ("Persons with every history the strategies produce stay on protocol in the "
                       "data; otherwise the models extrapolate to histories no one followed."),
         "evidence": ["See the weights over time: very large weights mark histories rarely "
                      "followed."], "threat": False},
        {"id": "gf-consistency", "name": "g-formula: consistency",
         "statement": ("A person who followed a strategy has the outcome they would have had "
                       "under it: staying on protocol, as the deviation rules define it, is a "
                       "well-defined treatment."), "evidence": [], "threat": False},
        {"id": "gf-models", "name": "g-formula: correct models",
         "statement": ("The models of the time-varying covariates and the hazards (listed in the "
                       "per-protocol section) describe the data; the weighting needs a correct "
                       "model of deviating instead, so agreement of the two methods is evidence."),
         "evidence": part["warnings"] or ["The natural course reproduces the observed risk up to "
                                          "deviation within its interval."],
         "threat": bool(part["warnings"])},
    ]
