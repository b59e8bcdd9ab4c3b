"""Time-to-event estimators against the truth of simulations with constant daily hazards
(``tests/daily_hazards.py``: the truth is each person's closed-form cumulative incidence under
both arms, averaged over the sample drawn).

Tolerances are in bootstrap standard errors of the estimate (multinomial frequency weights, the
same replicates the workflow's bootstrap draws): 3 SE is a fixed, common-practice tolerance
(~0.3% two-sided miss rate per comparison under normality).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest
from daily_hazards import Design, analysis_sample, bootstrap, expit, simulate
from two_arm import two_arm_protocol

from emulant.estimation.pooled_logistic import hazard_models
from emulant.estimation.tte import losses, outcome_arrays, time_to_event_estimates
from emulant.report.narrative import warnings

METHODS = ("ipw", "standardization", "doubly_robust")


def _protocol(max_days, horizons, period_days=30, censoring_weights=True, methods=METHODS,
              estimands=("ATE", "ATT")):
    return two_arm_protocol(
        "sim", follow_up={"max_days": max_days},
        outcomes={"primary": "event", "competing": ["death"]},
        covariates=[{"name": "x", "attribute": "x"}], estimands=list(estimands),
        analysis={"horizons_days": list(horizons), "methods": list(methods),
                  "period_days": period_days, "censoring_weights": censoring_weights,
                  "hazard_ratio": False})


def _risks(rows, keys):
    got = {(r["method"], r["estimand"], r["arm"], r["horizon_day"]): r["estimate"]
           for r in rows if r["measure"] == "risk"}
    return np.array([got[k] for k in keys])


# ------------------------------------------------- the censoring model and the end of follow-up

HORIZONS = (365, 730, 1095)
COVARIATE_CENSORING = Design()  # censoring and the outcome both rise with x; max_days 1095


@pytest.fixture(scope="module")
def covariate_censoring():
    """Risks with censoring weights from the pooled logistic censoring model, at horizons up to
    ``max_days``, with their bootstrap SEs and the truth."""
    cohort, truth = simulate(COVARIATE_CENSORING, 11, HORIZONS)
    prot = _protocol(1095, HORIZONS)
    keys = [(m, est, arm, h) for m in METHODS for est in ("ATE", "ATT")
            for arm in ("drug_a", "drug_b") for h in HORIZONS]

    def estimate(freq=None):
        rows, _ = time_to_event_estimates(analysis_sample(cohort, prot, freq), "event")
        return _risks(rows, keys)

    se = bootstrap(estimate, len(cohort), 25, 5).std(axis=0, ddof=1)
    target = np.array([truth[est][1 if arm == "drug_a" else 0][h] for _, est, arm, h in keys])
    return cohort, keys, estimate(), se, target


def test_censoring_weighted_risks_cover_the_truth_up_to_max_days(covariate_censoring):
    # the simulation's own truth, in bootstrap SE units: censoring depends on x, so only the
    # censoring-weighted IPW and the doubly robust estimator (and the g-formula, whose outcome
    # model holds x) recover it; the horizon equals max_days, where every person still followed
    # reaches the planned end of follow-up (not a loss)
    _, keys, est, se, target = covariate_censoring
    z = (est - target) / se
    bad = [(k, round(e, 4), round(t, 4), round(float(zz), 1))
           for k, e, t, zz in zip(keys, est, target, z, strict=True) if abs(zz) > 3]
    assert not bad, bad


def test_censoring_model_follows_the_true_censoring_hazard(covariate_censoring):
    # the fitted daily censoring hazard of the last period against the simulation's own
    # censoring hazard expit(-7.7 + 0.9 x): reaching max_days must not count as censoring
    cohort, *_ = covariate_censoring
    t, s = outcome_arrays(cohort, "event")
    lost = losses(cohort, "event", np.ones(len(cohort)), 1095)
    assert not lost[t >= 1095].any()
    a, X = cohort.treated.to_numpy(), cohort[["x"]].to_numpy()
    model = hazard_models(t, s, a, X, None, 30, 1095, True, lost)["censoring"]
    b = COVARIATE_CENSORING.censoring
    grid = np.array([[-1.0], [0.0], [1.0]])
    for arm in (0, 1):
        fitted = model.predict_hazard(grid, arm)[:, -6:]  # the last 180 days
        true = expit(b[0] + b[1] * grid)
        np.testing.assert_allclose(fitted, np.broadcast_to(true, fitted.shape), rtol=0.35)


# ------------------------------------------------- censoring inside a period, saturated models

SATURATED = Design(n=8000, max_days=540, outcome=(-6.6, 0.0, -0.4), competing=(-8.0, 0.0),
                   censoring=(-5.8, 0.0), propensity=(0.0, 0.0))


@pytest.mark.parametrize("period_days", [90, 30])
def test_saturated_standardization_equals_aalen_johansen(period_days):
    # with no covariate the g-formula's models are saturated in the arm (and, with 90-day
    # periods over 540 days, in time: six periods, one indicator each): its risk must equal the
    # (frequency-weighted) Aalen–Johansen risk within Monte Carlo error, here the bootstrap SE
    # of their difference; heavy censoring (60% of persons), most of it inside periods.
    # Before the day-level risk set these ran 8-11% (90 days) and 2-4% (30 days) low.
    horizons = (180, 360, 540)
    cohort, truth = simulate(SATURATED, 3, horizons)
    prot = _protocol(540, horizons, period_days, False, ("standardization",), ("ATE",))
    keys = [(m, e, arm, h) for m, e in (("standardization", "ATE"), ("unadjusted", None))
            for arm in ("drug_a", "drug_b") for h in horizons]

    def estimate(freq=None):
        rows, _ = time_to_event_estimates(analysis_sample(cohort, prot, freq, ()), "event")
        return _risks(rows, keys)

    point = estimate()
    boot = bootstrap(estimate, len(cohort), 20, 2)
    half = len(keys) // 2
    diff, diff_se = point[:half] - point[half:], (boot[:, :half] - boot[:, half:]).std(axis=0)
    assert np.all(np.abs(diff) < 3 * diff_se), (diff, diff_se)
    # and both near the simulation's own truth
    target = np.array([truth["ATE"][1 if arm == "drug_a" else 0][h] for *_, arm, h in keys])
    assert np.all(np.abs(point - target) < 3 * boot.std(axis=0, ddof=1))


# ------------------------------------------------- doubly robust estimation and weight truncation

def _truncated(sample, q=(0.05, 0.95)):
    """The sample with each estimand's weights winsorised at quantiles ``q`` (written out here
    with numpy, as ``analysis.weights.truncate`` does, Cole & Hernán 2008)."""
    w = {k: np.clip(v, *np.quantile(v, q)) for k, v in sample.weights.items()}
    return dataclasses.replace(sample, weights=w)


def test_doubly_robust_uses_the_untruncated_propensity():
    # one rule for both kinds of outcome (measured outcomes: Robins, Rotnitzky & Zhao 1994,
    # emulant.estimation.measured): the augmentation term uses the untruncated propensity, which
    # keeps the estimator doubly robust. Design: the outcome model omits the confounder (it is
    # wrong), the propensity model is right; truncating the weights then biases IPW (the price
    # of truncation) but must not bias the doubly robust risks, which cover the simulation's
    # own truth in bootstrap SE units. Before, the doubly robust risks used the truncated
    # weights and missed the ATT comparator risk by about 5 SE.
    horizons = (365, 730)
    design = Design(n=4000, max_days=730, outcome=(-7.6, 0.9, -0.5), censoring=(-8.0, 0.0),
                    propensity=(-0.3, 1.5))
    cohort, truth = simulate(design, 21, horizons)
    prot = _protocol(730, horizons, censoring_weights=False,
                     methods=("ipw", "doubly_robust"))
    keys = [("doubly_robust", est, arm, h) for est in ("ATE", "ATT")
            for arm in ("drug_a", "drug_b") for h in horizons]

    def sample(freq=None):
        s = analysis_sample(cohort, prot, freq)
        return dataclasses.replace(s, X=np.zeros((len(cohort), 0)), columns=())

    def estimate(freq=None):
        rows, _ = time_to_event_estimates(_truncated(sample(freq)), "event")
        return _risks(rows, keys)

    # the doubly robust rows do not depend on the truncation at all
    untruncated, _ = time_to_event_estimates(sample(), "event")
    np.testing.assert_allclose(estimate(), _risks(untruncated, keys), rtol=1e-12)
    se = bootstrap(estimate, len(cohort), 20, 1).std(axis=0, ddof=1)
    target = np.array([truth[est][1 if arm == "drug_a" else 0][h] for _, est, arm, h in keys])
    z = (estimate() - target) / se
    assert np.all(np.abs(z) < 3), dict(zip(keys, np.round(z, 1), strict=True))


# ------------------------------------------------- horizons past the data

def test_horizons_an_arm_does_not_reach_are_not_estimable():
    # Kaplan & Meier (1958) leave the estimate undefined past the last observation (from
    # memory); Aalen–Johansen carries its last value forward there and the g-formula
    # extrapolates its time basis. Design: the comparator's coverage ends by day 500 for all but
    # three persons (fewer than report.min_cell = 5), none of whom is followed to day 720.
    horizons = (365, 540, 720)
    design = Design(n=3000, max_days=720, censoring=(-9.0, 0.0))
    cohort, _ = simulate(design, 4, horizons)
    day, reason = "end_day__event", "end_reason__event"
    late = (cohort.treated == 0) & (cohort[day] > 500)
    keep = cohort.index[late][:3]
    cut = late & ~cohort.index.isin(keep)
    cohort.loc[cut, [day, reason]] = [500.0, "coverage_end"]
    cohort.loc[keep, [day, reason]] = [600.0, "coverage_end"]
    prot = _protocol(720, horizons)
    rows, _ = time_to_event_estimates(analysis_sample(cohort, prot), "event")
    for r in rows:
        h = r["horizon_day"]
        gone = h in (540, 720) and (r["measure"] != "risk" or r["arm"] == "drug_b")
        assert np.isnan(r["estimate"]) == gone, r
        if gone:
            who = "no one" if h == 720 else "fewer than 5 persons"
            assert r["note"] == f"not estimable: {who} at risk on day {h} in drug_b", r
        else:
            assert "note" not in r
    # the report's warnings panel names them, read from the estimates' note
    panel = [w["text"] for w in warnings(prot, {"estimates": pd.DataFrame(rows)}, {}, False)]
    assert ("event: 21 estimate(s) (risk, risk_difference, risk_ratio) not estimable: no one at "
            "risk on day 720 in drug_b.") in panel
