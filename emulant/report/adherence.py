"""The per-protocol section: staying on protocol by arm, deviations by reason, the weights over
time, intention-to-treat and per-protocol estimates side by side, and the extra assumptions.

Everything is read from results files (``adherence.csv``, ``estimates.csv``, ``curves.csv``,
``cohort.parquet``); nothing is re-estimated here.
"""

from __future__ import annotations

import math
from typing import Any

import pandas as pd

from emulant.protocol import Protocol
from emulant.report import disclosure as dc
from emulant.report import fmt
from emulant.report.results import METHOD_LABEL, METHOD_ORDER, _num, _order

PER_PROTOCOL, ITT = "per_protocol", "intention_to_treat"
WEIGHT_MEAN_RANGE = (0.8, 1.25)  # a mean of stabilised weights outside it is flagged (common practice)


def on_protocol(adh: pd.DataFrame, protocol: Protocol) -> list[dict]:
    """Share still on protocol among those under follow-up, per arm and period start day (the
    figure's series; periods with fewer than ``min_cell`` persons under follow-up end a line)."""
    m = protocol.report.min_cell
    first = adh[adh["estimand"] == adh["estimand"].iloc[0]]
    out = []
    for arm in protocol.strategies.arm_names:
        g = first[first["arm"].astype(str) == arm].sort_values("period")
        day, share = [], []
        for r in g.itertuples(index=False):
            if _num(r.persons) < m:
                break
            day.append(float(r.start_day))
            share.append(float(r.on_protocol) / float(r.persons))
        out.append({"name": arm, "day": day, "share": share})
    return out


def deviations(cohort: pd.DataFrame | None, protocol: Protocol) -> dict | None:
    """Persons by deviation reason (or none) and arm, counts disclosure-controlled."""
    if cohort is None or "deviation_reason" not in cohort.columns:
        return None
    m = protocol.report.min_cell
    arms = list(protocol.strategies.arm_names)
    reason = cohort["deviation_reason"].fillna("").astype(str).replace("", "none (followed throughout)")
    rows = []
    for r in sorted(reason.unique()):
        cells = []
        for a in arms:
            in_arm = cohort["arm"].astype(str) == a
            cells.append(dc.show_count(int(((reason == r) & in_arm).sum()), m))
        rows.append({"reason": r, "cells": cells})
    return {"arms": arms, "rows": rows}


def weight_rows(adh: pd.DataFrame, protocol: Protocol) -> tuple[list[dict], list[str]]:
    """The weights per estimand, arm and period, and a warning per arm whose mean leaves the range."""
    m = protocol.report.min_cell
    rows, warn = [], []
    lo, hi = WEIGHT_MEAN_RANGE
    for r in adh.sort_values(["estimand", "arm", "period"]).itertuples(index=False):
        if _num(r.on_protocol) < m:
            continue
        far = not math.isnan(_num(r.weight_mean)) and not lo <= r.weight_mean <= hi
        rows.append({"estimand": str(r.estimand), "arm": str(r.arm), "period": fmt.integer(r.period),
                     "day": fmt.integer(r.start_day), "on": dc.show_count(r.on_protocol, m),
                     "mean": fmt.num(r.weight_mean, 2), "p01": fmt.num(r.weight_p01, 2),
                     "p99": fmt.num(r.weight_p99, 2), "max": fmt.num(r.weight_max, 2),
                     "far": far})
        if far:
            text = (f"Per-protocol weights ({r.estimand}, {r.arm}): the mean is "
                    f"{fmt.num(r.weight_mean, 2)} in period {int(r.period)}, outside "
                    f"{lo:g}–{hi:g}; the treatment-process models may be misspecified or "
                    "staying on protocol is rare for some persons.")
            if not any(w.startswith(text.split(":")[0]) for w in warn):
                warn.append(text)
    return rows, warn


def side_by_side(est: pd.DataFrame, protocol: Protocol) -> list[dict]:
    """Risk differences and ratios of the primary outcome, intention to treat beside per protocol."""
    if "contrast" not in est.columns:
        return []
    o = str(protocol.outcomes.primary)
    g = est[(est["outcome"].astype(str) == o) & est["measure"].isin(["risk_difference", "risk_ratio"])]
    out = []
    keys = g[["estimand", "method", "measure", "horizon_day"]].drop_duplicates()
    keys = keys.assign(_m=[_order(METHOD_ORDER, x) for x in keys["method"]]).sort_values(
        ["estimand", "_m", "measure", "horizon_day"], na_position="first", kind="stable")
    for k in keys.itertuples(index=False):
        cells = {}
        for c in (ITT, PER_PROTOCOL):
            r = g[(g["contrast"] == c) & (g["method"] == k.method) & (g["measure"] == k.measure)
                  & (g["horizon_day"] == k.horizon_day)
                  & (g["estimand"].fillna("").astype(str) == ("" if fmt.missing(k.estimand) else str(k.estimand)))]
            cells[c] = ("", "") if r.empty else (fmt.sig(r.iloc[0].estimate, 3),
                                                 fmt.ci(r.iloc[0].ci_low, r.iloc[0].ci_high, 3))
        if cells[PER_PROTOCOL] == ("", ""):
            continue
        out.append({"estimand": "unadjusted" if fmt.missing(k.estimand) else str(k.estimand),
                    "method": METHOD_LABEL.get(k.method, str(k.method)),
                    "measure": str(k.measure).replace("_", " "),
                    "horizon": fmt.integer(k.horizon_day),
                    "itt": cells[ITT][0], "itt_ci": cells[ITT][1],
                    "pp": cells[PER_PROTOCOL][0], "pp_ci": cells[PER_PROTOCOL][1]})
    return out


def assumptions(protocol: Protocol, section: dict | None) -> list[dict]:
    """The assumptions per protocol adds, each tied to this run's evidence."""
    tv = [c.name for c in protocol.time_varying]
    ev_w = section["weight_warnings"] if section else []
    return [
        {"id": "pp-exchangeability", "name": "No unmeasured time-varying confounding of adherence",
         "statement": ("Given the baseline covariates and the time-varying covariates measured at "
                       "the start of each period, staying on protocol does not depend on the "
                       "outcome's other causes."),
         "evidence": [f"Time-varying covariates: {', '.join(tv) if tv else 'none named'}; "
                      f"re-measured every {protocol.analysis.period_days} days."],
         "threat": not tv},
        {"id": "pp-positivity", "name": "Positivity of staying on protocol",
         "statement": ("Every person, whatever their history, has a non-zero probability of "
                       "staying on their arm's strategy in every period."),
         "evidence": ev_w or ["The mean weight per arm and period stays within "
                              f"{WEIGHT_MEAN_RANGE[0]:g}–{WEIGHT_MEAN_RANGE[1]:g} "
                              "(see the per-protocol section's weights table)."],
         "threat": bool(ev_w)},
        {"id": "pp-models", "name": "Correct treatment-process models",
         "statement": ("The pooled logistic models of staying on protocol (by arm; period spline, "
                       "baseline and time-varying covariates) describe how persons deviate; the "
                       "weights are constant within a period, so a deviation inside a period is "
                       "handled to within one period."),
         "evidence": [f"Period length: {protocol.analysis.period_days} days; truncation: "
                      + (f"{protocol.analysis.weights.truncate[0]:g}–"
                         f"{protocol.analysis.weights.truncate[1]:g} quantiles"
                         if protocol.analysis.weights.truncate else "none") + "."],
         "threat": False},
    ]


def section(raw: dict[str, Any], protocol: Protocol) -> dict | None:
    """The per-protocol section's context, or None when the protocol does not ask for it."""
    if not protocol.per_protocol:
        return None
    adh, est = raw.get("adherence"), raw.get("estimates")
    out: dict[str, Any] = {"deviations": deviations(raw.get("cohort"), protocol),
                           "weights": [], "weight_warnings": [], "on_protocol": None,
                           "side_by_side": side_by_side(est, protocol)
                           if est is not None and ITT in protocol.contrasts else []}
    if adh is not None and len(adh):
        out["on_protocol"] = on_protocol(adh, protocol)
        out["weights"], out["weight_warnings"] = weight_rows(adh, protocol)
    return out
