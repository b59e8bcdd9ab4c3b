"""Baseline covariates of CONTRACTS §3a on a handmade extract; expected values by hand computation.

Time zero is 2018-06-01 for everyone: day -1 is 2018-05-31, day -365 is 2017-06-01, day -366
is 2017-05-31, day -1825 is 2013-06-02, day -1826 is 2013-06-01.
"""

from __future__ import annotations

import pandas as pd
import pytest
from test_cohort import T0, run

from emulant.cohort import CohortError
from emulant.cohort.covariates import covariate_kinds

CONCEPTS = {"mi": {"source": "diagnoses", "codes": ["MI1"]}}
COVS = [
    {"name": "age", "builtin": "age"},
    {"name": "sex", "builtin": "sex"},
    {"name": "yr", "builtin": "calendar_year"},
    {"name": "region", "attribute": "region"},
    {"name": "prior_mi", "concept": "mi", "window": [-1825, -1], "summary": "any"},
    {"name": "n_mi", "concept": "mi", "window": [-1825, -1], "summary": "count"},
    {"name": "n_drugs", "source": "dispensings", "window": [-365, -1], "summary": "distinct_codes"},
    {"name": "hb_last", "concept": "lab", "window": [-365, 0], "summary": "last"},
    {"name": "hb_mean", "concept": "lab", "window": [-365, 0], "summary": "mean"},
    {"name": "hb_min", "concept": "lab", "window": [-365, 0], "summary": "min"},
    {"name": "hb_max", "concept": "lab", "window": [-365, 0], "summary": "max"},
]
PERSONS = [(1, "1960-06-01", "F", "N"), (2, "1960-06-02", "M", None), (3, "1970-01-01", "F", "S")]
DISP = [(i, T0, "RXA1") for i in (1, 2, 3)] + [
    (1, "2018-05-31", "RXC1"), (1, "2018-02-21", "RXC1"),  # days -1 and -100: one code
    (1, "2017-06-01", "RXD1"),  # day -365: a second code
    (1, "2017-05-31", "RXE1"),  # day -366: outside
]
DIAG = [(1, "2018-05-31", "MI1"), (1, "2013-06-02", "MI1"), (1, T0, "MI1"),  # days -1, -1825, 0
        (3, "2013-06-01", "MI1")]  # day -1826: outside
MEAS = [
    (1, "2018-05-22", "LAB7", 7.0), (1, "2018-05-22", "LAB7", 9.0),  # day -10 twice: last is 9
    (1, "2017-11-13", "LAB7", 12.0),  # day -200
    (1, "2018-06-02", "LAB7", 20.0),  # day 1: outside
    (3, "2017-06-01", "LAB7", 5.0), (3, "2017-05-31", "LAB7", 100.0),  # days -365 and -366
    (901, "2018-05-02", "LAB7", 6.0), (902, "2018-05-02", "LAB7", 8.0),  # day -30
]


def cohort(tmp_path, covs=COVS, persons=PERSONS, **kw):
    res = run(tmp_path, persons=persons, disp=DISP, diag=DIAG, meas=MEAS,
              proto={"concepts": CONCEPTS, "covariates": covs}, **kw)
    return res, res.cohort.set_index(res.cohort.person_id.astype(int))


def test_summaries_windows_and_ties(tmp_path):
    _, c = cohort(tmp_path)
    assert c.loc[[1, 2, 3], "age"].tolist() == [58, 57, 48]  # 1 on the birthday, 2 the day before
    assert c.loc[[1, 2], "sex"].tolist() == ["F", "M"] and c.loc[1, "yr"] == 2018
    assert c.loc[[1, 2, 3], "prior_mi"].tolist() == [1, 0, 0]
    assert c.loc[[1, 2, 3], "n_mi"].tolist() == [2, 0, 0]
    assert c.loc[[1, 2, 3, 901], "n_drugs"].tolist() == [2, 0, 0, 0]  # 0 when no record
    assert c.loc[1, "hb_last"] == 9.0  # the latest day, the largest value on a tie
    assert c.loc[1, "hb_mean"] == pytest.approx((7 + 9 + 12) / 3)
    assert (c.loc[1, "hb_min"], c.loc[1, "hb_max"]) == (7.0, 12.0)
    assert c.loc[3, ["hb_last", "hb_mean", "hb_min", "hb_max"]].tolist() == [5.0] * 4


def test_missing_indicator_fill(tmp_path):
    _, c = cohort(tmp_path)
    # hb_last known for 1, 3, 901, 902: 9, 5, 6, 8 -> median 7; person 2 has no record
    assert c.loc[2, "hb_last"] == 7.0 and c.loc[2, "hb_last_missing"] == 1
    assert c.loc[[1, 3, 901, 902], "hb_last_missing"].tolist() == [0, 0, 0, 0]
    assert c.loc[2, "hb_max"] == pytest.approx(7.0)  # maxima 12, 5, 6, 8 -> median 7
    assert c.loc[2, "region"] == "missing" and c.loc[2, "region_missing"] == 1
    assert c.loc[1, "region"] == "N" and c.loc[1, "region_missing"] == 0
    # only covariates that may be missing get a flag, each right after its covariate
    cols = list(c.columns)
    assert "n_drugs_missing" not in cols and "age_missing" not in cols
    assert cols[cols.index("hb_last") + 1] == "hb_last_missing"
    assert cols[:4] == ["person_id", "arm", "treated", "time_zero"]


def test_missing_exclude_step(tmp_path):
    covs = [dict(COVS[7], missing="exclude"), COVS[4]]
    res, c = cohort(tmp_path, covs=covs)
    assert 2 not in c.index and {1, 3}.issubset(c.index)
    a = res.attrition
    assert a.step.tolist()[-1] == "covariate:hb_last"
    assert a.excluded.tolist()[-1] == 1
    assert a.description.tolist()[-1] == "covariate hb_last is known (missing: exclude)"
    assert c.hb_last_missing.eq(0).all()


def test_missing_exclude_empties_an_arm(tmp_path):
    covs = [dict(COVS[7], missing="exclude")]
    meas = [m for m in MEAS if m[0] != 902]  # the only arm_b person loses her value
    with pytest.raises(CohortError, match="arm 'arm_b'.*'covariate:hb_last'"):
        run(tmp_path, persons=PERSONS, disp=DISP, meas=meas,
            proto={"concepts": CONCEPTS, "covariates": covs})


def test_kinds(tmp_path):
    res, c = cohort(tmp_path)
    kinds = covariate_kinds(_protocol(tmp_path), res.cohort)
    assert kinds == {"age": "continuous", "sex": "categorical", "yr": "continuous",
                     "region": "categorical", "prior_mi": "binary", "n_mi": "continuous",
                     "n_drugs": "continuous", "hb_last": "continuous", "hb_mean": "continuous",
                     "hb_min": "continuous", "hb_max": "continuous"}


def test_numeric_attribute_binary_kind_and_median(tmp_path):
    persons = [(1, "1960-01-01", "F", "1"), (2, "1960-01-01", "F", None),
               (3, "1960-01-01", "F", "0")]
    covs = [{"name": "region", "attribute": "region"}]
    res, c = cohort(tmp_path, covs=covs, persons=persons)
    # known values 1, 0 and the fillers' missing ones: median of (1, 0) = 0.5
    assert c.loc[[1, 3], "region"].tolist() == [1.0, 0.0] and c.loc[2, "region"] == 0.5
    proto = _protocol(tmp_path, covs)
    assert covariate_kinds(proto, res.cohort) == {"region": "binary"}
    covs = [{"name": "region", "attribute": "region", "kind": "categorical"}]
    res, c = cohort(tmp_path, covs=covs, persons=persons)
    assert c.loc[[1, 2, 3], "region"].tolist() == ["1", "missing", "0"]


def _protocol(tmp_path, covs=COVS):
    from test_cohort import BASE, merge

    from emulant.protocol import parse_protocol
    return parse_protocol(merge(BASE, {"concepts": CONCEPTS, "covariates": covs}), tmp_path)


def test_kinds_ignore_filled_rows():
    proto = _protocol(".", [{"name": "region", "attribute": "region"}])
    df = pd.DataFrame({"region": [1.0, 0.5, 0.0], "region_missing": [0, 1, 0]})
    assert covariate_kinds(proto, df) == {"region": "binary"}
