"""Sparse arms: ratios with no finite estimate are written as not estimable, with the reason,
and bootstrap replicates whose ratio is 0 or infinite are counted, not silently dropped.

Sources: monotone likelihood in Cox regression (Heinze & Schemper 2001, Biometrics 57:114-119):
with no events in one arm of a binary covariate the partial likelihood increases without bound
and the maximum likelihood estimate is infinite; lifelines' CoxPHFitter (reference library)
shows the same on these data (a warning and a standard error in the thousands). A risk ratio
with a zero risk in an arm is 0 or undefined (arithmetic).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from two_arm import two_arm_protocol

from emulant import columns
from emulant.estimation import bootstrap as B
from emulant.estimation import intervals as I
from emulant.estimation.cox import cox_fit, cox_hazard_ratio
from emulant.estimation.effects import non_estimable_account
from emulant.estimation.evalue import e_value_rows
from emulant.estimation.sample import AnalysisSample
from emulant.estimation.tte import time_to_event_estimates


def _no_treated_events(n=400, seed=3):
    rng = np.random.default_rng(seed)
    a = (rng.random(n) < 0.5).astype(int)
    t = rng.integers(1, 365, n).astype(float)
    e = ((rng.random(n) < 0.3) & (a == 0)).astype(int)
    # a fifth of those without an event followed to day 365, so both arms reach the last horizon
    # (an arm no one follows to a horizon has nothing estimable there)
    t[(rng.random(n) < 0.2) & (e == 0)] = 365.0
    return t, e, a


def test_zero_events_in_an_arm_has_no_hazard_ratio():
    t, e, a = _no_treated_events()
    # the plain Newton fit runs off towards -infinity and stops at an arbitrary value ...
    assert cox_fit(t, e, a)[0] < -15
    # ... as the reference library does: lifelines warns and reports a huge standard error
    from lifelines import CoxPHFitter
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        ref = CoxPHFitter().fit(pd.DataFrame({"T": t, "E": e, "a": a}), "T", "E")
    assert ref.standard_errors_["a"] > 100 and caught
    hr = cox_hazard_ratio(t, e, a)
    assert np.isnan(hr.log_hr) and np.isnan(hr.hr)
    assert hr.not_estimable == "no events in the treated arm"
    assert hr.events == e.sum()
    hr = cox_hazard_ratio(t, e, 1 - a)
    assert hr.not_estimable == "no events in the comparator arm"


def test_events_only_after_the_other_arm_left_is_monotone_too():
    # comparator events all come after the last treated person left follow-up: at each of them
    # no treated person is at risk, so the score never changes sign (Heinze & Schemper 2001)
    t = np.array([5, 10, 20, 30, 40, 50, 60, 70], float)
    a = np.array([1, 1, 1, 1, 0, 0, 0, 0])
    e = np.array([1, 0, 1, 0, 0, 1, 0, 1])
    hr = cox_hazard_ratio(t, e, a)
    assert np.isnan(hr.log_hr) and "monotone likelihood" in hr.not_estimable
    e2 = e.copy()
    e2[4] = 1  # a comparator event at day 40 with the treated person of day 30 gone: still monotone
    assert np.isnan(cox_hazard_ratio(t, e2, a).log_hr)
    t2 = t.copy()
    t2[4] = 25  # now at risk together with the treated person followed to day 30: finite
    hr = cox_hazard_ratio(t2, e2, a)
    assert not hr.not_estimable and np.isfinite(hr.log_hr)


def _sample(t, e, a, protocol):
    cohort = pd.DataFrame({"person_id": np.arange(len(t)), "treated": a,
                           "arm": np.where(a == 1, "drug_a", "drug_b"),
                           "x": np.random.default_rng(1).normal(size=len(t)),
                           columns.end_day("event"): t,
                           columns.end_reason("event"): np.where(e == 1, "outcome", "max_follow_up")})
    cohort.loc[(e == 0) & (t < 300), columns.end_reason("event")] = "coverage_end"
    e_hat = np.full(len(t), a.mean())
    w = {"ATE": np.where(a == 1, 1 / e_hat, 1 / (1 - e_hat))}
    return AnalysisSample(cohort, protocol, cohort[["x"]].to_numpy(), ("x",), a.astype(float),
                          np.ones(len(t)), e_hat, w)


def test_ratio_rows_of_an_arm_without_events_are_empty_with_the_reason():
    t, e, a = _no_treated_events()
    protocol = two_arm_protocol(
        "sparse", follow_up={"max_days": 365}, covariates=[{"name": "x", "attribute": "x"}],
        estimands=["ATE"], analysis={"horizons_days": [180, 365], "methods": ["ipw"]})
    rows, _ = time_to_event_estimates(_sample(t, e, a, protocol), "event")
    hrs = [r for r in rows if r["measure"] == "hazard_ratio"]
    assert len(hrs) == 2  # unadjusted and ipw
    for r in hrs:
        assert np.isnan(r["estimate"]) and r["note"] == "not estimable: no events in the treated arm"
    rrs = [r for r in rows if r["measure"] == "risk_ratio"]
    assert len(rrs) == 4
    for r in rrs:
        assert np.isnan(r["estimate"])
        assert r["note"] == f"not estimable: no events by day {r['horizon_day']} in drug_a"
    # the risk difference stays estimable: 0 minus the comparator's risk
    rd = [r for r in rows if r["measure"] == "risk_difference"]
    assert all(np.isfinite(r["estimate"]) and r["estimate"] < 0 and "note" not in r for r in rd)
    # no E-value of a ratio that does not exist
    assert all(np.isnan(r["estimate"]) for r in e_value_rows(rows))


def test_bootstrap_counts_replicates_whose_ratio_is_zero_or_infinite():
    rows = [{"outcome": "o", "contrast": "c", "estimand": "ATE", "method": "ipw",
             "measure": m, "horizon_day": 365, "arm": "a", "comparator": "b", "estimate": v}
            for m, v in (("risk_ratio", 1.5), ("hazard_ratio", 0.8), ("risk_difference", 0.1))]
    k = 40
    reps = np.column_stack([np.exp(np.linspace(-0.3, 0.9, k)), np.exp(np.linspace(-0.5, 0.1, k)),
                            np.linspace(0.0, 0.2, k)])
    reps[3, 0] = np.inf  # 1 of 40 (2.5%): interval from the other 39, counted
    reps[[1, 5, 9], 1] = [np.inf, np.nan, 0.0]  # 3 of 40 (7.5% > 5%): no interval
    run = B.BootstrapRun(k, 1, "wald", reps, np.zeros((k, 0)), completed_ids=list(range(k)))
    out, _ = I.attach_intervals(rows, [], run, "wald")
    # the first row's interval is the Wald interval of the 39 finite log values (hand formula)
    logs = np.log(np.delete(reps[:, 0], 3))
    sd = np.std(logs, ddof=1)
    assert out[0]["se"] == pytest.approx(sd)
    assert out[0]["ci_low"] == pytest.approx(1.5 * np.exp(-I.Z_975 * sd))
    assert out[0]["note"] == ("1 of 40 bootstrap replicates not estimable (missing, 0 or "
                              "infinite); interval from the others")
    assert np.isnan(out[1]["ci_low"]) and np.isnan(out[1]["se"]) and "no interval" in out[1]["note"]
    assert "note" not in out[2] and np.isfinite(out[2]["ci_low"])
    acc = non_estimable_account(rows, run)
    assert [(x["measure"], x["replicates"], x["of"]) for x in acc] == [
        ("risk_ratio", 1, 40), ("hazard_ratio", 3, 40)]
