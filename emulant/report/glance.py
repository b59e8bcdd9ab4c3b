"""The "at a glance" panel: the population, the primary outcome, the pre-specified primary
estimate as a sentence, and the state of each diagnostic, all read from the results files.

Every value is a string made here from ``estimates.csv``, the cohort or the context already built
from the results files; nothing is computed in the template.
"""

from __future__ import annotations

import math
from typing import Any

import pandas as pd

from emulant.protocol import MeasuredOutcome, Protocol, outcome_name
from emulant.report import disclosure as dc
from emulant.report import fmt
from emulant.report.results import METHOD_LABEL, end_reasons_by_arm

ESTIMAND_WORDS = {"ATE": "in the whole eligible population (ATE)",
                  "ATT": "in those who started {treated} (ATT)",
                  "ATO": "in the population with overlapping propensities (ATO)"}


def percent(x: Any, digits: int = 1) -> str:
    """A risk (a proportion) as a percentage: ``0.1183`` -> ``11.8%``."""
    return "" if fmt.missing(x) else fmt.num(100.0 * float(x), digits) + "%"


def points(x: Any, digits: int = 1) -> str:
    """A risk difference in percentage points, signed: ``-0.0352`` -> ``−3.5``."""
    if fmt.missing(x):
        return ""
    v = 100.0 * float(x)
    return ("+" if v > 0 else "") + fmt.num(v, digits)


def points_ci(lo: Any, hi: Any, digits: int = 1) -> str:
    """An interval of a risk difference in percentage points."""
    if fmt.missing(lo) or fmt.missing(hi):
        return ""
    return f"{points(lo, digits)} to {points(hi, digits)}"


def _pick(est: pd.DataFrame, outcome: str, method: str, estimand: str, measure: str,
          horizon: int | None, arm: str | None = None, contrast: bool = True) -> Any:
    g = est[(est["outcome"].astype(str) == outcome) & (est["method"].astype(str) == method)
            & (est["estimand"].fillna("").astype(str) == estimand)
            & (est["measure"].astype(str) == measure)]
    if horizon is not None:
        g = g[pd.to_numeric(g["horizon_day"], errors="coerce") == horizon]
    if arm is not None:
        g = g[g["arm"].astype(str) == arm]
    comp = g["comparator"].fillna("").astype(str)
    g = g[comp != ""] if contrast else g[comp == ""]
    if "contrast" in g.columns and len(g) > 1:
        g = g[g["contrast"].astype(str) == str(g["contrast"].iloc[0])]
    return None if g.empty else g.iloc[0]


def primary_estimate(est: pd.DataFrame | None, protocol: Protocol) -> dict:
    """The pre-specified primary estimate (``analysis.primary``) as a sentence with its interval."""
    pr = protocol.analysis.primary
    s = protocol.strategies
    prim = protocol.outcomes.primary
    name = outcome_name(prim)
    measured = isinstance(prim, MeasuredOutcome)
    horizon = None if measured else pr.horizon_day
    where = ESTIMAND_WORDS.get(pr.estimand, pr.estimand).format(treated=s.treated)
    method = METHOD_LABEL.get(pr.method, pr.method)
    spec = (f"{method}, {pr.estimand}" + ("" if measured else f", day {pr.horizon_day}"))
    out = {"spec": spec, "method": pr.method, "estimand": pr.estimand,
           "horizon": "" if horizon is None else str(horizon), "sentence": "", "found": False}
    if est is None:
        out["sentence"] = "No estimate was produced in this run."
        return out
    args = (name, pr.method, pr.estimand)
    if measured:
        diff = _pick(est, *args, "mean_difference", None)
        a1 = _pick(est, *args, "mean", None, s.treated, contrast=False)
        a0 = _pick(est, *args, "mean", None, s.comparator, contrast=False)
        if diff is None:
            out["sentence"] = f"The primary estimate ({spec}) is not in estimates.csv."
            return out
        what = f"change in {name} from baseline" if prim.change_from_baseline else name
        means = (f"the mean {what} at day {prim.at_day} was {fmt.sig(a1.estimate)} under {s.treated} and "
                 f"{fmt.sig(a0.estimate)} under {s.comparator}: "
                 if a1 is not None and a0 is not None else "")
        out["sentence"] = (f"{where[0].upper() + where[1:]}, by {method}, {means}a difference of "
                           f"{fmt.sig(diff.estimate)} (95% CI {fmt.ci(diff.ci_low, diff.ci_high)}).")
        out["found"] = True
        return out
    rd = _pick(est, *args, "risk_difference", horizon)
    rr = _pick(est, *args, "risk_ratio", horizon)
    r1 = _pick(est, *args, "risk", horizon, s.treated, contrast=False)
    r0 = _pick(est, *args, "risk", horizon, s.comparator, contrast=False)
    if rd is None:
        out["sentence"] = f"The primary estimate ({spec}) is not in estimates.csv."
        return out
    risks = (f"the {horizon}-day risk of {name} was {percent(r1.estimate)} under {s.treated} "
             f"and {percent(r0.estimate)} under {s.comparator}: "
             if r1 is not None and r0 is not None else "")
    ratio = (f" and a risk ratio of {fmt.num(rr.estimate, 2)} (95% CI "
             f"{fmt.num(rr.ci_low, 2)} to {fmt.num(rr.ci_high, 2)})" if rr is not None else "")
    ci = points_ci(rd.ci_low, rd.ci_high)
    out["sentence"] = (f"{where[0].upper() + where[1:]}, by {method}, {risks}a difference of "
                       f"{points(rd.estimate)} percentage points"
                       + (f" (95% CI {ci})" if ci else "") + f"{ratio}.")
    out["found"] = True
    return out


def population(cohort: pd.DataFrame | None, positivity: dict | None, protocol: Protocol) -> dict:
    """Persons in the cohort and in each arm, under the disclosure rule."""
    m = protocol.report.min_cell
    arms = list(protocol.strategies.arm_names)
    if cohort is not None and "arm" in cohort:
        n = {a: float((cohort["arm"].astype(str) == a).sum()) for a in arms}
    else:
        n = {a: float(v) for a, v in ((positivity or {}).get("n") or {}).items()}
    if not n:
        return {"total": "", "arms": []}
    if protocol.strategies.design == "clone" and cohort is not None and "person_id" in cohort:
        return {"total": dc.show_count(float(cohort["person_id"].nunique()), m), "clones": True,
                "arms": [{"name": a, "n": dc.show_count(n.get(a), m), "treated": False} for a in arms]}
    return {"total": dc.show_count(sum(n.values()), m),
            "arms": [{"name": a, "n": dc.show_count(n.get(a), m),
                      "treated": a == protocol.strategies.treated} for a in arms if a in n]}


def diagnostics(ctx: dict, design: bool) -> list[dict]:
    """Balance, positivity, censoring and negative controls: passed, failed or not produced,
    each with the section that shows it (the same verdicts as the Warnings section)."""
    warn = ctx["warnings"]

    def state(produced: bool, failed: list[str], ok: str) -> dict:
        if not produced:
            return {"state": "not produced", "detail": "not produced in this run"}
        if failed:
            return {"state": "failed", "detail": " ".join(failed)}
        return {"state": "passed", "detail": ok}

    out = []
    thr = ctx["smd_threshold"]
    out.append({"name": "Balance", "section": "baseline", **state(
        bool(ctx.get("baseline")), [w["text"] for w in warn if w["section"] == "baseline"],
        f"every weighted |SMD| is at most {thr}.")})
    out.append({"name": "Positivity", "section": "positivity", **state(
        bool(ctx.get("positivity")), [w["text"] for w in warn if w["section"] == "positivity"],
        "no extreme propensity scores and no small effective sample size.")})
    if design:
        return out
    out.append({"name": "Censoring", "section": "assumption-censoring", **state(
        bool(ctx.get("censoring")),
        [w["text"] for w in warn if w["section"] == "assumption-censoring"],
        "the share censored at coverage end differs between the arms by at most "
        f"{CENSORING_GAP_PP:g} percentage points.")})
    nc = [n for n in ctx.get("negative_controls") or [] if n["method"] != "unadjusted"]
    bad = sorted({n["outcome"] for n in nc if n["includes_null"] is False})
    n_bad = sum(n["includes_null"] is False for n in nc)
    out.append({"name": "Negative controls", "section": "negative-controls", **state(
        bool(nc), [f"{n_bad} of {len(nc)} adjusted intervals exclude the null "
                   f"({', '.join(bad)})."] if bad else [],
        f"all {len(nc)} adjusted intervals of the negative-control outcome(s) "
        f"{', '.join(sorted({n['outcome'] for n in nc}))} include the null.")})
    return out


CENSORING_GAP_PP = 10.0  # arms' shares censored at coverage end differing by more (our choice)


def censoring_gap(cohort: pd.DataFrame | None, protocol: Protocol) -> tuple[dict, float] | None:
    """Share of each arm whose primary-outcome follow-up ended at coverage end, and the largest
    difference between arms in percentage points (``None`` without the cohort's end reasons)."""
    by_arm = end_reasons_by_arm(cohort, protocol)
    if by_arm is None:
        return None
    share = {}
    for a, s in by_arm.items():
        if len(s):
            share[a] = 100.0 * float((s == "coverage_end").mean())
    if len(share) < 2:
        return None
    gap = max(share.values()) - min(share.values())
    return share, (0.0 if math.isnan(gap) else gap)


def glance(ctx: dict, raw: dict, protocol: Protocol, design: bool) -> dict:
    """Everything the panel shows."""
    prim = protocol.outcomes.primary
    return {"population": population(raw.get("cohort"), raw.get("positivity"), protocol),
            "outcome": outcome_name(prim),
            "outcome_kind": "measured" if isinstance(prim, MeasuredOutcome) else "time to event",
            "primary": None if design else primary_estimate(raw.get("estimates"), protocol),
            "diagnostics": diagnostics(ctx, design),
            "other_warnings": len([w for w in ctx["warnings"] if w["section"] == "results"])}
