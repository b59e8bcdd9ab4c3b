"""Supply, stop and switch days, deviations and person-periods (CONTRACTS §5a, §5b, §5g).

One small handmade extract, one person per rule and edge; every expected day is a hand
computation from the dispensing days written beside it (time zero 2018-01-01 is day 0, arm
``arm_a`` has ``gap_days: 30``, arm ``arm_b`` ``gap_days: 60``; supplies in days). The carry-over
rule and the tie rules are the contract's (§5b); nothing here comes from the code under test.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest

from emulant.cohort import build_cohort
from emulant.cohort.person_time import add_deviations, build_periods, deviation_counts
from emulant.extract import open_extract
from emulant.protocol import parse_protocol

T0 = dt.date(2018, 1, 1)


def d(k: int) -> str:
    return (T0 + dt.timedelta(days=k)).isoformat()


PROTOCOL = {
    "study": {"id": "person-time"},
    "concepts": {"a": {"source": "dispensings", "codes": ["RXA"]},
                 "b": {"source": "dispensings", "codes": ["RXB"]},
                 "rescue": {"source": "diagnoses", "codes": ["RSC"]},
                 "hf": {"source": "diagnoses", "codes": ["HF5"]},
                 "lab": {"source": "measurements", "codes": ["LAB7"]}},
    "eligibility": {"entry": {"start": "2017-06-01", "end": "2021-12-31"}, "coverage_before_days": 365},
    "strategies": {"arms": {"arm_a": {"initiate": "a", "sustain": {"gap_days": 30}},
                            "arm_b": {"initiate": "b", "sustain": {"gap_days": 60, "switch": ["a", "rescue"]}}},
                   "treated": "arm_a", "washout_days": 365, "same_day": "first_listed"},
    "follow_up": {"max_days": 365},
    "outcomes": {"primary": "hf", "competing": ["death"]},
    "covariates": [],
    "time_varying": [{"name": "lab_now", "concept": "lab", "window": [-30, 0], "summary": "last"},
                     {"name": "rescue_recent", "concept": "rescue", "window": [-60, -1]}],
    "contrasts": ["intention_to_treat", "per_protocol"],
    "analysis": {"horizons_days": [365], "period_days": 30},
}

# person: (arm concept dispensings as (day, supply) ..., other rows), expected
# (stop_day, switch_day, deviation_day, deviation_reason, end_day)
A = "RXA1"
B = "RXB1"
CASES = {
    # only day 0, 30 days: covered through 29, stops on 29 + 30 + 1 = 60
    1: dict(disp=[(0, A, 30)], expect=(60, None, 60, "stopped", 365)),
    # refill on the gap's last day 59 (= 29 + 30): carried, c = max(29, 58) + 30 = 88 -> 119
    2: dict(disp=[(0, A, 30), (59, A, 30)], expect=(119, None, 119, "stopped", 365)),
    # refill the day after, 60 > 59: stopped on 60 whatever comes later
    3: dict(disp=[(0, A, 30), (60, A, 30)], expect=(60, None, 60, "stopped", 365)),
    # stockpiled refills on days 10 and 20: c = 29, 59, 89 -> stops on 120
    4: dict(disp=[(0, A, 30), (10, A, 30), (20, A, 30)], expect=(120, None, 120, "stopped", 365)),
    # a switch on day 1 (the other arm's concept)
    5: dict(disp=[(0, A, 90), (1, B, 30)], expect=(120, 1, 1, "switched", 365)),
    # the other arm's concept on day 0 too (same_day: first_listed keeps arm_a): day 0 is not a
    # switch (switches count from day 1); stop on 60
    6: dict(disp=[(0, A, 30), (0, B, 30)], expect=(60, None, 60, "stopped", 365)),
    # stop and switch on the same day 60: switched
    7: dict(disp=[(0, A, 30), (60, B, 30)], expect=(60, 60, 60, "switched", 365)),
    # the outcome on the stop day: end_day 60 (outcome), the deviation on day 60 is kept
    8: dict(disp=[(0, A, 30)], dx=[(60, "HF5", "inpatient")], expect=(60, None, 60, "stopped", 60)),
    # the outcome on day 40, before the stop: no deviation within follow-up
    9: dict(disp=[(0, A, 30)], dx=[(40, "HF5", "inpatient")], expect=(60, None, None, None, 40)),
    # refills every 30 days to day 360: covered through 389, stop 420 > max_days -> none
    10: dict(disp=[(k, A, 30) for k in range(0, 361, 30)], expect=(None, None, None, None, 365)),
    # early refill on 45 then a long gap: c = 29, max(29, 44) + 30 = 74; 200 > 104 -> stop 105
    11: dict(disp=[(0, A, 30), (45, A, 30), (200, A, 30)], expect=(105, None, 105, "stopped", 365)),
    # death on day 50 (competing) before the stop on 60: no deviation
    12: dict(disp=[(0, A, 30)], death=50, expect=(60, None, None, None, 50)),
    # arm_b, gap 60, 90 days: covered through 89, stop 150; its switch concept 'rescue' on day 130
    13: dict(disp=[(0, B, 90)], dx=[(130, "RSC1", "outpatient")], expect=(150, 130, 130, "switched", 365)),
    # arm_b: the other arm's concept on day 200, after the stop on 150
    14: dict(disp=[(0, B, 90), (200, A, 30)], expect=(150, 200, 150, "stopped", 365)),
    # arm_b: a refill 5 days late within the gap (day 95 <= 89 + 60): c = 94 + 30 = 124 -> 185
    15: dict(disp=[(0, B, 90), (95, B, 30)], expect=(185, None, 185, "stopped", 365)),
}
MEASURE = {1: [(-10, 7.0), (25, 8.0), (45, 9.0)], 3: [(-40, 5.0)], 4: [(0, 6.0), (30, 6.5), (31, 99.0)]}


def write_case_extract(folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    ids = sorted(CASES)
    pd.DataFrame({"person_id": ids, "birth_date": "1960-01-01", "sex": "F"}).to_csv(folder / "persons.csv", index=False)
    pd.DataFrame({"person_id": ids, "start_date": "2010-01-01", "end_date": "2023-12-31"}).to_csv(folder / "coverage.csv", index=False)
    disp = [(i, d(k), code, s) for i, c in CASES.items() for k, code, s in c["disp"]]
    pd.DataFrame(disp, columns=["person_id", "date", "code", "days_supply"]).to_csv(folder / "dispensings.csv", index=False)
    dx = [(i, d(k), code, setting) for i, c in CASES.items() for k, code, setting in c.get("dx", [])]
    # rescue_recent of person 10 (arm_a, for whom 'rescue' is no switch): records on days 70, 200
    dx += [(10, d(70), "RSC1", "outpatient"), (10, d(200), "RSC2", "outpatient")]
    pd.DataFrame(dx, columns=["person_id", "date", "code", "setting"]).to_csv(folder / "diagnoses.csv", index=False)
    meas = [(i, d(k), "LAB7", v) for i, rows in MEASURE.items() for k, v in rows]
    pd.DataFrame(meas, columns=["person_id", "date", "code", "value"]).to_csv(folder / "measurements.csv", index=False)
    deaths = [(i, d(c["death"])) for i, c in CASES.items() if "death" in c]
    pd.DataFrame(deaths, columns=["person_id", "date"]).to_csv(folder / "deaths.csv", index=False)
    return folder


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    folder = write_case_extract(tmp_path_factory.mktemp("pt") / "extract")
    p = parse_protocol(PROTOCOL)
    ex = open_extract(folder, p)
    cohort = add_deviations(ex, p, build_cohort(ex, p).cohort)
    out = tmp_path_factory.mktemp("pt") / "periods.parquet"
    n = build_periods(ex, p, cohort, out)
    return p, cohort, pd.read_parquet(out), n


def _nullable(x):
    return None if pd.isna(x) else (int(x) if not isinstance(x, str) else x)


@pytest.mark.parametrize("pid", sorted(CASES))
def test_deviation_day_by_hand(built, pid):
    _, cohort, _, _ = built
    row = cohort.set_index("person_id").loc[pid]
    got = tuple(_nullable(row[c]) for c in ("stop_day", "switch_day", "deviation_day", "deviation_reason", "end_day"))
    assert got == CASES[pid]["expect"]


def test_deviation_counts(built):
    p, cohort, _, _ = built
    counts = deviation_counts(cohort, p).set_index("arm")
    # arm_a: persons 1-12; stopped 1, 2, 3, 4, 6, 8, 11; switched 5, 7; none 9, 10, 12
    assert counts.loc["arm_a"].to_dict() == {"persons": 12, "stopped": 7, "switched": 2, "on_protocol_throughout": 3}
    # arm_b: 13 switched (rescue), 14 and 15 stopped
    assert counts.loc["arm_b"].to_dict() == {"persons": 3, "stopped": 2, "switched": 1, "on_protocol_throughout": 0}


def test_periods_rows_and_flags(built):
    _, cohort, periods, n = built
    assert list(periods.columns) == ["person_id", "arm", "period", "start_day", "deviated",
                                     "lab_now", "lab_now_missing", "rescue_recent"]
    assert n == len(periods)
    by = periods.groupby("person_id")
    # last period = floor(min(end_day, deviation_day) / 30)
    expect_last = {1: 2, 2: 3, 3: 2, 4: 4, 5: 0, 6: 2, 7: 2, 8: 2, 9: 1, 10: 12, 11: 3, 12: 1, 13: 4, 14: 5, 15: 6}
    assert by["period"].max().to_dict() == expect_last
    assert (by["period"].min() == 0).all()
    assert (periods["start_day"] == periods["period"] * 30).all()
    # deviated is 1 exactly once, in the period holding the deviation day, for those who deviate
    dev = periods[periods["deviated"] == 1].set_index("person_id")["period"].to_dict()
    assert dev == {1: 2, 2: 3, 3: 2, 4: 4, 5: 0, 6: 2, 7: 2, 8: 2, 11: 3, 13: 4, 14: 5, 15: 6}
    assert periods[["person_id", "period"]].equals(
        periods[["person_id", "period"]].sort_values(["person_id", "period"]))


def test_time_varying_values(built):
    _, _, periods, _ = built
    v = periods.set_index(["person_id", "period"])
    # person 1, window [-30, 0] of each period's first day: period 0 -> day -10 (7.0),
    # period 1 (day 30: days 0..30) -> day 25 (8.0), period 2 (day 60: 30..60) -> day 45 (9.0)
    assert [v.loc[(1, k), "lab_now"] for k in range(3)] == [7.0, 8.0, 9.0]
    assert [v.loc[(1, k), "lab_now_missing"] for k in range(3)] == [0, 0, 0]
    # person 4: period 0 -> day 0 (6.0); period 1 (days 0..30) -> the latest, day 30 (6.5);
    # period 2 (days 30..60) -> day 31 (99.0), later than day 30
    assert [v.loc[(4, k), "lab_now"] for k in range(3)] == [6.0, 6.5, 99.0]
    # person 3's only value (day -40) is outside every window: missing, filled with the median
    # of the known person-period values 7, 8, 9, 6, 6.5, 99 and person 4's period 3 (days
    # 60..90: none) -> known values {7, 8, 9, 6, 6.5, 99}: median (7 + 8) / 2 = 7.5
    assert v.loc[(3, 0), "lab_now_missing"] == 1 and v.loc[(3, 0), "lab_now"] == 7.5
    assert v.loc[(4, 3), "lab_now_missing"] == 1
    # rescue_recent (window [-60, -1], any) of person 10, records on days 70 and 200: period k
    # (first day 30k) holds day x when 30k - 60 <= x <= 30k - 1: day 70 in k = 3, 4 (k >= 71/30,
    # k <= 130/30); day 200 in k = 7, 8 (k >= 201/30, k <= 260/30)
    assert [v.loc[(10, k), "rescue_recent"] for k in range(13)] == [0, 0, 0, 1, 1, 0, 0, 1, 1, 0, 0, 0, 0]


def test_periods_from_the_parquet_file(built, tmp_path):
    """The workflow passes cohort.parquet by path; DuckDB reads it, the result is the same."""
    p, cohort, periods, _ = built
    folder = write_case_extract(tmp_path / "extract")
    ex = open_extract(folder, p)
    cohort.to_parquet(tmp_path / "cohort.parquet", index=False)
    build_periods(ex, p, tmp_path / "cohort.parquet", tmp_path / "periods.parquet")
    again = pq.read_table(tmp_path / "periods.parquet").to_pandas()
    pd.testing.assert_frame_equal(again, periods)


def test_check_prints_deviations_per_arm(tmp_path, capsys):
    import yaml

    from emulant import cli

    folder = write_case_extract(tmp_path / "extract")
    exact = {**PROTOCOL, "report": {"min_cell": 1}}  # nothing suppressed: the exact counts
    (tmp_path / "protocol.yaml").write_text(yaml.safe_dump(exact, sort_keys=False))
    rc = cli.main(["check", "--extract", str(folder), "--protocol", str(tmp_path / "protocol.yaml")])
    out = capsys.readouterr().out
    assert rc == 0
    table = out.split("per arm:")[1].split()
    # the hand counts of test_deviation_counts
    assert table[:5] == ["arm", "persons", "stopped", "switched", "on_protocol_throughout"]
    assert table[5:15] == ["arm_a", "12", "7", "2", "3", "arm_b", "3", "2", "1", "0"]
    # with min_cell 5 (the disclosure rule): arm_b's 3 and every cell below 5 are hidden, and with
    # them the next cell of the row (or of the persons column), so none comes back by subtraction
    (tmp_path / "protocol.yaml").write_text(yaml.safe_dump({**PROTOCOL, "report": {"min_cell": 5}},
                                                           sort_keys=False))
    assert cli.main(["check", "--extract", str(folder), "--protocol", str(tmp_path / "protocol.yaml")]) == 0
    table = capsys.readouterr().out.split("per arm:")[1].split()
    assert table[5:15] == ["arm_a", "—", "7", "<5", "<5", "arm_b", "<5", "<5", "<5", "0"]


def test_stages_write_deviations_and_periods(tmp_path):
    """The workflow's two stages: cohort.parquet gains the deviation columns, then the periods."""
    from types import SimpleNamespace

    import yaml

    from emulant import stages

    folder = write_case_extract(tmp_path / "extract")
    proto = tmp_path / "protocol.yaml"
    proto.write_text(yaml.safe_dump(PROTOCOL, sort_keys=False))
    tables = sorted(str(f) for f in folder.iterdir())
    res = tmp_path / "results"
    stages.build_cohort(SimpleNamespace(protocol=[str(proto)], tables=tables),
                        SimpleNamespace(cohort=res / "cohort.parquet", attrition=res / "attrition.csv"),
                        SimpleNamespace(duckdb={}))
    cohort = pd.read_parquet(res / "cohort.parquet").set_index("person_id")
    assert cohort.loc[7, "deviation_reason"] == "switched" and cohort.loc[7, "deviation_day"] == 60
    assert pd.isna(cohort.loc[10, "deviation_day"]) and cohort.loc[10, "deviation_reason"] is None
    stages.build_periods(SimpleNamespace(protocol=[str(proto)], tables=tables, cohort=str(res / "cohort.parquet")),
                         SimpleNamespace(periods=res / "periods.parquet"), SimpleNamespace(duckdb={}))
    periods = pd.read_parquet(res / "periods.parquet")
    assert len(periods) == sum(k + 1 for k in (2, 3, 2, 4, 0, 2, 2, 2, 1, 12, 3, 1, 4, 5, 6))
    assert sorted(p.name for p in res.iterdir()) == ["attrition.csv", "cohort.parquet", "periods.parquet"]
