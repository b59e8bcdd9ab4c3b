"""Subgroup analyses (CONTRACTS §5f): levels, estimability, differences between levels.

The level analysis is checked against the same analysis run on the level's persons alone (a
subgroup analysis is by definition the study restricted to the subgroup: common practice, no
single source); the difference between levels against hand computation; the synthetic
registry's effect modification by sex in tests/estimation/test_truth_time_to_event.py.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from test_effects import cohort_frame, linear_world, make_protocol

from emulant.estimation.effects import point_estimate
from emulant.estimation.subgroups import level_differences, levels_of
from emulant.protocol import Subgroup

COVS = (("x1", "continuous"), ("x2", "binary"))


def _with_subgroups(protocol, *subgroups):
    return replace(protocol, subgroups=tuple(subgroups))


def test_levels_and_labels():
    cohort = pd.DataFrame({"age": [40, 74, 75, 80, 90], "sex": ["M", "F", "F", "M", "F"]})
    protocol = _with_subgroups(make_protocol(()), Subgroup("sex"), Subgroup("age", (75.0, 85.0)))
    got = [(lv.label, list(lv.rows)) for lv in levels_of(cohort, protocol)]
    assert got == [("sex=F", [1, 2, 4]), ("sex=M", [0, 3]),
                   ("age<75", [0, 1]), ("75<=age<85", [2, 3]), ("age>=85", [4])]


def test_level_rows_equal_the_analysis_of_the_level_alone():
    a, covs, y = linear_world(n=600, seed=3, noise=1.0)
    cohort = cohort_frame(a, covs, y)
    protocol = make_protocol(COVS, methods=("ipw", "standardization", "doubly_robust"))
    point = point_estimate(cohort, _with_subgroups(protocol, Subgroup("x2")))
    assert [s["subgroup"] for s in point.subgroups if s["estimable"]] == ["x2=0", "x2=1"]
    for label, value in (("x2=0", 0), ("x2=1", 1)):
        alone = point_estimate(cohort[cohort.x2 == value].reset_index(drop=True), protocol).rows
        mine = [r for r in point.rows if r.get("subgroup") == label]
        assert len(mine) == len(alone) > 0
        for r, s in zip(mine, alone, strict=True):
            assert r["measure"] == s["measure"] and r["estimate"] == pytest.approx(s["estimate"], abs=1e-9)


def test_a_level_too_small_is_not_estimable_never_a_crash():
    a, covs, y = linear_world(n=300, seed=5, noise=1.0)
    covs["site"] = np.where(np.arange(300) < 6, "tiny", "big")  # six persons: an arm below 5
    cohort = cohort_frame(a, covs, y)
    protocol = replace(make_protocol((*COVS, ("site", "categorical"))),
                       subgroups=(Subgroup("site"),))
    point = point_estimate(cohort, protocol)
    tiny = next(s for s in point.subgroups if s["subgroup"] == "site=tiny")
    assert tiny["estimable"] is False and "fewer than 5 persons" in tiny["reason"]
    assert not [r for r in point.rows if r.get("subgroup") == "site=tiny"]
    assert [r for r in point.rows if r.get("subgroup") == "site=big"]


def test_difference_between_levels_by_hand():
    base = {"outcome": "y", "contrast": "intention_to_treat", "estimand": "ATE", "method": "ipw",
            "horizon_day": None, "arm": "treat", "comparator": "comp", "n": 10, "events": None}
    rows = [{**base, "measure": "mean_difference", "estimate": 1.0},  # the whole cohort
            {**base, "measure": "mean_difference", "estimate": 0.5, "subgroup": "s=a"},
            {**base, "measure": "mean", "estimate": 7.0, "subgroup": "s=a"},
            {**base, "measure": "mean_difference", "estimate": 2.0, "subgroup": "s=b"}]
    reps = np.array([[1.0, 0.4, 7.0, 2.5], [1.1, 0.6, 7.1, 1.9]])
    account = [{"subgroup": "s=a", "covariate": "s", "estimable": True, "reason": None},
               {"subgroup": "s=b", "covariate": "s", "estimable": True, "reason": None}]
    new, extra = level_differences(rows, reps, account)
    assert len(new) == 1 and new[0]["subgroup"] == "s=b minus s=a"
    assert new[0]["estimate"] == pytest.approx(1.5) and new[0]["n"] is None
    assert extra[:, 0] == pytest.approx([2.1, 1.3])
