"""The flow of a sequence of trials (CONTRACTS §5c): how many trials, persons per trial by arm,
and how many persons took part in several trials.

Read from ``cohort.parquet`` (one row per person-trial, with ``trial`` and ``time_zero``) and
``attrition.csv`` (``persons`` beside the person-trials); every count passes through the
disclosure rule and trial starts are shown by month.
"""

from __future__ import annotations

import pandas as pd

from emulant.protocol import Protocol
from emulant.report import disclosure as dc


def trials_section(cohort: pd.DataFrame | None, protocol: Protocol) -> dict | None:
    """None unless the cohort holds person-trials."""
    if cohort is None or "trial" not in cohort.columns or len(cohort) == 0:
        return None
    m = protocol.report.min_cell
    arms = list(protocol.strategies.arm_names)
    rows = []
    for trial, g in cohort.groupby("trial", sort=True):
        start = pd.Timestamp(g["time_zero"].iloc[0]).strftime("%Y-%m")
        rows.append({"trial": int(trial), "month": start,
                     "cells": [dc.show_count(int((g["arm"].astype(str) == a).sum()), m)
                               for a in arms]})
    per_person = cohort.groupby("person_id")["trial"].nunique()
    weighted = "sample_weight" in cohort.columns and (cohort["sample_weight"] != 1).any()
    return {"arms": arms, "rows": rows, "n_trials": len(rows),
            "person_trials": dc.show_count(len(cohort), m),
            "persons": dc.show_count(int(per_person.size), m),
            "several": dc.show_count(int((per_person > 1).sum()), m),
            "most": int(per_person.max()) if int((per_person == per_person.max()).sum()) >= m
            else None,
            "sampled": weighted}


def is_sequential(p: Protocol) -> bool:
    return p.strategies.design == "sequential"


def emulation(p: Protocol, concept) -> dict[str, str]:
    """The target-trial table's words for the sequential design: its design and time zero."""
    st, e = p.strategies, p.eligibility
    start = next(a for a in st.arms if a.initiate)
    none = next(a for a in st.arms if not a.initiate)
    k = st.trial_every_days
    sample = ("" if st.noninitiator_sample >= 1 else
              f" Non-initiators of each trial are sampled at a share of "
              f"{st.noninitiator_sample:g} (weight {1 / st.noninitiator_sample:g}), drawn from "
              f"the bootstrap seed.")
    return {
        "strategies": (f"Design sequential: a trial starts every {k} days. {start.name}: start "
                       f"{concept(p, start.initiate)} within days 0 to {k - 1} of the trial; "
                       f"{none.name}: do not start it in those days. New users: no record of "
                       f"{start.initiate} in the {st.washout_days} days before the trial's start. "
                       f"Treated arm (defines the ATT): {st.treated}."),
        "time_zero": (f"The start of each trial: {e.entry_start} and every {k} days after it up "
                      f"to {e.entry_end}. Eligibility is assessed and follow-up starts on that "
                      "day; a person is a candidate of every trial whose steps they pass, so "
                      "one person may be in several trials (as a non-initiator until the trial "
                      "in which they start); the bootstrap resamples persons with all their "
                      "trials." + sample),
    }
