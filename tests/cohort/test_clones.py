"""The clone design's cohort (CONTRACTS §5d): index-event time zero, eligibility, one row per
person and arm, each clone's deviation day and reason.

The extract is hand-made and invented; every expected row below is computed by hand from the
contract's rules, written beside the records that drive it (no outside source: the contract is
the reference for these day rules). Time zero T is each person's index date; the early arm must
start kestrel in days 10..60 and sustain it (gap 30 days, switch: rescue); the never arm must not
start it.
"""

from __future__ import annotations

import datetime as dt

import pandas as pd
import pytest
from tiny_extract import write_extract, write_protocol

from emulant.cohort import CohortError, build_cohort
from emulant.cohort.person_time import deviation_counts
from emulant.extract import open_extract
from emulant.protocol import load_protocol

T = dt.date(2018, 3, 1)


def day(k: int, t: dt.date = T) -> str:
    return (t + dt.timedelta(days=k)).isoformat()


def clone_protocol() -> dict:
    return {
        "study": {"id": "clone-test"},
        "concepts": {
            "kestrel": {"source": "dispensings", "codes": ["KS1"]},
            "rescue": {"source": "dispensings", "codes": ["RS1"]},
            "acute": {"source": "diagnoses", "codes": ["AC1"]},
            "outcome": {"source": "diagnoses", "codes": ["OU1"]},
        },
        "eligibility": {"entry": {"start": "2018-01-01", "end": "2019-12-31"}, "age": {"min": 40},
                        "coverage_before_days": 365},
        "strategies": {"design": "clone", "index": {"concept": "acute"}, "washout_days": 365,
                       "arms": {"early": {"initiate": "kestrel", "start_within": [10, 60],
                                          "sustain": {"gap_days": 30, "switch": ["rescue"]}},
                                "never": {"initiate": "none"}}},
        "follow_up": {"max_days": 365},
        "outcomes": {"primary": "outcome", "competing": ["death"]},
        "covariates": [{"name": "age", "builtin": "age"}, {"name": "sex", "builtin": "sex"}],
        "analysis": {"horizons_days": [180, 365], "period_days": 30, "methods": ["ipw", "standardization"]},
    }


def clone_tables() -> dict[str, pd.DataFrame]:
    ids = list(range(1, 14))
    persons = pd.DataFrame({"person_id": ids,
                            "birth_date": ["1960-01-01"] * 10 + ["1990-01-01", "1960-01-01", "1960-01-01"],
                            "sex": ["F", "M"] * 6 + ["F"]})
    coverage = pd.DataFrame({"person_id": ids, "start_date": ["2010-01-01"] * 13, "end_date": ["2023-12-31"] * 13})
    disp = [  # (person, day from T, code, days_supply)
        (1, 60, "KS1", 30),     # starts on the window's last day; supply to day 89, stops on 89+30+1 = 120
        (2, 61, "KS1", 30),     # the day after the window: early not_started on 61
        (3, 5, "KS1", 30),      # before the window opens (day 10): started_early on 5
        (5, -100, "KS1", 30),   # inside the washout: person 5 leaves at step washout
        (8, 20, "KS1", 30),     # supply to 49, stop would be 80 ...
        (8, 40, "RS1", 30),     # ... but rescue on day 40: switched on 40
        (9, 5, "RS1", 30),      # rescue before the start: not a switch (switches count after the start)
        (9, 15, "KS1", 400),    # supply to 414: the stop (445) is past max_days, no stop_day
        (12, 20, "KS1", 30),    # supply to 49: stops on 80 ...
        (12, 80, "RS1", 30),    # ... and rescue on 80: switched wins the tie
    ]
    dispensings = pd.DataFrame({"person_id": [r[0] for r in disp], "date": [day(r[1]) for r in disp],
                                "code": [r[2] for r in disp], "days_supply": [r[3] for r in disp]})
    dx = [(i, day(0), "AC1") for i in ids if i not in (6, 13)]   # 13 has no index event
    dx += [(6, "2017-06-01", "AC1"), (6, "2018-06-01", "AC1")]   # 6: the first inside the entry window
    dx += [(10, day(61), "OU1")]                                   # 10: outcome on day 61
    diagnoses = pd.DataFrame(dx, columns=["person_id", "date", "code"])
    deaths = pd.DataFrame({"person_id": [7], "date": [day(30)], "cause_code": ["X"]})  # 7 dies on day 30
    return {"persons": persons, "coverage": coverage, "dispensings": dispensings,
            "diagnoses": diagnoses, "deaths": deaths}


# (person, arm): (initiation_day, stop_day, switch_day, deviation_day, deviation_reason)
N = None
EXPECTED = {
    (1, "early"): (60, 120, N, 120, "stopped"), (1, "never"): (60, N, N, 60, "started"),
    (2, "early"): (61, N, N, 61, "not_started"), (2, "never"): (61, N, N, 61, "started"),
    (3, "early"): (5, N, N, 5, "started_early"), (3, "never"): (5, N, N, 5, "started"),
    (4, "early"): (N, N, N, 61, "not_started"), (4, "never"): (N, N, N, N, N),
    (6, "early"): (N, N, N, 61, "not_started"), (6, "never"): (N, N, N, N, N),
    # 7 dies on day 30: the not_started deviation (61) falls after the end of follow-up
    (7, "early"): (N, N, N, N, N), (7, "never"): (N, N, N, N, N),
    (8, "early"): (20, 80, 40, 40, "switched"), (8, "never"): (20, N, N, 20, "started"),
    (9, "early"): (15, N, N, N, N), (9, "never"): (15, N, N, 15, "started"),
    # 10: outcome and not_started on day 61: both kept (the estimators let the outcome count)
    (10, "early"): (N, N, N, 61, "not_started"), (10, "never"): (N, N, N, N, N),
    (12, "early"): (20, 80, 80, 80, "switched"), (12, "never"): (20, N, N, 20, "started"),
}


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("clones")
    p = load_protocol(write_protocol(tmp / "p", clone_protocol()))
    ex = open_extract(write_extract(tmp / "x", clone_tables()), p)
    return p, build_cohort(ex, p)


def _v(x):
    return None if pd.isna(x) else (int(x) if not isinstance(x, str) else x)


def test_attrition_counts_persons_through_indexed(built):
    _, res = built
    got = list(zip(res.attrition["step"], res.attrition["remaining"], strict=True))
    # 13 persons; 13 has no index event; 11 is 28 at time zero; 5 has kestrel in the washout
    assert got == [("persons", 13), ("indexed", 12), ("age", 11), ("coverage_before", 11), ("washout", 10)]


def test_one_row_per_person_and_arm(built):
    _, res = built
    c = res.cohort
    assert list(zip(c["person_id"], c["arm"], strict=True)) == list(EXPECTED)
    assert all(tuple(g) == ("early", "never") for _, g in c.groupby("person_id")["arm"])
    assert (c.loc[c["arm"] == "early", "treated"] == 1).all() and (c.loc[c["arm"] == "never", "treated"] == 0).all()
    # time zero is the first index record inside the entry window (person 6: 2018-06-01)
    tz = dict(zip(c["person_id"], pd.to_datetime(c["time_zero"]).dt.date, strict=False))
    assert tz[6] == dt.date(2018, 6, 1) and tz[1] == T
    # clones share the person's follow-up: 7 dies on day 30, 10 has the outcome on day 61
    ends = c.drop_duplicates("person_id").set_index("person_id")
    assert (ends.loc[7, "end_day"], ends.loc[7, "end_reason"]) == (30, "competing")
    assert (ends.loc[10, "end_day"], ends.loc[10, "end_reason"]) == (61, "outcome")


def test_every_clone_deviation_by_hand(built):
    _, res = built
    cols = ["initiation_day", "stop_day", "switch_day", "deviation_day", "deviation_reason"]
    got = {(r.person_id, r.arm): tuple(_v(getattr(r, k)) for k in cols) for r in res.cohort.itertuples()}
    assert got == EXPECTED


def test_deviation_counts_of_clones_by_reason(built):
    p, res = built
    flow = deviation_counts(res.cohort, p).set_index("arm")
    assert flow.loc["early"].to_dict() == {"persons": 10, "started_early": 1, "not_started": 4, "started": 0,
                                           "stopped": 1, "switched": 2, "on_protocol_throughout": 2}
    assert flow.loc["never", "started"] == 6 and flow.loc["never", "on_protocol_throughout"] == 4


def test_steps_only_gives_the_attrition(built, tmp_path):
    p, res = built
    ex = open_extract(write_extract(tmp_path / "x", clone_tables()), p)
    only = build_cohort(ex, p, steps_only=True)
    assert only.cohort is None and only.attrition.equals(res.attrition)


def test_empty_cohort_names_the_step(tmp_path):
    d = clone_protocol()
    d["eligibility"]["age"] = {"min": 90}
    p = load_protocol(write_protocol(tmp_path / "p", d))
    with pytest.raises(CohortError, match="step 'age'"):
        build_cohort(open_extract(write_extract(tmp_path / "x", clone_tables()), p), p)
