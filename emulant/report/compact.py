"""The compact estimates table: one row per method and estimand, columns per horizon.

Each horizon shows the risk in each arm (percent), the risk difference (percentage points) and
the risk ratio, each with its interval, exactly as ``estimates.csv`` holds them; a measured
outcome shows the means and the mean difference. The full tidy table stays in the report, folded.
"""

from __future__ import annotations

from typing import Any

import pandas as pd

from emulant.protocol import Protocol, outcome_name
from emulant.report import fmt
from emulant.report.forest import SHORT_METHOD
from emulant.report.glance import percent, points, points_ci
from emulant.report.results import METHOD_LABEL, METHOD_ORDER, _order, small_event_arms


def _cell(value: str, interval: str) -> dict:
    return {"value": value, "ci": interval}


def _fmt(measure: str, r: Any) -> dict:
    if r is None:
        return _cell("", "")
    if fmt.missing(r.estimate):
        return _cell("not estimable", "")  # the full table gives the reason
    if measure == "risk":
        return _cell(percent(r.estimate), "" if fmt.missing(r.ci_low) else
                     f"{percent(r.ci_low)} to {percent(r.ci_high)}")
    if measure == "risk_difference":
        return _cell(points(r.estimate), points_ci(r.ci_low, r.ci_high))
    if measure in ("risk_ratio", "hazard_ratio"):
        return _cell(fmt.num(r.estimate, 2), "" if fmt.missing(r.ci_low) else
                     f"{fmt.num(r.ci_low, 2)} to {fmt.num(r.ci_high, 2)}")
    return _cell(fmt.sig(r.estimate), fmt.ci(r.ci_low, r.ci_high))


def compact_tables(est: pd.DataFrame, protocol: Protocol) -> list[dict]:
    """Per outcome: ``columns`` (horizon groups with their sub-columns) and ``rows``."""
    s = protocol.strategies
    arms = (s.treated, s.comparator)
    small = {o for o, _ in small_event_arms(est, protocol.report.min_cell)}
    out = []
    for o in [outcome_name(x) for x in protocol.outcomes.all()]:
        g = est[(est["outcome"].astype(str) == o) & (est["measure"] != "e_value")]
        if g.empty:
            continue
        if "contrast" in g.columns:  # the first contrast; the full table holds every one
            g = g[g["contrast"].fillna("").astype(str) == str(g["contrast"].fillna("").iloc[0])]
        measured = g["measure"].isin(["mean", "mean_difference"]).any()
        hz = sorted(pd.to_numeric(g["horizon_day"], errors="coerce").dropna().unique())
        subs = ([("mean", arms[0]), ("mean", arms[1]), ("mean_difference", None)] if measured
                else [("risk", arms[0]), ("risk", arms[1]), ("risk_difference", None),
                      ("risk_ratio", None)])
        groups = [(None, "")] if measured else [(h, f"day {h:g}") for h in hz]
        has_hr = (g["measure"] == "hazard_ratio").any()
        heads = {"risk": "{arm}", "mean": "mean, {arm}",
                 "risk_difference": "diff. (pp)", "mean_difference": "difference",
                 "risk_ratio": "ratio"}
        columns = [{"title": title, "subs": [heads[m].format(arm=a) for m, a in subs]}
                   for _, title in groups]
        if has_hr:
            columns.append({"title": "whole follow-up", "subs": ["hazard ratio"]})
        rows = []
        keys = g[["estimand", "method"]].fillna("").astype(str).drop_duplicates()
        keys = sorted(keys.itertuples(index=False), key=lambda k: (
            k.method != "unadjusted",
            list(protocol.estimands).index(k.estimand) if k.estimand in protocol.estimands else 9,
            _order(METHOD_ORDER, k.method)))
        for k in keys:
            if k.method == "unadjusted" and o in small:
                continue  # a crude risk would give a suppressed event count back
            gk = g[(g["estimand"].fillna("").astype(str) == k.estimand)
                   & (g["method"].astype(str) == k.method)]
            cells = []
            for h, _ in groups:
                gh = gk if h is None else gk[pd.to_numeric(gk["horizon_day"],
                                                           errors="coerce") == h]
                for m, a in subs:
                    pick = gh[gh["measure"] == m]
                    if a is not None:
                        pick = pick[(pick["arm"].astype(str) == a)
                                    & (pick["comparator"].fillna("").astype(str) == "")]
                    cells.append(_fmt(m, None if pick.empty else next(pick.itertuples())))
            if has_hr:
                pick = gk[gk["measure"] == "hazard_ratio"]
                cells.append(_fmt("hazard_ratio", None if pick.empty else
                                  next(pick.itertuples())))
            rows.append({"estimand": k.estimand or "—",
                         "method": SHORT_METHOD.get(k.method, k.method),
                         "method_long": METHOD_LABEL.get(k.method, k.method), "cells": cells})
        out.append({"outcome": o, "role": protocol.outcomes.role(o).replace("_", " "),
                    "columns": columns, "rows": rows, "crude_hidden": o in small,
                    "contrast": fmt.label(str(g["contrast"].iloc[0])) if "contrast" in g else ""})
    return out
