"""Outcome sections: estimates tables, risk curves with numbers at risk, censoring, bootstrap.

Never called for the outcome-blind design report.
"""

from __future__ import annotations

import math
from typing import Any

import pandas as pd

from emulant import columns as col
from emulant.protocol import Protocol, outcome_name
from emulant.report import disclosure as dc
from emulant.report import fmt
from emulant.report.curve_steps import events_by_day, pooled_steps
from emulant.wording import hazard_ratio_label

METHOD_ORDER = ("unadjusted", "ipw", "standardization", "doubly_robust", "gformula")
MEASURE_ORDER = ("risk", "risk_difference", "risk_ratio", "hazard_ratio", "mean",
                 "mean_difference", "rate", "e_value")
MEASURE_LABEL = {
    "risk": "risk", "risk_difference": "risk difference", "risk_ratio": "risk ratio",
    "hazard_ratio": "hazard ratio", "mean": "mean", "mean_difference": "mean difference",
    "rate": "rate per 1,000 person-years", "e_value": "E-value (point; CI limit)",
}
METHOD_LABEL = {"unadjusted": "unadjusted", "ipw": "inverse probability weighting",
                "standardization": "standardization (g-formula)",
                "doubly_robust": "doubly robust (AIPW)",
                "gformula": "parametric g-formula (time-varying)"}
NULL = {"risk_difference": 0.0, "mean_difference": 0.0, "risk_ratio": 1.0, "hazard_ratio": 1.0}


def _order(seq: tuple[str, ...], v: Any) -> int:
    return seq.index(v) if v in seq else len(seq)


def _num(x: Any) -> float:
    return float("nan") if fmt.missing(x) else float(x)


def small_event_arms(est: pd.DataFrame, min_cell: int) -> set[tuple[str, str]]:
    """(outcome, arm) pairs whose crude event count or its complement is suppressed."""
    out = set()
    single = est[(est["measure"].isin(["risk", "rate"])) & (est["comparator"].fillna("") == "")]
    for r in single.itertuples(index=False):
        ev, n = _num(r.events), _num(r.n)
        if not math.isnan(ev) and not math.isnan(n) and dc.suppress_binary(ev, n, min_cell):
            out.add((str(r.outcome), str(r.arm)))
    return out


def of_contrast(df: pd.DataFrame, contrast: str) -> pd.DataFrame:
    """The rows of one contrast (all rows when the file has no ``contrast`` column)."""
    if "contrast" not in df.columns:
        return df if contrast == "intention_to_treat" else df.iloc[0:0]
    return df[df["contrast"].fillna("intention_to_treat").astype(str) == contrast]


def estimates(est: pd.DataFrame, protocol: Protocol,
              contrast: str = "intention_to_treat") -> list[dict]:
    """Estimates of one contrast grouped by outcome, then estimand (unadjusted first), rows by
    method/horizon.

    A crude estimate of an outcome is not shown when an arm's crude event count is suppressed
    (it would give the count back as risk x n).
    """
    est = of_contrast(est, contrast)
    m = protocol.report.min_cell
    names = [outcome_name(o) for o in protocol.outcomes.all()]
    names += [o for o in pd.unique(est["outcome"].astype(str)) if o not in names]
    small = small_event_arms(est, m)
    out = []
    for o in names:
        g = est[est["outcome"].astype(str) == o]
        if g.empty:
            continue
        hide_crude = any(oo == o for oo, _ in small)
        groups = []
        ests = [""] + [e for e in protocol.estimands] + sorted(
            {str(e) for e in g["estimand"].dropna()} - set(protocol.estimands))
        for e in ests:
            ge = g[g["estimand"].fillna("").astype(str) == e]
            if ge.empty:
                continue
            ge = ge.assign(
                _m=[_order(METHOD_ORDER, x) for x in ge["method"]],
                _q=[_order(MEASURE_ORDER, x) for x in ge["measure"]],
                _h=pd.to_numeric(ge["horizon_day"], errors="coerce").fillna(1e9),
            ).sort_values(["_m", "_h", "_q", "arm"], kind="stable")
            rows = [_row(r, m, hide_crude, protocol) for r in ge.itertuples(index=False)]
            groups.append({"estimand": e or "unadjusted (no weighting)", "rows": rows})
        out.append({"outcome": o, "role": protocol.outcomes.role(o).replace("_", " "),
                    "groups": groups, "crude_hidden": hide_crude})
    return out


def _row(r: Any, m: int, hide_crude: bool, protocol: Protocol) -> dict:
    arms = str(r.arm) if fmt.missing(r.comparator) else f"{r.arm} vs {r.comparator}"
    n, ev = _num(r.n), _num(r.events)
    ev_hidden = (not math.isnan(ev) and not math.isnan(n) and dc.suppress_binary(ev, n, m)
                 and not dc.is_small(ev, m))
    hidden = hide_crude and r.method == "unadjusted"
    note = fmt.text(getattr(r, "note", None))
    if fmt.missing(r.estimate) and note:
        val, interval = "", ""  # the note says "not estimable: <why>"
    elif r.measure == "e_value":
        val = f"{fmt.num(r.estimate, 2)}; {fmt.num(r.ci_low, 2)}"
        interval = ""
    else:
        digits = 3
        val, interval = fmt.sig(r.estimate, digits), fmt.ci(r.ci_low, r.ci_high, digits)
    return {
        "note": "" if hidden else note,
        "method": METHOD_LABEL.get(r.method, str(r.method)),
        "measure": measure_label(r.measure, protocol),
        "horizon": "" if fmt.missing(r.horizon_day) else fmt.integer(r.horizon_day),
        "arms": arms,
        "estimate": "not shown" if hidden else val,
        "ci": "" if hidden else interval,
        "n": dc.show_count(n, m) if not math.isnan(n) else "",
        "events": dc.show_count(ev, m, ev_hidden) if not math.isnan(ev) else "",
    }


def measure_label(measure: str, protocol: Protocol) -> str:
    """The measure in words; a hazard ratio says whether it is cause-specific."""
    if measure == "hazard_ratio":
        return hazard_ratio_label(protocol)
    return MEASURE_LABEL.get(measure, str(measure))


def negative_controls(est: pd.DataFrame | None, protocol: Protocol) -> list[dict]:
    """Adjusted contrast estimates of each negative-control outcome and whether the interval
    holds the null.

    A negative-control outcome should not be affected by the strategies, so an adjusted interval
    that excludes the null points to residual confounding (Lipsitch, Tchetgen Tchetgen & Cohen,
    2010, Epidemiology 21:383-388). The unadjusted comparison is expected to be confounded (that
    is why the analysis adjusts) and says nothing about what adjustment left: it is not listed.
    """
    out = []
    if est is None:
        return out
    est = of_contrast(est, "intention_to_treat")
    for o in protocol.outcomes.negative_controls:
        g = est[(est["outcome"].astype(str) == o) & est["measure"].isin(list(NULL))
                & (est["method"].astype(str) != "unadjusted")]
        for r in g.itertuples(index=False):
            lo, hi, null = _num(r.ci_low), _num(r.ci_high), NULL[r.measure]
            holds = None if math.isnan(lo) or math.isnan(hi) else bool(lo <= null <= hi)
            out.append({"outcome": o, "estimand": fmt.text(r.estimand) or "unadjusted",
                        "method": METHOD_LABEL.get(r.method, str(r.method)),
                        "measure": measure_label(r.measure, protocol),
                        "horizon": "" if fmt.missing(r.horizon_day) else fmt.integer(r.horizon_day),
                        "estimate": fmt.sig(r.estimate), "ci": fmt.ci(r.ci_low, r.ci_high),
                        "includes_null": holds})
    return out


def curves(cv: pd.DataFrame, protocol: Protocol, cohort: pd.DataFrame | None = None,
           contrast: str = "intention_to_treat") -> list[dict]:
    """Risk curves of the primary outcome of one contrast per estimand (a figure each, a panel per method).

    Each arm's curve keeps the days :func:`curve_steps.pooled_steps` allows (a step only where
    it pools at least ``min_cell`` events; none without the cohort's follow-up columns). Returns
    dicts with ``estimand``, ``panels`` (for :func:`figures.curves_figure`), ``grid`` (days of
    the numbers at risk, as text), ``ticks`` (the same days as numbers) and ``at_risk``.
    """
    m = protocol.report.min_cell
    arms = list(protocol.strategies.arm_names)
    cv = of_contrast(cv, contrast)
    prim = outcome_name(protocol.outcomes.primary)
    if "outcome" in cv.columns:  # the primary outcome's curves; other outcomes are in curves.csv
        cv = cv[cv["outcome"].astype(str) == str(prim)]
        if cv.empty:
            return []
    grid = dc.coarse_grid(pd.to_numeric(cv["day"], errors="coerce").dropna().tolist(),
                          max_points=14)
    events = {a: events_by_day(cohort, protocol, str(prim), a) for a in arms}
    out = []
    ests = [""] + list(protocol.estimands)
    ests += sorted({str(e) for e in cv["estimand"].dropna()} - set(ests))
    for e in ests:
        ge = cv[cv["estimand"].fillna("").astype(str) == e]
        if ge.empty:
            continue
        methods = sorted(pd.unique(ge["method"].astype(str)), key=lambda x: _order(METHOD_ORDER, x))
        panels, risk_rows = [], None
        for meth in methods:
            gm = ge[ge["method"].astype(str) == meth]
            panel_arms, nar = [], []
            for a in arms:
                ga = gm[gm["arm"].astype(str) == a].copy()
                ga["day"] = pd.to_numeric(ga["day"], errors="coerce")
                ga = ga.dropna(subset=["day"]).sort_values("day").drop_duplicates("day")
                ar = [_num(x) for x in ga["at_risk"]]
                steps = (pooled_steps(ga["day"].tolist(), ar, events[a], m)
                         if events[a] is not None else [])
                keep = ga.iloc[[i for i, _ in steps]]
                panel_arms.append({
                    "name": a, "day": keep["day"].tolist(),
                    "risk": [_num(x) for x in keep["risk"]],
                    "lo": [None if fmt.missing(x) else float(x) for x in keep["ci_low"]],
                    "hi": [None if fmt.missing(x) else float(x) for x in keep["ci_high"]],
                    "pooled": [k for _, k in steps],
                })
                at = dict(zip(ga["day"].tolist(), ar, strict=True))
                nar.append({"arm": a, "values": [dc.show_count(at.get(d), m) for d in grid]})
            panels.append({"title": METHOD_LABEL.get(meth, meth), "arms": panel_arms})
            if risk_rows is None:
                risk_rows = nar
        out.append({"estimand": e or "unadjusted", "panels": panels, "ticks": grid,
                    "grid": [fmt.integer(d) for d in grid], "at_risk": risk_rows or []})
    return out


def end_reasons_by_arm(cohort: pd.DataFrame | None, protocol: Protocol) -> dict[str, pd.Series] | None:
    """Each arm's end-of-follow-up reasons for the primary time-to-event outcome (``None``
    without a time-to-event primary outcome or the cohort's end reasons)."""
    prim = protocol.outcomes.primary
    if cohort is None or not isinstance(prim, str):
        return None
    reason = col.end_reason(prim) if col.end_reason(prim) in cohort else "end_reason"
    if reason not in cohort:
        return None
    return {a: cohort.loc[cohort["arm"].astype(str) == a, reason].astype(str)
            for a in protocol.strategies.arm_names}


def censoring(cohort: pd.DataFrame | None, protocol: Protocol) -> dict | None:
    """End-of-follow-up reasons by arm for the primary time-to-event outcome (suppressed)."""
    by_arm = end_reasons_by_arm(cohort, protocol)
    if by_arm is None:
        return None
    m = protocol.report.min_cell
    arms = list(by_arm)
    reasons = list(col.END_REASONS)
    table = []
    cells: dict[str, list[str]] = {}
    for a, s in by_arm.items():
        counts = [int((s == r).sum()) for r in reasons]
        hid = dc.suppress_cells(counts, m, not dc.is_small(len(s), m))
        cells[a] = [_cell(c, len(s), m, h) for c, h in zip(counts, hid, strict=True)]
    for i, r in enumerate(reasons):
        table.append({"reason": r.replace("_", " "), "cells": [cells[a][i] for a in arms]})
    return {"outcome": protocol.outcomes.primary, "arms": arms, "rows": table}


def _cell(n: int, total: int, m: int, hidden: bool) -> str:
    c = dc.show_count(n, m, hidden and not dc.is_small(n, m))
    p = dc.show_percent(n, total, m, hidden)
    return f"{c} ({p})" if p else c


def events_by_arm(cohort: pd.DataFrame | None, est: pd.DataFrame | None,
                  protocol: Protocol) -> dict[str, float]:
    """Primary-outcome events per arm: from the cohort's end reasons, else the crude estimates."""
    prim = protocol.outcomes.primary
    if not isinstance(prim, str):
        return {}
    if cohort is not None:
        reason = col.end_reason(prim) if col.end_reason(prim) in cohort else "end_reason"
        if reason in cohort:
            return {a: float((cohort.loc[cohort["arm"].astype(str) == a, reason] == "outcome")
                             .sum()) for a in protocol.strategies.arm_names}
    if est is not None:
        g = est[(est["outcome"].astype(str) == prim) & (est["measure"] == "risk")
                & (est["comparator"].fillna("") == "")]
        return {a: float(pd.to_numeric(g.loc[g["arm"].astype(str) == a, "events"],
                                       errors="coerce").max())
                for a in protocol.strategies.arm_names if (g["arm"].astype(str) == a).any()}
    return {}


def bootstrap(b: dict) -> dict:
    """The bootstrap's bookkeeping as text."""
    fails = b.get("failures") or []
    return {"requested": fmt.integer(b.get("requested")), "completed": fmt.integer(b.get("completed")),
            "failed": fmt.integer(b.get("failed")), "seed": fmt.text(b.get("seed")),
            "interval": fmt.text(b.get("interval")), "workers": fmt.text(b.get("workers")),
            "influence_rows": (fmt.integer(b["influence_rows"])
                               if b.get("variance") == "influence" else None),
            "failures": [str(f) for f in fails[:10]],
            "non_estimable": [
                f"{x.get('outcome')}, {x.get('estimand') or 'unadjusted'}, {x.get('method')}, "
                f"{x.get('measure')}{', day ' + fmt.integer(x['horizon_day']) if not fmt.missing(x.get('horizon_day')) else ''}: "
                f"{x.get('replicates')} of {x.get('of')} replicates not estimable"
                for x in (b.get("non_estimable") or [])]}


def measured_missing(cohort: pd.DataFrame | None, protocol: Protocol) -> list[dict]:
    """For each measured outcome: how missing values are handled and, by arm, how many were
    measured (counts under the disclosure rule)."""
    out = []
    m = protocol.report.min_cell
    for o in protocol.outcomes.measured():
        flag = col.measured(o.measure)
        arms = []
        if cohort is not None and flag in cohort:
            for a in protocol.strategies.arm_names:
                s = cohort.loc[cohort["arm"].astype(str) == a, flag]
                k, n = int(s.sum()), int(len(s))
                hide = dc.suppress_binary(k, n, m)
                arms.append(f"{a}: {dc.show_count(k, m, hide)} of {dc.show_count(n, m)} measured"
                            + (f" ({dc.show_percent(k, n, m, hide)})" if not hide else ""))
        died = col.died_before(o.measure)
        if cohort is not None and died in cohort:
            cells = []
            for a in protocol.strategies.arm_names:
                s = cohort.loc[cohort["arm"].astype(str) == a, died]
                k, n = int(s.sum()), int(len(s))
                hide = dc.suppress_binary(k, n, m)
                cells.append(f"{a} {dc.show_count(k, m, hide)} of {dc.show_count(n, m)}")
            arms.append(f"Died before day {o.at_day}: {'; '.join(cells)}.")
        out.append({"outcome": o.measure, "missing": o.missing, "at_day": o.at_day,
                    "tolerance": o.tolerance_days, "arms": arms})
    return out
