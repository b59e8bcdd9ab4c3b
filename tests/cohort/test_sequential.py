"""Sequential trials (CONTRACTS §5c): person-trials, steps and arms against rows written by hand.

Every person, date and code is invented. Trials start every 30 days from 2018-01-01 to
2018-06-30: trials 0..6 on t_j = 2018-01-01 + 30 j.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from emulant.cohort import build_cohort
from emulant.cohort.covariates import CohortError
from emulant.cohort.sequential import (
    TrialPlan,
    build_sequential,
    plan_of,
    sample_noninitiators,
    trial_starts,
)
from emulant.extract import open_extract
from emulant.protocol import parse_protocol

START = dt.date(2018, 1, 1)
EVERY = 30


def t(j: int, k: int = 0) -> str:
    """Day k of trial j."""
    return (START + dt.timedelta(days=EVERY * j + k)).isoformat()


PROTOCOL = {
    "study": {"id": "sequential-test"},
    "concepts": {"kestrel": {"source": "dispensings", "codes": ["KST"]},
                 "kidney": {"source": "diagnoses", "codes": ["KD1"]},
                 "hf": {"source": "diagnoses", "codes": ["HF5"]}},
    "eligibility": {"entry": {"start": "2018-01-01", "end": "2018-06-30"}, "age": {"min": 40},
                    "coverage_before_days": 365,
                    "exclude": [{"concept": "kidney", "window": [-1825, 0]}]},
    "strategies": {"design": "sequential",
                   "arms": {"kestrel": {"initiate": "kestrel"}, "no_kestrel": {"initiate": "none"}},
                   "treated": "kestrel", "washout_days": 365, "trial_every_days": 30},
    "follow_up": {"max_days": 365, "administrative_end": "2019-12-31"},
    "outcomes": {"primary": "hf", "competing": ["death"]},
    "covariates": [{"name": "age", "builtin": "age"}],
    "analysis": {"horizons_days": [365]},
}
PLAN = TrialPlan("kestrel", "no_kestrel", EVERY)  # what plan_of reads from PROTOCOL
S, N = "kestrel", "no_kestrel"
# person -> what happens at trials 0..6: an arm, or the step the person-trial leaves at
EXPECTED = {
    # coverage from t1 - 365 only: trial 0 lacks a year of coverage; a non-initiator in trials
    # 1..4; starts on day 3 of trial 5; at trial 6 that record is on day -27 (washout)
    1: ["coverage_before", N, N, N, N, S, "washout"],
    # dies on t3: alive at trial 3 (a death on day 0 is no death before the start), not after
    2: [N, N, N, N, "alive", "alive", "alive"],
    # first record on day 29 = trial_every_days - 1 of trial 2: starts in trial 2; day -1 of trial 3
    3: [N, N, S, "washout", "washout", "washout", "washout"],
    # first record on day 30 of trial 2 = day 0 of trial 3: a non-initiator of trial 2
    4: [N, N, N, S, "washout", "washout", "washout"],
    # one record on t4 - 366: day -366 of trial 4 is outside [-365, -1]
    5: ["washout", "washout", "washout", "washout", N, N, N],
    # one record on t4 - 365: day -365 of trial 4 is inside
    6: ["washout", "washout", "washout", "washout", "washout", N, N],
    # 40th birthday on t3
    7: ["age", "age", "age", N, N, N, N],
    # a kidney record on t4 + 5: after the start of trials 0..4, inside [-1825, 0] from trial 5
    8: [N, N, N, N, N, "exclude:kidney", "exclude:kidney"],
    # nothing happens
    9: [N] * 7,
}
STEPS = ["alive", "age", "coverage_before", "washout", "exclude:kidney"]


def write_extract(folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    ids = sorted(EXPECTED)
    birth = {i: "1960-01-01" for i in ids}
    birth[7] = (START + dt.timedelta(days=3 * EVERY)).replace(year=1978).isoformat()
    pd.DataFrame({"person_id": ids, "birth_date": [birth[i] for i in ids], "sex": "F"}).to_csv(
        folder / "persons.csv", index=False)
    cov_start = {i: "2010-01-01" for i in ids}
    cov_start[1] = (START + dt.timedelta(days=EVERY - 365)).isoformat()
    pd.DataFrame({"person_id": ids, "start_date": [cov_start[i] for i in ids],
                  "end_date": "2023-12-31"}).to_csv(folder / "coverage.csv", index=False)
    disp = [(1, t(5, 3)), (3, t(2, 29)), (4, t(2, 30)), (5, t(4, -366)), (6, t(4, -365))]
    pd.DataFrame([(i, d, "KST1", 30) for i, d in disp],
                 columns=["person_id", "date", "code", "days_supply"]).to_csv(
        folder / "dispensings.csv", index=False)
    pd.DataFrame([(8, t(4, 5), "KD1", "outpatient"), (4, t(3, 100), "HF5", "inpatient")],
                 columns=["person_id", "date", "code", "setting"]).to_csv(
        folder / "diagnoses.csv", index=False)
    pd.DataFrame(columns=["person_id", "date", "code", "value"]).to_csv(
        folder / "measurements.csv", index=False)
    pd.DataFrame({"person_id": [2], "date": [t(3)]}).to_csv(folder / "deaths.csv", index=False)
    return folder


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    folder = write_extract(tmp_path_factory.mktemp("seq") / "extract")
    p = parse_protocol(PROTOCOL)
    ex = open_extract(folder, p)
    assert plan_of(p) == TrialPlan("kestrel", "no_kestrel", EVERY, 1.0, p.analysis.bootstrap.seed)
    return p, ex, build_cohort(ex, p)


def test_trial_starts():
    starts = trial_starts(START, dt.date(2018, 6, 30), EVERY)
    assert starts[0] == START and starts[-1] == dt.date(2018, 6, 30) and len(starts) == 7
    assert len(trial_starts(START, dt.date(2018, 6, 29), EVERY)) == 6


def test_person_trials_by_hand(built):
    _, _, res = built
    got = {(r.person_id, r.trial): r.arm for r in res.cohort.itertuples()}
    want = {(i, j): a for i, row in EXPECTED.items() for j, a in enumerate(row) if a in (S, N)}
    assert got == want
    assert res.cohort.time_zero.tolist() == [pd.Timestamp(t(j)) for j in res.cohort.trial]


def test_attrition_in_person_trials(built):
    _, _, res = built
    att = res.attrition
    assert att.step.tolist() == ["person_trials", *STEPS]
    cells = [(j, a) for row in EXPECTED.values() for j, a in enumerate(row)]
    remaining = [len(cells)]
    persons = [len(EXPECTED)]
    for k in range(len(STEPS)):
        gone = set(STEPS[:k + 1])
        remaining.append(sum(a not in gone for _, a in cells))
        persons.append(sum(any(a not in gone for a in row) for row in EXPECTED.values()))
    assert att.remaining.tolist() == remaining
    assert att.persons.tolist() == persons
    assert att.excluded.tolist() == [0] + [a - b for a, b in zip(remaining[:-1], remaining[1:], strict=True)]


def test_follow_up_from_the_trial_start(built):
    _, _, res = built
    c = res.cohort.set_index(["person_id", "trial"])
    # the hf admission on day 100 of trial 3 is day 130 of trial 2 (person 4)
    assert (c.loc[(4, 3), "end_day"], c.loc[(4, 3), "end_reason"]) == (100, "outcome")
    assert (c.loc[(4, 2), "end_day"], c.loc[(4, 2), "end_reason"]) == (130, "outcome")
    # death on t3: a competing event on day 0 of trial 3, day 30 of trial 2
    assert (c.loc[(2, 3), "end_day"], c.loc[(2, 3), "end_reason"]) == (0, "competing")
    assert (c.loc[(2, 2), "end_day"], c.loc[(2, 2), "end_reason"]) == (30, "competing")
    # age at each trial's start (person 7 turns 40 on t3)
    assert c.loc[(7, 3), "age"] == 40 and c.loc[(9, 0), "age"] == 58
    assert (c.treated == (c.arm == S)).all() and (c.sample_weight == 1).all()


def test_empty_arm_names_the_step(tmp_path):
    folder = write_extract(tmp_path / "extract")
    d = {**PROTOCOL, "eligibility": {**PROTOCOL["eligibility"], "age": {"min": 70}}}
    p = parse_protocol(d)
    with pytest.raises(CohortError, match="step 'age'"):
        build_sequential(open_extract(folder, p), p, PLAN)


def _frame(n_persons: int, trials: int, rng) -> pd.DataFrame:
    pid = np.repeat(np.arange(n_persons), trials)
    trial = np.tile(np.arange(trials), n_persons)
    arm = np.where(rng.random(len(pid)) < 0.1, S, N)
    return pd.DataFrame({"person_id": pid, "trial": trial, "arm": arm})


def test_noninitiator_sampling_reproducible_and_weighted():
    df = _frame(4000, 5, np.random.default_rng(1))
    a = sample_noninitiators(df, N, 0.25, seed=20261201)
    b = sample_noninitiators(df.sample(frac=1, random_state=3), N, 0.25, seed=20261201)
    c = sample_noninitiators(df, N, 0.25, seed=7)
    pd.testing.assert_frame_equal(a, b)  # the same rows whatever the input order
    assert not a[["person_id", "trial"]].equals(c[["person_id", "trial"]])
    # every initiator kept with weight 1; non-initiators weighted 1/share
    assert (a.arm == S).sum() == (df.arm == S).sum()
    assert set(a.loc[a.arm == S, "sample_weight"]) == {1.0}
    assert set(a.loc[a.arm == N, "sample_weight"]) == {4.0}
    # the weighted count of non-initiators estimates their number: a binomial(n, 1/4) count
    # within 4 standard deviations (common practice, no source)
    n = int((df.arm == N).sum())
    kept = int((a.arm == N).sum())
    assert abs(kept - n / 4) < 4 * np.sqrt(n * 0.25 * 0.75)
    full = sample_noninitiators(df, N, 1.0, seed=1)
    assert len(full) == len(df) and (full.sample_weight == 1).all()
    with pytest.raises(CohortError, match="noninitiator_sample"):
        sample_noninitiators(df, N, 0.0, seed=1)


def test_sampling_in_the_cohort_adds_an_attrition_row(tmp_path):
    folder = write_extract(tmp_path / "extract")
    p = parse_protocol(PROTOCOL)
    res = build_sequential(open_extract(folder, p), p, TrialPlan(S, N, EVERY, 0.5, 11))
    again = build_sequential(open_extract(folder, p), p, TrialPlan(S, N, EVERY, 0.5, 11))
    pd.testing.assert_frame_equal(res.cohort, again.cohort)
    last = res.attrition.iloc[-1]
    assert last.step == "noninitiator_sample" and last.remaining == len(res.cohort)
    assert (res.cohort.arm == S).sum() == 3  # persons 1, 3, 4 start once each


# ----------------------------------------------------------------------------- person by person


def _random_extract(folder: Path, n: int = 300, seed: int = 5) -> dict:
    """Random persons with gaps in coverage, deaths, starts and kidney records (invented)."""
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    day = lambda k: START + dt.timedelta(days=int(k))  # noqa: E731
    ids = np.arange(1, n + 1)
    birth = {i: day(-rng.integers(36 * 365, 82 * 365)) for i in ids}
    cov = []
    for i in ids:  # two or three periods, some touching, some overlapping, some with gaps
        s = int(rng.integers(-900, -100))
        for _ in range(int(rng.integers(2, 4))):
            e = s + int(rng.integers(30, 500))
            cov.append((i, day(s), day(e)))
            s = e + int(rng.choice([-20, 1, 2, 40]))
    disp = [(i, day(rng.integers(-400, 420))) for i in ids for _ in range(int(rng.integers(0, 5)))]
    kid = [(i, day(rng.integers(-600, 420))) for i in ids if rng.random() < 0.3]
    deaths = {i: day(rng.integers(-50, 420)) for i in ids if rng.random() < 0.25}
    pd.DataFrame({"person_id": ids, "birth_date": [birth[i] for i in ids], "sex": "F"}).to_csv(
        folder / "persons.csv", index=False)
    pd.DataFrame(cov, columns=["person_id", "start_date", "end_date"]).to_csv(
        folder / "coverage.csv", index=False)
    pd.DataFrame([(i, d, "KST2", 30) for i, d in disp],
                 columns=["person_id", "date", "code", "days_supply"]).to_csv(
        folder / "dispensings.csv", index=False)
    pd.DataFrame([(i, d, "KD1", "outpatient") for i, d in kid],
                 columns=["person_id", "date", "code", "setting"]).to_csv(
        folder / "diagnoses.csv", index=False)
    pd.DataFrame(columns=["person_id", "date", "code", "value"]).to_csv(
        folder / "measurements.csv", index=False)
    pd.DataFrame({"person_id": list(deaths), "date": list(deaths.values())}).to_csv(
        folder / "deaths.csv", index=False)
    return {"ids": ids, "birth": birth, "cov": cov, "disp": disp, "kid": kid, "deaths": deaths}


def _reference(x: dict, starts: list[dt.date], washout: int, every: int) -> dict:
    """§5c read literally, one person-trial at a time: the arm, or the first step failed."""
    def age(b: dt.date, t0: dt.date) -> int:
        return t0.year - b.year - ((t0.month, t0.day) < (b.month, b.day))

    out = {}
    for i in x["ids"]:
        periods = sorted((s, e) for p, s, e in x["cov"] if p == i)
        merged: list[list[dt.date]] = []
        for s, e in periods:  # overlapping or touching periods merge
            if merged and s <= merged[-1][1] + dt.timedelta(days=1):
                merged[-1][1] = max(merged[-1][1], e)
            else:
                merged.append([s, e])
        disp = [d for p, d in x["disp"] if p == i]
        kid = [d for p, d in x["kid"] if p == i]
        for j, t0 in enumerate(starts):
            k = lambda d, t0=t0: (d - t0).days  # noqa: E731
            holding = [s for s, e in merged if s <= t0 <= e]
            if i in x["deaths"] and x["deaths"][i] < t0:
                out[i, j] = "alive"
            elif not 40 <= age(x["birth"][i], t0) <= 80:
                out[i, j] = "age"
            elif not holding or k(holding[0]) > -365:
                out[i, j] = "coverage_before"
            elif any(-washout <= k(d) <= -1 for d in disp):
                out[i, j] = "washout"
            elif any(-365 <= k(d) <= 0 for d in kid):
                out[i, j] = "exclude:kidney"
            else:
                out[i, j] = S if any(0 <= k(d) <= every - 1 for d in disp) else N
    return out


def test_person_trials_person_by_person_against_the_contract_read_literally(tmp_path):
    x = _random_extract(tmp_path / "extract")
    d = {**PROTOCOL, "eligibility": {"entry": {"start": "2018-01-01", "end": "2018-12-31"},
                                     "age": {"min": 40, "max": 80}, "coverage_before_days": 365,
                                     "exclude": [{"concept": "kidney", "window": [-365, 0]}]},
         "strategies": {**PROTOCOL["strategies"], "washout_days": 180}}
    p = parse_protocol(d)
    res = build_sequential(open_extract(tmp_path / "extract", p), p, PLAN)
    starts = trial_starts(START, dt.date(2018, 12, 31), EVERY)
    want = _reference(x, starts, 180, EVERY)
    got = {(r.person_id, r.trial): r.arm for r in res.cohort.itertuples()}
    assert got == {key: a for key, a in want.items() if a in (S, N)}
    assert 20 < sum(a == S for a in got.values()) and len(got) > 300  # the case is not trivial
    steps = res.attrition.step.tolist()
    for k, step in enumerate(steps[1:], start=1):
        gone = set(steps[1:k + 1])
        assert res.attrition.remaining[k] == sum(a not in gone for a in want.values()), step
        assert res.attrition.persons[k] == len({i for (i, _), a in want.items() if a not in gone})


def test_propensity_model_includes_the_trials_calendar_time(built):
    from emulant.models.weights import fit_weights

    p, _, res = built
    fit = fit_weights(res.cohort, p)
    assert "trial" in fit.design.columns  # beside the protocol's covariates (age)
    assert fit.table[["person_id", "trial"]].equals(res.cohort[["person_id", "trial"]])


def test_per_protocol_is_refused_with_a_clear_message(tmp_path):
    folder = write_extract(tmp_path / "extract")
    d = {**PROTOCOL, "strategies": {**PROTOCOL["strategies"], "arms": {
        "kestrel": {"initiate": "kestrel", "sustain": {"gap_days": 30}},
        "no_kestrel": {"initiate": "none"}}}, "contrasts": ["intention_to_treat", "per_protocol"]}
    p = parse_protocol(d)
    with pytest.raises(CohortError, match="use contrasts: \\[intention_to_treat\\]"):
        build_cohort(open_extract(folder, p), p)
