"""E-values (emulant.estimation.evalue) against the worked examples of VanderWeele & Ding 2017."""

from __future__ import annotations

import math

import pytest

from emulant.estimation.evalue import e_value, e_value_ci, e_value_rows, hr_to_rr


def test_worked_example_vanderweele_ding_2017():
    # VanderWeele & Ding 2017 (Ann Intern Med 167:268): an observed risk ratio of 3.9 has
    # E-value 7.26; its lower confidence limit 1.8 has E-value 3.0 (values from memory)
    assert e_value(3.9) == pytest.approx(7.26, abs=0.005)
    assert e_value_ci(3.9, 1.8, 8.7) == pytest.approx(3.0, abs=0.005)


def test_protective_ratios_and_null_intervals():
    # formula of the same paper: E(RR) = E(1/RR) for RR < 1; 1 when the interval includes 1
    assert e_value(0.5) == pytest.approx(2 + math.sqrt(2))
    assert e_value(1.0) == 1.0
    assert e_value_ci(0.5, 0.3, 0.8) == pytest.approx(e_value(1 / 0.8))
    assert e_value_ci(1.3, 0.9, 1.8) == 1.0
    assert math.isnan(e_value(float("nan"))) and math.isnan(e_value(0.0))


def test_common_outcome_hazard_ratio_transform():
    # VanderWeele & Ding 2017's approximation for a common outcome (hand computation)
    hr = 2.0
    rr = (1 - 0.5 ** math.sqrt(2)) / (1 - 0.5 ** math.sqrt(0.5))
    assert hr_to_rr(hr, common=True) == pytest.approx(rr)
    assert hr_to_rr(hr, common=False) == 2.0
    assert hr_to_rr(1.0, common=True) == pytest.approx(1.0)


def _risk(outcome, method, arm, horizon, value):
    return {"outcome": outcome, "contrast": "intention_to_treat", "estimand": "ATE",
            "method": method, "measure": "risk", "horizon_day": horizon, "arm": arm,
            "comparator": None, "estimate": value}


def test_e_value_rows():
    base = {"outcome": "o", "contrast": "intention_to_treat", "estimand": "ATE", "method": "ipw",
            "arm": "a", "comparator": "b", "se": 0.1}
    rows = [
        {**base, "measure": "risk_ratio", "horizon_day": 365, "estimate": 3.9, "ci_low": 1.8,
         "ci_high": 8.7, "n": 1000, "events": 50},
        {**base, "measure": "hazard_ratio", "horizon_day": None, "estimate": 2.0, "ci_low": 1.5,
         "ci_high": 2.5, "n": 1000, "events": 400},  # estimated risk 40% at the end: common
        {**base, "outcome": "p", "measure": "hazard_ratio", "horizon_day": None, "estimate": 2.0,
         "ci_low": None, "ci_high": None, "n": 1000, "events": 100},  # 10%: rare
        {**base, "measure": "risk_difference", "horizon_day": 365, "estimate": 0.1},
        _risk("o", "ipw", "a", 365, 0.1), _risk("o", "ipw", "b", 365, 0.05),
        _risk("o", "ipw", "a", 730, 0.4), _risk("o", "ipw", "b", 730, 0.2),
        _risk("p", "ipw", "a", 730, 0.1), _risk("p", "ipw", "b", 730, 0.05),
    ]
    out = e_value_rows(rows)
    assert [r["measure"] for r in out] == ["e_value"] * 3
    assert out[0]["estimate"] == pytest.approx(7.26, abs=0.005)
    assert out[0]["ci_low"] == pytest.approx(3.0, abs=0.005)
    assert out[0]["horizon_day"] == 365 and out[0]["ci_high"] is None and out[0]["se"] is None
    assert out[1]["estimate"] == pytest.approx(e_value(hr_to_rr(2.0, True)))
    assert out[1]["ci_low"] == pytest.approx(e_value(hr_to_rr(1.5, True)))
    assert out[2]["estimate"] == pytest.approx(e_value(2.0)) and out[2]["ci_low"] is None
    assert {k: out[0][k] for k in ("arm", "comparator", "method", "estimand")} == \
        {"arm": "a", "comparator": "b", "method": "ipw", "estimand": "ATE"}


def test_common_outcome_from_the_estimated_risk_not_the_crude_share():
    # VanderWeele & Ding 2017 call an outcome common when its risk at the end of follow-up is
    # above 15%. With heavy censoring only 10% of persons are seen with the outcome, while the
    # estimated cumulative risk at the last horizon is 30%: the outcome is common, and the
    # hazard ratio is transformed before its E-value (the crude share would call it rare).
    hr = {"outcome": "o", "contrast": "intention_to_treat", "estimand": "ATE", "method": "ipw",
          "measure": "hazard_ratio", "horizon_day": None, "arm": "a", "comparator": "b",
          "estimate": 2.0, "ci_low": 1.5, "ci_high": 2.7, "n": 1000, "events": 100}
    rows = [hr, _risk("o", "ipw", "a", 365, 0.12), _risk("o", "ipw", "b", 365, 0.08),
            _risk("o", "ipw", "a", 1095, 0.30), _risk("o", "ipw", "b", 1095, 0.18)]
    (out,) = e_value_rows(rows)
    assert out["estimate"] == pytest.approx(e_value(hr_to_rr(2.0, True)))
    assert out["estimate"] < e_value(2.0)
    # a rare outcome by its estimated risk keeps the hazard ratio as it is
    rows = [hr, _risk("o", "ipw", "a", 1095, 0.12), _risk("o", "ipw", "b", 1095, 0.08)]
    assert e_value_rows(rows)[0]["estimate"] == pytest.approx(e_value(2.0))


def test_no_e_value_for_unadjusted_rows_or_negative_controls():
    # an E-value is about an adjusted estimate (VanderWeele & Ding 2017): the crude ratio and a
    # negative control's ratio (a check of residual confounding) get none
    rr = {"contrast": "intention_to_treat", "estimand": "ATE", "measure": "risk_ratio",
          "horizon_day": 365, "arm": "a", "comparator": "b", "estimate": 1.4, "ci_low": 1.1,
          "ci_high": 1.8}
    rows = [{**rr, "outcome": "o", "method": "unadjusted", "estimand": None},
            {**rr, "outcome": "o", "method": "ipw"},
            {**rr, "outcome": "nc", "method": "ipw"}]
    out = e_value_rows(rows, negative_controls=("nc",))
    assert [(r["outcome"], r["method"]) for r in out] == [("o", "ipw")]
