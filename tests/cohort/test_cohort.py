"""The cohort rules of CONTRACTS §3a, one small handmade extract per rule and its edges.

Every expected value is a hand computation from the dates written in the test (day k of a person
is date - time zero in days); the day counts are spelled out in comments.
"""

from __future__ import annotations

import copy
from pathlib import Path

import pandas as pd
import pytest

from emulant.cohort import CohortError, build_cohort
from emulant.extract import open_extract
from emulant.protocol import parse_protocol

T0 = "2018-06-01"  # the usual time zero: day -365 is 2017-06-01, day -366 is 2017-05-31
BASE = {
    "study": {"id": "test"},
    "concepts": {
        "a": {"source": "dispensings", "codes": ["RXA"]},
        "b": {"source": "dispensings", "codes": ["RXB"]},
        "hf": {"source": "diagnoses", "codes": ["HF5"]},
        "lab": {"source": "measurements", "codes": ["LAB7"]},
    },
    "eligibility": {"entry": {"start": "2018-01-01", "end": "2021-12-31"},
                    "coverage_before_days": 365},
    "strategies": {"arms": {"arm_a": {"initiate": "a"}, "arm_b": {"initiate": "b"}},
                   "treated": "arm_a", "washout_days": 365},
    "follow_up": {"max_days": 1095, "administrative_end": "2022-12-31"},
    "outcomes": {"primary": "hf", "competing": ["death"]},
    "covariates": [],
    "analysis": {"horizons_days": [365]},
}
# two persons (born 1975-01-01) who pass every step, so neither arm is ever empty (901, 902)
FILLERS = {"dispensings": [(901, T0, "RXA1"), (902, T0, "RXB1")]}
COLUMNS = {
    "persons": "person_id,birth_date,sex,region",
    "coverage": "person_id,start_date,end_date",
    "deaths": "person_id,date",
    "dispensings": "person_id,date,code",
    "diagnoses": "person_id,date,code,setting",
    "measurements": "person_id,date,code,value",
}


def merge(base: dict, over: dict) -> dict:
    """``base`` with ``over`` merged in, mapping by mapping."""
    out = copy.deepcopy(base)
    for k, v in over.items():
        out[k] = merge(out[k], v) if isinstance(v, dict) and isinstance(out.get(k), dict) else v
    return out


def write_extract(folder: Path, **tables: list[tuple]) -> Path:
    """Write each table as CSV (rows as tuples, shorter rows padded with empty fields)."""
    folder.mkdir(parents=True, exist_ok=True)
    for name, rows in tables.items():
        header = COLUMNS[name]
        n = header.count(",") + 1
        pad = [(*r, *[""] * (n - len(r))) for r in rows]
        lines = [header] + [",".join("" if x is None else str(x) for x in r) for r in pad]
        (folder / f"{name}.csv").write_text("\n".join(lines) + "\n")
    return folder


def run(tmp_path, persons=(), disp=(), diag=(), deaths=(), meas=(), coverage=None, proto=None,
        steps_only=False, fillers=True):
    """Build the cohort of a handmade extract. ``persons`` rows are (id[, birth, sex, region]);
    a missing birth date is 1960-01-01, every person is covered 2000-01-01..2030-12-31 unless
    ``coverage`` gives their periods."""
    fill = FILLERS if fillers else {"dispensings": []}
    rows = [(r[0], *(r[1:] if len(r) > 1 else ("1960-01-01",)), *(("F",) if len(r) < 3 else ()))
            for r in [(x,) if not isinstance(x, tuple) else x for x in persons]]
    ids = [r[0] for r in rows] + ([901, 902] if fillers else [])
    rows += [(901, "1975-01-01", "F"), (902, "1975-01-01", "M")] if fillers else []
    cov = list(coverage or [])
    covered = {c[0] for c in cov}
    cov += [(i, "2000-01-01", "2030-12-31") for i in ids if i not in covered]
    folder = write_extract(tmp_path / "extract", persons=rows, coverage=cov, deaths=list(deaths),
                           dispensings=list(disp) + fill["dispensings"], diagnoses=list(diag),
                           measurements=list(meas))
    protocol = parse_protocol(merge(BASE, proto or {}), tmp_path)
    return build_cohort(open_extract(folder, protocol, {"threads": 1}), protocol, steps_only)


def ids(res) -> list[int]:
    return [int(x) for x in res.cohort.person_id if int(x) < 900]


def row(res, pid) -> pd.Series:
    c = res.cohort
    return c[c.person_id.astype(int) == pid].iloc[0]


def excluded(res, step) -> int:
    a = res.attrition
    return int(a.loc[a.step == step, "excluded"].iloc[0])


# ----------------------------------------------------------------------------- time zero, arms


def test_entry_window_ends_and_first_record_in_window(tmp_path):
    res = run(tmp_path, persons=[1, 2, 3, 4, 5], disp=[
        (1, "2018-01-01", "RXA1"),  # on the window's first day: in
        (2, "2021-12-31", "RXB1"),  # on its last day: in
        (3, "2017-12-31", "RXA1"),  # a day before: never initiated
        (4, "2022-01-01", "RXA1"),  # a day after: never initiated
        # time zero 2018-03-01 (the first record inside), so the earlier one is washout day -60
        (5, "2017-12-31", "RXA1"), (5, "2018-03-01", "RXA2"),
    ])
    assert ids(res) == [1, 2]
    assert str(row(res, 1).time_zero.date()) == "2018-01-01" and row(res, 1).arm == "arm_a"
    assert row(res, 2).arm == "arm_b" and row(res, 2).treated == 0 and row(res, 1).treated == 1
    assert excluded(res, "initiated") == 2 and excluded(res, "washout") == 1
    # 2021-12-31 to the administrative end 2022-12-31 is 365 days
    assert row(res, 2).end_day == 365 and row(res, 2).end_reason == "administrative_end"


def test_person_is_tested_once_at_first_record(tmp_path):
    # born 1978-06-15: 39 at the first record 2018-06-01, 40 at the second 2019-06-20; not retried
    res = run(tmp_path, persons=[(1, "1978-06-15")],
              disp=[(1, T0, "RXA1"), (1, "2019-06-20", "RXA1")],
              proto={"eligibility": {"age": {"min": 40}}})
    assert ids(res) == [] and excluded(res, "age") == 1


@pytest.mark.parametrize("rule, kept", [("exclude", []), ("first_listed", [1])])
def test_same_day_arms(tmp_path, rule, kept):
    res = run(tmp_path, persons=[1, 2], disp=[
        (1, T0, "RXA1"), (1, T0, "RXB1"),  # both arms on day 0
        (2, T0, "RXB1"), (2, "2018-06-02", "RXA1"),  # the other arm on day 1: arm_b, not same-day
    ], proto={"strategies": {"same_day": rule}})
    assert ids(res) == [*kept, 2]
    assert excluded(res, "same_day") == (1 if rule == "exclude" else 0)
    assert row(res, 2).arm == "arm_b"
    if kept:
        assert row(res, 1).arm == "arm_a"


@pytest.mark.parametrize("birth, t0, age", [
    ("1978-06-01", T0, 40),  # on the 40th birthday
    ("1978-06-02", T0, 39),  # the day before it
    ("1972-02-29", "2018-02-28", 45),  # born 29 Feb: the birthday falls on 1 March in 2018
    ("1972-02-29", "2018-03-01", 46),
    ("1976-02-29", "2020-02-29", 44),  # a leap year: on the day itself
])
def test_birthday_rule(tmp_path, birth, t0, age):
    res = run(tmp_path, persons=[(1, birth)], disp=[(1, t0, "RXA1")],
              proto={"covariates": [{"name": "age", "builtin": "age"}],
                     "eligibility": {"age": {"min": 40, "max": 45}}})
    assert (ids(res) == [1]) == (40 <= age <= 45)
    if 40 <= age <= 45:
        assert row(res, 1)["age"] == age


def test_age_max_edge(tmp_path):
    # max 85: 85 the day before the 86th birthday is in, on it out
    res = run(tmp_path, persons=[(1, "1932-06-02"), (2, "1932-06-01")],
              disp=[(1, T0, "RXA1"), (2, T0, "RXA1")], proto={"eligibility": {"age": {"max": 85}}})
    assert ids(res) == [1]
    assert res.attrition.loc[res.attrition.step == "age", "description"].iloc[0] == \
        "age at most 85 completed years at time zero"


# ----------------------------------------------------------------------------- coverage, washout


def test_coverage_before_merging_and_gaps(tmp_path):
    cov = [
        (1, "2017-06-01", "2020-12-31"),  # starts on day -365: in
        (2, "2017-06-02", "2020-12-31"),  # day -364: out
        (3, "2015-01-01", "2017-12-31"), (3, "2018-01-01", "2020-12-31"),  # touching: merged, in
        (4, "2015-01-01", "2017-12-30"), (4, "2017-12-31", "2020-12-31"),  # touching: in
        (5, "2015-01-01", "2017-12-30"), (5, "2018-01-01", "2020-12-31"),  # a one-day gap: out
        (6, "2015-01-01", "2019-12-31"), (6, "2016-01-01", "2016-02-01"),  # nested, then touching
        (6, "2020-01-01", "2020-06-30"),  # the running end is 2019-12-31, so this merges too
        (7, "2015-01-01", "2018-12-31"), (7, "2019-01-02", "2020-12-31"),  # a gap after day 0
        (8, "2015-01-01", "2018-05-31"),  # ends the day before time zero: out
    ]
    res = run(tmp_path, persons=range(1, 9), disp=[(i, T0, "RXA1") for i in range(1, 9)],
              coverage=cov)
    assert ids(res) == [1, 3, 4, 6, 7]
    assert excluded(res, "coverage_before") == 3
    # 2018-06-01 .. 2020-12-31 = 944 days; .. 2020-06-30 = 760; .. 2018-12-31 = 213
    assert row(res, 1).coverage_end_day == 944 and row(res, 3).coverage_end_day == 944
    assert row(res, 6).coverage_end_day == 760
    assert row(res, 7).coverage_end_day == 213
    assert (row(res, 7).end_day, row(res, 7).end_reason) == (213, "coverage_end")


def test_coverage_before_zero_needs_day_zero_only(tmp_path):
    res = run(tmp_path, persons=[1, 2], disp=[(1, T0, "RXA1"), (2, T0, "RXA1")],
              coverage=[(1, T0, "2019-12-31"), (2, "2018-06-02", "2019-12-31")],
              proto={"eligibility": {"coverage_before_days": 0}})
    assert ids(res) == [1]


def test_washout_ends(tmp_path):
    res = run(tmp_path, persons=[1, 2, 3, 4, 5], disp=[
        (1, T0, "RXA1"), (1, "2017-06-01", "RXB1"),  # other arm on day -365: out
        (2, T0, "RXA1"), (2, "2017-05-31", "RXB1"),  # day -366: in
        (3, T0, "RXA1"), (3, "2017-12-31", "RXA1"),  # own arm on day -152: out
        (4, T0, "RXA1"), (4, "2017-05-31", "RXA1"),  # own arm on day -366: in
        (5, T0, "RXB1"), (5, "2017-12-31", "RXC1"),  # an unrelated drug on day -152: in
    ])
    assert ids(res) == [2, 4, 5]
    assert excluded(res, "washout") == 2


# ----------------------------------------------------------------------------- require, exclude


def test_require_and_exclude_window_ends(tmp_path):
    proto = {"concepts": {"t2d": {"source": "diagnoses", "codes": ["DM2"]},
                          "mi": {"source": "diagnoses", "codes": ["MI1"]}},
             "eligibility": {"require": [{"concept": "t2d", "window": [-1825, 0]}],
                             "exclude": [{"concept": "mi", "window": [-1825, 0]}]}}
    diag = [
        (1, "2013-06-02", "DM2"),  # day -1825: in
        (2, "2013-06-01", "DM2"),  # day -1826: out at require
        (3, T0, "DM2"),  # day 0: in
        (4, "2018-06-02", "DM2"),  # day 1: out at require
        (5, T0, "DM2"), (5, "2013-06-02", "MI1"),  # exclusion on day -1825: out
        (6, T0, "DM2"), (6, "2013-06-01", "MI1"),  # exclusion on day -1826: in
        (7, T0, "DM2"), (7, T0, "MI1"),  # exclusion on day 0: out
        (8, T0, "DM2"), (8, "2018-06-02", "MI1"),  # exclusion on day 1: in
        (901, T0, "DM2"), (902, T0, "DM2"),
    ]
    res = run(tmp_path, persons=range(1, 9), disp=[(i, T0, "RXA1") for i in range(1, 9)],
              diag=diag, proto=proto)
    assert ids(res) == [1, 3, 6, 8]
    assert excluded(res, "require:t2d") == 2 and excluded(res, "exclude:mi") == 2
    steps = res.attrition.step.tolist()
    assert steps == ["persons", "initiated", "same_day", "age", "coverage_before", "washout",
                     "require:t2d", "exclude:mi"]


def test_prefix_exact_and_where(tmp_path):
    proto = {"concepts": {"b": {"source": "dispensings", "codes": ["RXB1"], "match": "exact"},
                          "hf": {"source": "diagnoses", "codes": ["HF5"],
                                 "where": {"setting": ["inpatient", "day_case"]}}}}
    disp = [(1, T0, "RXA1"), (2, T0, "RXB10"), (3, T0, "RXB1")]  # RXB10 is not exactly RXB1
    diag = [
        (1, "2018-06-02", "HF5.9", "outpatient"),  # day 1, wrong setting: not an outcome
        (1, "2018-06-03", "HF59", "day_case"),  # day 2: the outcome (HF5 prefix)
        (3, "2018-06-02", "HF6", "inpatient"), (3, "2018-06-03", "XHF5", "inpatient"),
        (3, "2018-06-04", "HF5", "inpatient"),  # only HF5 itself matches: day 3
    ]
    res = run(tmp_path, persons=[1, 2, 3], disp=disp, diag=diag, proto=proto)
    assert ids(res) == [1, 3]
    assert (row(res, 1).end_day, row(res, 1).end_reason) == (2, "outcome")
    assert (row(res, 3).end_day, row(res, 3).end_reason) == (3, "outcome")


# ----------------------------------------------------------------------------- follow-up


def test_outcome_day_zero_and_one_death_day_zero_and_ties(tmp_path):
    diag = [(1, T0, "HF5"), (1, "2018-07-01", "HF5"),  # day 0 is baseline; the outcome is day 30
            (2, "2018-06-02", "HF5"),  # day 1
            (4, "2018-06-11", "HF5")]  # day 10, the day of death: the outcome wins
    deaths = [(3, T0), (4, "2018-06-11"), (5, "2018-08-01")]  # 5: day 61
    res = run(tmp_path, persons=range(1, 6), disp=[(i, T0, "RXA1") for i in range(1, 6)],
              diag=diag, deaths=deaths)
    got = {i: (row(res, i).end_day, row(res, i).end_reason) for i in range(1, 6)}
    assert got == {1: (30, "outcome"), 2: (1, "outcome"), 3: (0, "competing"),
                   4: (10, "outcome"), 5: (61, "competing")}
    assert row(res, 1)["end_day__hf"] == 30 and row(res, 3)["end_reason__hf"] == "competing"


def test_no_competing_event_means_death_is_not_an_end(tmp_path):
    res = run(tmp_path, persons=[1], disp=[(1, T0, "RXA1")], deaths=[(1, "2018-08-01")],
              coverage=[(1, "2000-01-01", "2018-08-01")],
              proto={"outcomes": {"competing": []}})
    # coverage ends on the death date: day 61
    assert (row(res, 1).end_day, row(res, 1).end_reason) == (61, "coverage_end")


def test_administrative_end_and_max_days(tmp_path):
    # 2020-01-01 .. 2022-12-31 = 1095 days = max_days: a tie, administrative_end wins;
    # 2020-01-02: 1094, administrative end; 2019-12-31: 1096, so max_days (1095) ends it
    # Coverage that ends on a planned end is the planned end, not censoring (CONTRACTS §3a):
    # 4 and 5 end coverage on the administrative end, 6 on day 1095 = max_days; 7 a day before.
    disp = [(1, "2020-01-01", "RXA1"), (2, "2020-01-02", "RXA1"), (3, "2019-12-31", "RXA1"),
            (4, "2020-01-01", "RXA1"), (5, "2020-06-01", "RXA1"), (6, "2019-12-31", "RXA1"),
            (7, "2019-12-31", "RXA1")]
    cov = [(4, "2000-01-01", "2022-12-31"), (5, "2000-01-01", "2022-12-31"),
           (6, "2000-01-01", "2022-12-30"), (7, "2000-01-01", "2022-12-29")]
    res = run(tmp_path, persons=range(1, 8), disp=disp, coverage=cov)
    got = {i: (row(res, i).end_day, row(res, i).end_reason) for i in range(1, 8)}
    assert got == {1: (1095, "administrative_end"), 2: (1094, "administrative_end"),
                   3: (1095, "max_follow_up"), 4: (1095, "administrative_end"),
                   5: (943, "administrative_end"), 6: (1095, "max_follow_up"),
                   7: (1094, "coverage_end")}


def test_outcome_after_end_is_ignored_and_secondary_outcomes(tmp_path):
    proto = {"concepts": {"fx": {"source": "diagnoses", "codes": ["FX7"]}},
             "outcomes": {"negative_controls": ["fx"], "secondary": ["death"]},
             "follow_up": {"max_days": 100}, "analysis": {"horizons_days": [50]}}
    diag = [(1, "2018-09-10", "HF5"),  # day 101: after max_days
            (1, "2018-06-21", "FX7")]  # day 20
    res = run(tmp_path, persons=[1], disp=[(1, T0, "RXA1")], diag=diag, proto=proto,
              deaths=[(1, "2018-09-20")])
    r = row(res, 1)
    assert (r.end_day, r.end_reason) == (100, "max_follow_up")
    assert (r["end_day__fx"], r["end_reason__fx"]) == (20, "outcome")
    # death as an outcome: day 111 is past max_days
    assert (r["end_day__death"], r["end_reason__death"]) == (100, "max_follow_up")


# ----------------------------------------------------------------------------- measured outcomes


MEASURED = {"outcomes": {"primary": {"measure": "lab", "at_day": 365, "tolerance_days": 60}}}


def test_measured_outcome_nearest_tie_and_tolerance(tmp_path):
    # at_day 365 is 2019-06-01; the window is days 305 (2019-04-02) to 425 (2019-07-31)
    meas = [(1, "2019-05-31", "LAB7", 7.0), (1, "2019-06-02", "LAB7", 8.0),  # days 364, 366: tie
            (1, "2019-04-02", "LAB7", 1.0),
            (2, "2019-07-31", "LAB7", 6.5), (2, "2019-08-01", "LAB7", 9.9),  # day 425 in, 426 out
            (3, "2019-04-01", "LAB7", 5.0),  # day 304: outside
            (4, "2019-06-01", "LAB7", 5.0), (4, "2019-06-01", "LAB7", 5.5)]  # same day: the largest
    res = run(tmp_path, persons=[1, 2, 3, 4], disp=[(i, T0, "RXA1") for i in range(1, 5)],
              meas=meas, proto=MEASURED)
    c = res.cohort.set_index(res.cohort.person_id.astype(int))
    assert c.loc[1, "value__lab"] == 7.0 and c.loc[2, "value__lab"] == 6.5
    assert pd.isna(c.loc[3, "value__lab"]) and c.loc[3, "measured__lab"] == 0
    assert c.loc[4, "value__lab"] == 5.5
    assert c.loc[[1, 2, 4], "measured__lab"].tolist() == [1, 1, 1]
    assert "end_day" not in c.columns and "outcome_measured" not in res.attrition.step.tolist()


def test_deaths_before_the_measurement_day(tmp_path):
    # at_day 365 is 2019-06-01 (hand computation): 1 dies on day 364 (before), 2 on day 365 (not
    # before), 3 on day 0 (before), 4 never; the report counts these deaths by arm
    deaths = [(1, "2019-05-31"), (2, "2019-06-01"), (3, T0)]
    res = run(tmp_path, persons=[1, 2, 3, 4], disp=[(i, T0, "RXA1") for i in range(1, 5)],
              deaths=deaths, proto=MEASURED)
    c = res.cohort.set_index(res.cohort.person_id.astype(int))
    assert c.loc[[1, 2, 3, 4], "died_before__lab"].tolist() == [1, 0, 1, 0]


def test_measured_change_from_baseline_and_complete_case(tmp_path):
    proto = merge(MEASURED, {"outcomes": {"primary": {"change_from_baseline": True,
                                                      "missing": "complete_case"}}})
    meas = [(1, "2018-04-02", "LAB7", 8.0),  # day -60: baseline window's first day
            (1, "2018-05-01", "LAB7", 9.0), (1, T0, "LAB7", 8.5),  # day 0: the last baseline
            (1, "2019-06-01", "LAB7", 7.0),  # the outcome: 7.0 - 8.5
            (2, "2018-04-01", "LAB7", 8.0), (2, "2019-06-01", "LAB7", 7.0),  # baseline day -61
            (3, "2018-05-01", "LAB7", 8.0)]  # no outcome record
    res = run(tmp_path, persons=[1, 2, 3], disp=[(i, T0, "RXA1") for i in range(1, 4)],
              meas=meas + [(i, d, "LAB7", 1) for i in (901, 902)
                           for d in ("2018-05-01", "2019-06-01")],
              proto=proto)
    assert ids(res) == [1]
    assert row(res, 1)["value__lab"] == pytest.approx(-1.5)
    assert row(res, 1)["baseline__lab"] == 8.5
    assert res.attrition.step.tolist()[-1] == "outcome_measured"
    assert excluded(res, "outcome_measured") == 2


# ----------------------------------------------------------------------------- empty cohort / arm


def test_empty_cohort_names_the_step(tmp_path):
    with pytest.raises(CohortError, match="'age'") as info:
        run(tmp_path, persons=[(1, "1990-01-01")], disp=[(1, T0, "RXA1"), (1, T0, "RXA2")],
            proto={"eligibility": {"age": {"min": 50}}}, fillers=False)
    assert info.value.step == "age" and info.value.arm is None
    assert info.value.attrition.remaining.tolist()[-1] == 0


def test_empty_arm_names_the_step(tmp_path):
    # every arm_b person also takes arm_a the same day: same_day removes the last of arm_b
    with pytest.raises(CohortError, match="arm 'arm_b'.*'same_day'") as info:
        run(tmp_path, persons=[1, 2], disp=[(1, T0, "RXA1"), (2, T0, "RXA1"), (2, T0, "RXB1")],
            fillers=False)
    assert info.value.arm == "arm_b" and info.value.step == "same_day"
    with pytest.raises(CohortError, match="arm 'arm_b'.*'initiated'"):
        run(tmp_path, persons=[1], disp=[(1, T0, "RXA1")], fillers=False)


def test_steps_only_gives_attrition_without_cohort(tmp_path):
    res = run(tmp_path, persons=[1, 2], disp=[(1, T0, "RXA1"), (2, "2017-01-01", "RXA1")],
              steps_only=True)
    assert res.cohort is None
    a = res.attrition
    assert a.columns.tolist() == ["step", "description", "remaining", "excluded"]
    assert a.remaining.tolist() == [4, 3, 3, 3, 3, 3] and a.excluded.tolist() == [0, 1, 0, 0, 0, 0]
    assert a.description.iloc[5] == "no record of a or b in days -365 to -1 (new users)"


def test_missing_table_or_column_is_a_clear_error(tmp_path):
    proto = {"concepts": {"hf": {"source": "diagnoses", "codes": ["HF5"], "where": {"ward": "x"}}}}
    with pytest.raises(CohortError, match="diagnoses.*no column 'ward'"):
        run(tmp_path, persons=[1], disp=[(1, T0, "RXA1")], proto=proto)


def test_death_for_the_decision_is_all_cause_from_day_zero(tmp_path):
    # CONTRACTS §5f: the risk of `death` is all-cause mortality, counted whatever happened
    # before it; a death on day 0 counts at day 0 (§3a), as it does when it competes
    diag = [(1, "2018-07-01", "HF5")]  # 1: outcome on day 30, then dies on day 61
    deaths = [(1, "2018-08-01"), (2, T0), (3, "2018-06-11")]  # 2: day 0; 3: day 10
    proto = {"decision": {"horizon_day": 365, "loss": {"hf": 1, "death": 2}}}
    res = run(tmp_path, persons=[1, 2, 3, 4], disp=[(i, T0, "RXA1") for i in range(1, 5)],
              diag=diag, deaths=deaths, proto=proto)
    got = {i: (row(res, i)["end_day__death"], row(res, i)["end_reason__death"])
           for i in range(1, 5)}
    assert got == {1: (61, "outcome"), 2: (0, "outcome"), 3: (10, "outcome"),
                   4: (1095, "max_follow_up")}
    # the primary outcome keeps death as its competing event
    assert (row(res, 1).end_day, row(res, 1).end_reason) == (30, "outcome")
    assert (row(res, 3).end_day, row(res, 3).end_reason) == (10, "competing")
