"""The clone design in the report (CONTRACTS §5d): what the target-trial table says of its design
and time zero, the flow of clones (how many left each arm, when and why), the warning when an arm
keeps fewer than ``min_cell`` persons on protocol, and the assumptions the design adds.

Everything is read from results files (``cohort.parquet``, ``adherence.csv``) and the protocol.
"""

from __future__ import annotations

from typing import Any

import pandas as pd

from emulant.protocol import Protocol
from emulant.protocol.model import Arm
from emulant.report import disclosure as dc
from emulant.report import fmt

REASON_WORDS = {"started_early": "started before the window", "not_started": "not started by the window's end",
                "started": "started (a none arm)", "stopped": "stopped", "switched": "switched"}


def is_clone(p: Protocol) -> bool:
    return p.strategies.design == "clone"


def arm_words(p: Protocol, arm: Arm, concept) -> str:
    """One arm's strategy in words (``concept`` names a concept with its codes)."""
    if not arm.starts:
        others = ", ".join(concept(p, c) for c in p.strategies.initiating_concepts)
        return f"{arm.name}: start none of {others}"
    if arm.start_within is not None:
        a, b = arm.start_within
        return f"{arm.name}: start {concept(p, arm.initiate)} on days {a} to {b} after time zero"
    return f"{arm.name}: initiate {concept(p, arm.initiate)}"


def emulation(p: Protocol, concept) -> dict[str, str]:
    """The target-trial table's rows that the clone design words differently."""
    s = p.strategies
    arms = "; ".join(arm_words(p, a, concept) for a in s.arms)
    sustain = "; ".join(f"{a.name} also stops after a supply gap of more than {a.sustain.gap_days} days"
                        for a in s.arms if a.sustain is not None)
    return {
        "strategies": (f"Design clone. {arms}.{' ' + sustain + '.' if sustain else ''} New users: no "
                       f"record of any arm's concept in the {s.washout_days} days before time zero."),
        "assignment": ("None at time zero: every eligible person is cloned into every arm and each "
                       "clone is followed until it deviates from its arm's strategy (clone–censor–"
                       "weight). The clones of one person share their baseline, so baseline "
                       "weights are 1; the clones that stay are weighted by the inverse probability "
                       "of staying given baseline and time-varying covariates."),
        "time_zero": (f"The first record of {concept(p, s.index)} inside the entry window (the index "
                      "event): eligibility is assessed and every clone's follow-up started on that "
                      "day (day 0); a person is tested once, at that record."),
    }


def leaving_by_period(adh: pd.DataFrame | None, p: Protocol) -> dict | None:
    """Clones leaving each arm per period (``adherence.csv``, first estimand), counts
    disclosure-controlled; rows after the last period anyone left are left out."""
    if adh is None or not len(adh):
        return None
    m = p.report.min_cell
    first = adh[adh["estimand"] == adh["estimand"].iloc[0]]
    arms = list(p.strategies.arm_names)
    rows = []
    for k, g in first.groupby("period", sort=True):
        by_arm = {str(r.arm): int(r.deviating) for r in g.itertuples(index=False)}
        rows.append({"period": fmt.integer(k), "day": fmt.integer(g["start_day"].iloc[0]),
                     "cells": [dc.show_count(by_arm.get(a, 0), m) for a in arms],
                     "any": sum(by_arm.values()) > 0})
    while rows and not rows[-1]["any"]:
        rows.pop()
    return {"arms": arms, "rows": rows}


def on_protocol_after_window(cohort: pd.DataFrame | None, p: Protocol) -> dict[str, int]:
    """Per arm, the clones still followed and on protocol on the day after the arm's window (a
    ``none`` arm: after the longest window), i.e. those the arm's estimate rests on."""
    if cohort is None or "deviation_day" not in cohort.columns:
        return {}
    last = max((a.start_within[1] for a in p.strategies.arms if a.start_within), default=0)
    out = {}
    for a in p.strategies.arms:
        day = (a.start_within[1] if a.start_within else last) + 1
        g = cohort[cohort["arm"].astype(str) == a.name]
        dev = pd.to_numeric(g["deviation_day"], errors="coerce")
        on = (dev.isna() | (dev > day)) & (pd.to_numeric(g["end_day"], errors="coerce") > day)
        out[a.name] = int(on.sum())
    return out


def warnings(cohort: pd.DataFrame | None, p: Protocol) -> list[str]:
    """An arm that keeps fewer than ``min_cell`` persons on protocol past its window."""
    m = p.report.min_cell
    out = []
    for arm, n in on_protocol_after_window(cohort, p).items():
        if n < m:
            out.append(f"Arm {arm} keeps {dc.show_count(n, m)} persons on protocol past its window "
                       f"(fewer than {m}): its per-protocol estimate rests on too few persons to be "
                       "read; consider a wider window or a larger extract.")
    return out


def assumptions(p: Protocol, cohort: pd.DataFrame | None, section: dict | None) -> list[dict]:
    """The two assumptions the clone design adds, each with this run's evidence."""
    m = p.report.min_cell
    kept = on_protocol_after_window(cohort, p)
    tv = [c.name for c in p.time_varying]
    windows = [a for a in p.strategies.arms if a.start_within]
    ev = [f"{a.name}: {dc.show_count(kept.get(a.name, 0), m)} persons on protocol after day "
          f"{a.start_within[1]}" for a in windows]
    return [
        {"id": "clone-positivity", "name": "Positivity of starting in the window at each period",
         "statement": ("Every clone not yet started, whatever its history, has a non-zero "
                       "probability of starting in each period of its arm's window, above all in "
                       "the window's last period, whose starters stand for every clone not started "
                       "by then."),
         "evidence": ev + (section["weight_warnings"] if section else []),
         "threat": any(kept.get(a.name, 0) < m for a in windows) or bool(section and section["weight_warnings"])},
        {"id": "clone-exchangeability", "name": "No unmeasured time-varying confounding of starting",
         "statement": ("Given the baseline covariates and the time-varying covariates measured at "
                       "the start of each period, starting (or not) does not depend on the "
                       "outcome's other causes."),
         "evidence": [f"Time-varying covariates: {', '.join(tv) if tv else 'none named'}; "
                      f"re-measured every {p.analysis.period_days} days."],
         "threat": not tv},
    ]


def section(raw: dict[str, Any], p: Protocol, pp: dict | None) -> dict | None:
    """The clone flow for the per-protocol section (None outside the clone design)."""
    if not is_clone(p):
        return None
    return {"leaving": leaving_by_period(raw.get("adherence"), p),
            "reasons": REASON_WORDS,
            "warnings": warnings(raw.get("cohort"), p)}
