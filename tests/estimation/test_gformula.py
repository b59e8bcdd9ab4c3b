"""The parametric g-formula (emulant.estimation.gformula) against outside references:
Hernán & Robins' Table 21.1, the nonparametric g-formula computed by hand on a small discrete
example, and a simulation with known models (truth by simulating the same persons)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from test_per_protocol import HORIZON, P, _simulate
from two_arm import two_arm_protocol

from emulant import columns
from emulant.estimation.gformula import (
    draw_persons,
    first_values,
    fit_models,
    gformula_estimates,
    simulate,
)
from emulant.estimation.per_protocol import per_protocol_arrays, per_protocol_estimates
from emulant.estimation.sample import AnalysisSample
from emulant.estimation.survival import aalen_johansen, step_at
from emulant.estimation.tte import outcome_arrays
from emulant.models.treatment_process import adherence_weights, person_periods
from emulant.models.weights import estimand_weights

# Hernán & Robins, "Causal Inference: What If" (2020), Table 21.1 (from memory): (A0, L1, A1,
# N, mean Y); the book's g-formula gives E[Y] = 60 under "always treat" and "never treat".
TABLE_21_1 = [(0, 0, 0, 2400, 84), (0, 0, 1, 1600, 84), (0, 1, 0, 2400, 52), (0, 1, 1, 9600, 52),
              (1, 0, 0, 4800, 76), (1, 0, 1, 3200, 76), (1, 1, 0, 1600, 44), (1, 1, 1, 6400, 44)]


def two_period_data(cells, early):
    """Persons of a two-period study with periods of one day (P = 1).

    ``cells``: (a0, l1, a1, n, outcomes on day 2, competing events on day 2): arm a0 from day 0,
    binary L1 measured on day 1 (period 1), a1 != a0 a deviation on day 1, then the events of
    day 2. ``early``: per arm, (outcomes, competing events) on day 1, before L1 (no period 1).
    Returns cohort, periods and frequency weights.
    """
    rows = []
    for a0, l1, a1, n, out, comp in cells:
        dev = 1.0 if a1 != a0 else np.nan
        for count, reason in ((out, "outcome"), (comp, "competing"), (n - out - comp, "max_follow_up")):
            rows.append((a0, l1, dev, count, 2.0, reason, 2))
    for a0, (out, comp) in early.items():
        rows += [(a0, 0, np.nan, out, 1.0, "outcome", 1), (a0, 0, np.nan, comp, 1.0, "competing", 1)]
    t = pd.DataFrame(rows, columns=["a", "l1", "deviation_day", "n", "end", "reason", "periods"])
    t = t[t.n > 0].reset_index(drop=True)
    t["person_id"] = np.arange(len(t))
    t[columns.end_day("event")] = t.end
    t[columns.end_reason("event")] = t.reason
    per = t.loc[t.index.repeat(t.periods), ["person_id", "l1"]]
    per["period"] = per.groupby("person_id").cumcount()
    per["start_day"] = per.period
    per["l_now"] = np.where(per.period == 1, per.l1, 0)
    return t, per[["person_id", "period", "start_day", "l_now"]], t.n.to_numpy(float)


def gformula_risks(t, periods, f, n_sim=200_000, seed=7, natural=False):
    """The g-formula's risk by day 2 under each arm (or the natural course's, by own arm)."""
    pp = person_periods(t, periods, 1, time_varying=["l_now"], kinds={"l_now": "binary"})
    a = t.a.to_numpy(float)
    time, status = outcome_arrays(t, "event")
    pp_time, pp_status = per_protocol_arrays(t, "event")
    competing = bool((status == 2).any())
    models = fit_models(pp, a, np.empty((len(t), 0)), f, time, status, pp_time, pp_status, 2,
                        competing)
    assert models.problems == []
    idx = draw_persons(f, n_sim, np.random.default_rng(seed))
    L0, X = first_values(pp)[idx], np.empty((n_sim, 0))
    if natural:
        arm = a[idx]
        F = simulate(models, X, L0, arm, np.random.default_rng(seed + 1), [2], 1, natural=True)[:, 0]
        return {g: F[arm == g].mean() for g in (0, 1)}
    return {g: simulate(models, X, L0, np.full(n_sim, g), np.random.default_rng(seed + 1), [2],
                        1)[:, 0].mean() for g in (0, 1)}


def test_table_21_1_gformula_gives_the_same_risk_under_always_and_never_treat():
    # the table's mean Y read as the share with the outcome on day 2; 4000 persons of each arm
    # have the outcome on day 1, before L1 (so that every period has events). By the book's
    # g-formula (60 under both strategies) the risk by day 2 is 0.2 + 0.8 * 0.60 = 0.68 under both
    cells = [(a0, l1, a1, n, n * y // 100, 0) for a0, l1, a1, n, y in TABLE_21_1]
    t, periods, f = two_period_data(cells, {0: (4000, 0), 1: (4000, 0)})
    risk = gformula_risks(t, periods, f)
    # Monte Carlo SE with 200,000 persons: about 0.001
    assert risk[1] == pytest.approx(0.68, abs=0.004)
    assert risk[0] == pytest.approx(0.68, abs=0.004)
    # the associational contrast (those who followed each strategy, Kaplan–Meier of the
    # artificially censored data): 1 - 0.8 * (1 - 0.547) = 0.637 against 0.744
    time, status = per_protocol_arrays(t, "event")
    naive = {}
    for g in (0, 1):
        m = t.a.to_numpy() == g
        tt, cif, _ = aalen_johansen(time[m], status[m], f[m])
        naive[g] = step_at(tt, cif, [2.0], 0.0)[0]
    assert naive[1] == pytest.approx(1 - 0.8 * (1 - 5248 / 9600), abs=1e-9)
    assert naive[0] == pytest.approx(1 - 0.8 * (1 - 0.68), abs=1e-9)


def test_saturated_parametric_gformula_equals_the_nonparametric_one_by_hand():
    # a small discrete example with a competing event (counts invented for the test): the
    # nonparametric g-formula with one-day periods is
    #   F_a = o0/N0 + (N0 - o0 - c0)/N0 * sum_l P(L1 = l | a) * o1(a, l) / N1(a, l)
    # (Robins 1986; Young et al. 2020 for the competing event), where N1(a, l) counts those who
    # stayed on protocol on day 1; with one indicator per cell the models are saturated
    cells = [(0, 0, 0, 900, 90, 30), (0, 0, 1, 300, 0, 0), (0, 1, 0, 500, 150, 40),
             (0, 1, 1, 700, 0, 0), (1, 0, 1, 1000, 60, 20), (1, 0, 0, 200, 0, 0),
             (1, 1, 1, 400, 80, 60), (1, 1, 0, 600, 0, 0)]
    early = {0: (120, 80), 1: (100, 50)}
    t, periods, f = two_period_data(cells, early)
    hand = {}
    for g in (0, 1):
        mine = [c for c in cells if c[0] == g]
        n1 = sum(c[3] for c in mine)
        o0, c0 = early[g]
        N0 = n1 + o0 + c0
        stay = {v: [c for c in mine if c[1] == v and c[2] == g][0] for v in (0, 1)}
        p_l = {v: sum(c[3] for c in mine if c[1] == v) / n1 for v in (0, 1)}
        hand[g] = o0 / N0 + (N0 - o0 - c0) / N0 * sum(p_l[v] * stay[v][4] / stay[v][3]
                                                      for v in (0, 1))
    risk = gformula_risks(t, periods, f)
    for g in (0, 1):
        assert risk[g] == pytest.approx(hand[g], abs=0.004)
    assert abs(hand[1] - hand[0]) > 0.03  # the example has an effect, so the check can fail
    # natural course: the risk of the outcome before deviating, by hand and simulated
    nat = gformula_risks(t, periods, f, natural=True)
    for g in (0, 1):
        mine = [c for c in cells if c[0] == g]
        o0, c0 = early[g]
        N0 = sum(c[3] for c in mine) + o0 + c0
        observed = (o0 + sum(c[4] for c in mine if c[2] == g)) / N0
        assert nat[g] == pytest.approx(observed, abs=0.004)


def test_gformula_recovers_the_simulated_truth_and_its_natural_course_the_observed_risk():
    # the simulation of test_per_protocol (a marker lowered by treatment that raises the hazard
    # and makes stopping likelier), whose models are those the g-formula fits: a linear marker
    # with normal errors given its previous value and the arm, a logistic hazard and a logistic
    # probability of stopping given the marker. Truth: the same persons simulated on each arm.
    cohort, periods, truth = _simulate(8000, 13)
    protocol = two_arm_protocol(
        "gf", follow_up={"max_days": HORIZON}, estimands=["ATE"],
        strategies={"arms": {"drug_a": {"initiate": "drug_a", "sustain": {"gap_days": 30}},
                             "drug_b": {"initiate": "drug_b", "sustain": {"gap_days": 30}}},
                    "treated": "drug_a"},
        contrasts=["intention_to_treat", "per_protocol"],
        covariates=[{"name": "x", "attribute": "x"}],
        analysis={"horizons_days": [HORIZON], "methods": ["ipw", "gformula"], "period_days": P,
                  "hazard_ratio": False, "gformula": {"simulated_persons": 20000, "seed": 5}})
    a = cohort.treated.to_numpy(float)
    X = cohort[["x"]].to_numpy(float)
    f = np.ones(len(a))
    e = 1 / (1 + np.exp(-0.5 * cohort.x.to_numpy()))
    w0 = {"ATE": estimand_weights(a, e, "ATE", sample_weight=f)}
    sample = AnalysisSample(cohort, protocol, X, ("x",), a, f, e, w0)
    pp = person_periods(cohort, periods, P, time_varying=["marker"], kinds={"marker": "continuous"})
    problems: list[str] = []
    rows, curves = gformula_estimates(sample, pp, "event", problems)
    assert problems == []
    est = pd.DataFrame(rows)
    gf = est[est.estimand == "ATE"].set_index(["measure", "arm"]).estimate
    arms = {1: sample.treated_arm, 0: sample.comparator_arm}
    true_rd = truth[1] - truth[0]
    # truth 0.107 (treated) and 0.276; here the g-formula gives 0.108 and 0.279, difference
    # -0.170 against -0.169 (the event day within a period is uniform in the simulation, the
    # model's daily hazard constant)
    for g in (0, 1):
        assert gf["risk", arms[g]] == pytest.approx(truth[g], abs=0.02)
    assert gf["risk_difference", arms[1]] == pytest.approx(true_rd, abs=0.02)
    ipw_rows, _, _ = per_protocol_estimates(sample, pp, adherence_weights(pp, a, X, f, w0), "event")
    naive = pd.DataFrame(ipw_rows).query("method == 'unadjusted' and measure == 'risk_difference'")
    assert abs(naive.estimate.iloc[0] - true_rd) > 0.045  # the check can fail: naive misses it
    nc = est[est.estimand.isna()].set_index(["measure", "arm"]).estimate
    for g in (0, 1):
        # natural course (deviation drawn from its model) against the observed risk before
        # deviating: equal up to Monte Carlo error and the deviation day inside a period, counted
        # from the period's start (here -0.005 and -0.007)
        assert nc["natural_course_difference", arms[g]] == pytest.approx(0.0, abs=0.02)
        assert nc["natural_course_difference", arms[g]] == pytest.approx(
            nc["natural_course_risk", arms[g]] - nc["observed_risk", arms[g]])
    assert {r["method"] for r in curves} == {"gformula"}


def test_estimate_effects_bootstraps_the_gformula_by_refitting_its_models():
    from emulant.estimation.effects import estimate_effects

    cohort, periods, _ = _simulate(1500, 4)
    cohort["arm"] = np.where(cohort.treated == 1, "drug_a", "drug_b")
    protocol = two_arm_protocol(
        "gf-e2e", extra_concepts={"marker": {"source": "measurements", "codes": ["MK1"]}},
        strategies={"arms": {"drug_a": {"initiate": "drug_a", "sustain": {"gap_days": 30}},
                             "drug_b": {"initiate": "drug_b", "sustain": {"gap_days": 30}}},
                    "treated": "drug_a"},
        follow_up={"max_days": HORIZON}, estimands=["ATE", "ATT"],
        contrasts=["intention_to_treat", "per_protocol"],
        covariates=[{"name": "x", "attribute": "x"}],
        time_varying=[{"name": "marker", "concept": "marker", "window": [-30, 0], "summary": "last"}],
        analysis={"horizons_days": [HORIZON], "methods": ["gformula"], "period_days": P,
                  "hazard_ratio": False, "bootstrap": {"replicates": 8, "seed": 3},
                  "gformula": {"simulated_persons": 2000, "seed": 1}})
    res = estimate_effects(cohort, protocol, workers=1, progress=False, periods=periods)
    est = res.estimates
    gf = est[(est.method == "gformula") & (est.measure != "e_value")]
    assert set(gf.contrast) == {"per_protocol"}
    assert set(gf.estimand.fillna("")) == {"ATE", "ATT", ""}
    assert set(gf.measure) == {"risk", "risk_difference", "risk_ratio", "natural_course_risk",
                               "observed_risk", "natural_course_difference"}
    assert gf.se.notna().all() and (gf.se > 0).all()  # every replicate refits and re-simulates
    assert res.bootstrap["failed"] == 0
    # intention to treat has no g-formula rows (the method belongs to per protocol)
    assert not ((est.contrast == "intention_to_treat") & (est.method == "gformula")).any()


def test_gformula_needs_the_per_protocol_contrast():
    from emulant.protocol import ProtocolError

    with pytest.raises(ProtocolError, match="gformula estimates the per_protocol contrast only"):
        two_arm_protocol("gf-itt", analysis={"methods": ["ipw", "gformula"]})


def test_no_gformula_rows_for_an_outcome_followed_past_the_periods():
    # periods.parquet ends with the primary outcome's follow-up; an outcome followed longer has
    # person-time without measured covariates, which the g-formula cannot model
    cohort, periods, _ = _simulate(600, 5)
    cohort[columns.end_day("late")] = float(HORIZON)
    cohort[columns.end_reason("late")] = "max_follow_up"
    protocol = two_arm_protocol(
        "gf-late", follow_up={"max_days": HORIZON}, estimands=["ATE"],
        strategies={"arms": {"drug_a": {"initiate": "drug_a", "sustain": {"gap_days": 30}},
                             "drug_b": {"initiate": "drug_b", "sustain": {"gap_days": 30}}},
                    "treated": "drug_a"},
        contrasts=["intention_to_treat", "per_protocol"],
        analysis={"horizons_days": [HORIZON], "methods": ["gformula"], "period_days": P,
                  "hazard_ratio": False})
    a, f = cohort.treated.to_numpy(float), np.ones(len(cohort))
    sample = AnalysisSample(cohort, protocol, cohort[["x"]].to_numpy(float), ("x",), a, f,
                            np.full(len(a), 0.5), {"ATE": f})
    pp = person_periods(cohort, periods, P, time_varying=["marker"], kinds={"marker": "continuous"})
    assert gformula_estimates(sample, pp, "late", []) == ([], [])
    rows, _ = gformula_estimates(sample, pp, "event", [])
    assert rows
