"""Deviation days on the synthetic registry, person by person, against an independent reading.

``synthetic_cohort.adherence`` reads CONTRACTS §5b literally in numpy, dispensing by dispensing,
and ``synthetic_cohort.rules`` reads §3a (time zero, arm, ``end_day``); neither shares code with
``emulant.cohort`` (DuckDB). Every eligible person's stop, switch and deviation day and reason
must agree exactly.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import yaml

from emulant.cohort import build_cohort
from emulant.cohort.person_time import add_deviations
from emulant.extract import open_extract
from emulant.protocol import load_protocol
from synthetic_cohort import adherence, rules
from synthetic_cohort.generate import write_synthetic
from synthetic_cohort.records import NONE, read_tables


@pytest.fixture(scope="module")
def both(tmp_path_factory):
    out = tmp_path_factory.mktemp("synth_pt")
    write_synthetic(out, persons=3000, seed=7)
    d = yaml.safe_load((out / "protocol.yaml").read_text())
    d["strategies"]["arms"]["kestrel"]["sustain"] = {"gap_days": 30}
    d["strategies"]["arms"]["plover"]["sustain"] = {"gap_days": 60}
    d["contrasts"] = ["intention_to_treat", "per_protocol"]
    (out / "pp.yaml").write_text(yaml.safe_dump(d, sort_keys=False))
    protocol = load_protocol(out / "pp.yaml")
    ex = open_extract(out, protocol)
    ours = add_deviations(ex, protocol, build_cohort(ex, protocol).cohort)

    t = rules.plausible(read_tables(out))
    cohort = rules.eligibility(read_tables(out), protocol)
    t0 = np.where(cohort.eligible, cohort.t0, NONE)
    arm = np.where(cohort.eligible, cohort.arm, -1)
    end, _ = rules.follow_up(t, protocol, protocol.outcomes.primary, t0)
    ref = adherence.deviations(t, protocol, t0, arm, end)
    idx = np.flatnonzero(cohort.eligible)
    width = len(ours["person_id"].iloc[0]) - 1

    def col(x):
        return pd.Series(x[idx]).where(x[idx] < NONE).astype("Int64")

    theirs = pd.DataFrame({
        "person_id": [f"P{i + 1:0{width}d}" for i in idx],
        "stop_day": col(ref["stop_day"]), "switch_day": col(ref["switch_day"]),
        "deviation_day": col(ref["deviation_day"]),
        "deviation_reason": np.asarray([None, "stopped", "switched"], object)[ref["reason"][idx] + 1],
        "end_day": end[idx]})
    return ours, theirs


def test_same_persons_and_follow_up(both):
    ours, theirs = both
    assert list(ours["person_id"]) == list(theirs["person_id"])
    assert (ours["end_day"].to_numpy() == theirs["end_day"].to_numpy()).all()


@pytest.mark.parametrize("column", ["stop_day", "switch_day", "deviation_day", "deviation_reason"])
def test_deviations_agree_person_by_person(both, column):
    ours, theirs = both
    a, b = ours[column].reset_index(drop=True), theirs[column].reset_index(drop=True)
    diff = ~((a == b).fillna(False) | (a.isna() & b.isna()))
    assert not diff.any(), pd.concat([ours.loc[diff.to_numpy(), ["person_id", column]],
                                      theirs.loc[diff.to_numpy(), [column]]], axis=1).head()


def test_the_registry_exercises_every_rule(both):
    ours, _ = both
    r = ours["deviation_reason"]
    # the synthetic refills give stops and switches, and some stay on protocol to the end
    assert (r == "stopped").sum() > 50 and (r == "switched").sum() > 20 and r.isna().sum() > 50
