"""Pooled logistic hazards and the g-formula (emulant.estimation.pooled_logistic), the weighting pieces
(emulant.estimation.tte_weighting) and the estimates of one outcome (emulant.estimation.tte)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from daily_hazards import analysis_sample
from two_arm import two_arm_protocol

from emulant import columns
from emulant.estimation.pooled_logistic import (
    PooledLogistic,
    days_at_risk,
    hazard_models,
    incidence_at,
    time_basis,
)
from emulant.estimation.survival import SurvivalError, aalen_johansen, step_at
from emulant.estimation.tte import losses, outcome_arrays, time_to_event_estimates
from emulant.estimation.tte_weighting import aipw_risk, censoring_at, ipcw_incidence, target_weights
from emulant.wording import censoring_assumption, hazard_ratio_label, methods_note

P = 30


def test_days_at_risk_hand_computation():
    # hand computation: day 0 censored -> no day at risk; day 0 competing -> counted on day 1;
    # day 31 outcome -> days 1..31; day 60 censored (lost) -> 1..60; day 61 competing -> 1..61;
    # day 90 planned end (not lost) -> 1..90 for the outcome, 1..89 for the censoring model
    t, s = [0, 0, 31, 60, 61, 90], [0, 2, 1, 0, 2, 0]
    lost = [True, False, False, True, False, False]
    d, e = days_at_risk(t, s, "outcome")
    np.testing.assert_array_equal(d, [0, 1, 31, 60, 61, 90])
    np.testing.assert_array_equal(e, [0, 0, 1, 0, 0, 0])
    d, e = days_at_risk(t, s, "competing")
    np.testing.assert_array_equal(d, [0, 1, 30, 60, 61, 90])
    np.testing.assert_array_equal(e, [0, 1, 0, 0, 1, 0])
    d, e = days_at_risk(t, s, "censoring", lost)
    np.testing.assert_array_equal(d, [0, 0, 30, 60, 60, 89])
    np.testing.assert_array_equal(e, [0, 0, 0, 1, 0, 0])


def test_pooled_logistic_equals_statsmodels_glm_on_person_days():
    # reference: statsmodels GLM Binomial with freq_weights on the explicit person-DAY table
    # (one row per person and day at risk, the period's basis row on each day): the exact
    # day-level risk set, built here by np.repeat independently of the implicit fit
    rng = np.random.default_rng(3)
    n, K = 400, 8
    X = rng.normal(size=(n, 2))
    a = rng.integers(0, 2, n)
    t = rng.integers(0, K * P + 1, n).astype(float)
    s = rng.choice([0, 1, 2], n, p=[0.5, 0.3, 0.2])
    f = rng.integers(0, 4, n)
    B = time_basis(K)
    days, event = days_at_risk(t, s, "outcome")
    model = PooledLogistic().fit(B, X, a, days, event, f, P)
    assert model.converged_
    d = days.astype(int)
    r = np.repeat(np.arange(n), d)
    day = np.arange(r.size) - np.repeat(np.cumsum(d) - d, d) + 1  # 1..d_i
    k = (day - 1) // P
    y = (event[r] & (day == d[r])).astype(float)
    design = np.column_stack([B[k], a[r, None] * B[k], X[r]])
    ref = sm.GLM(y, design, family=sm.families.Binomial(), freq_weights=f[r]).fit(tol=1e-12)
    treated = np.column_stack([B[k], B[k], X[r]])
    np.testing.assert_allclose(model.predict_hazard(X, 1)[r, k], ref.predict(treated),
                               rtol=1e-7, atol=1e-12)
    assert model.loglik_ == pytest.approx(ref.llf, rel=1e-9)


def test_a_warm_start_reaches_the_same_fit_in_fewer_iterations():
    # A bootstrap replicate starts Newton's method from the point estimate's coefficients: the
    # same maximum (the likelihood is concave; statsmodels' GLM above checks the maximum itself)
    # to 1e-6 in the hazards, in fewer iterations than from the crude rate.
    rng = np.random.default_rng(8)
    n, K = 3000, 12
    X = rng.normal(size=(n, 3))
    a = rng.integers(0, 2, n)
    t = rng.integers(0, K * P + 1, n).astype(float)
    s = rng.choice([0, 1, 2], n, p=[0.6, 0.3, 0.1])
    B = time_basis(K)
    days, event = days_at_risk(t, s, "outcome")
    point = PooledLogistic().fit(B, X, a, days, event, None, P)
    f = rng.multinomial(n, np.full(n, 1 / n))
    cold = PooledLogistic().fit(B, X, a, days, event, f, P)
    warm = PooledLogistic().fit(B, X, a, days, event, f, P, start=point.coef_)
    assert cold.converged_ and warm.converged_
    assert warm.n_iter_ < cold.n_iter_
    for arm in (0, 1):
        np.testing.assert_allclose(warm.predict_hazard(X, arm), cold.predict_hazard(X, arm),
                                   rtol=1e-6, atol=0)
    assert warm.loglik_ == pytest.approx(cold.loglik_, rel=1e-12)


def test_daily_saturated_gformula_equals_aalen_johansen():
    # fact of the method: with one-day periods, one indicator per day and no covariates, the
    # daily hazards are d_k / n_k (competing: among those without the outcome that day) and the
    # g-formula cumulative incidence is the Aalen–Johansen estimate (Aalen & Johansen 1978)
    rng = np.random.default_rng(8)
    n, K = 3000, 12
    a = rng.integers(0, 2, n)
    t = rng.integers(1, K + 1, n).astype(float)
    s = rng.choice([0, 1, 2], n, p=[0.5, 0.3, 0.2])
    f = rng.integers(0, 3, n)
    X0 = np.zeros((n, 0))
    B = time_basis(K, "saturated")
    out = PooledLogistic().fit(B, X0, a, *days_at_risk(t, s, "outcome"), f, 1)
    comp = PooledLogistic().fit(B, X0, a, *days_at_risk(t, s, "competing"), f, 1)
    days = np.arange(0, K + 1)
    for g in (0, 1):
        F = incidence_at(out.predict_hazard(X0[:1], g), comp.predict_hazard(X0[:1], g), days, 1)
        m = a == g
        times, cif, _ = aalen_johansen(t[m], s[m], f[m])
        np.testing.assert_allclose(F[0], step_at(times, cif, days), atol=1e-10)


def test_incidence_at_hand_computation():
    # hand computation: daily hazards h = 0.1 (outcome), c = 0.2 (competing), q = 0.72
    h, c = np.full((1, 3), 0.1), np.full((1, 3), 0.2)
    q = 0.9 * 0.8
    by_day = np.cumsum(0.1 * q ** np.arange(6))
    np.testing.assert_allclose(incidence_at(h, c, [0, 1, 2, 3], 1)[0], [0, *by_day[:3]])
    # two-day periods: the same hazards every day give the same days; a day past the last
    # period stays at the end of follow-up
    np.testing.assert_allclose(incidence_at(h, c, [0, 1, 3, 6, 9], 2)[0],
                               [0, by_day[0], by_day[2], by_day[5], by_day[5]])
    np.testing.assert_allclose(incidence_at(h, None, [1, 2, 4], 2)[0], 1 - 0.9 ** np.array([1, 2, 4]))
    # a hazard changing between periods: h = 0.1 on days 1-2, 0.3 on days 3-4
    h2 = np.array([[0.1, 0.3]])
    np.testing.assert_allclose(incidence_at(h2, None, [3, 4], 2)[0],
                               [1 - 0.81 * 0.7, 1 - 0.81 * 0.49])


def test_spline_basis_shape():
    B = time_basis(37)
    assert B.shape == (37, 5) and np.all(B[:, 0] == 1)
    assert time_basis(4).shape == (4, 4)  # too few periods for 5 knots: saturated


# --------------------------------------------------------------------- simulated samples

def _protocol(methods=("ipw", "standardization", "doubly_robust"), estimands=("ATE", "ATT"),
              censoring_weights=False, competing=True, hazard_ratio=True):
    return two_arm_protocol(
        "sim", follow_up={"max_days": 720},
        outcomes={"primary": "event", "competing": ["death"] if competing else []},
        covariates=[{"name": "x", "attribute": "x"}], estimands=list(estimands),
        analysis={"horizons_days": [180, 365, 720], "methods": list(methods), "period_days": P,
                  "censoring_weights": censoring_weights, "hazard_ratio": hazard_ratio})


def _simulate(n, seed, K=24):
    """Discrete-time logistic hazards per 30-day period (the fitted model's own form) with a
    confounder x; potential outcomes under both arms share the random numbers (the truth)."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    a = (rng.uniform(size=n) < 1 / (1 + np.exp(-x))).astype(int)
    u1, u2 = rng.uniform(size=(n, K)), rng.uniform(size=(n, K))
    day = rng.integers(1, P + 1, size=(n, K))
    h2 = 1 / (1 + np.exp(-(-4.4 + 0.5 * x)))
    ev = {}
    for g in (0, 1):
        h1 = 1 / (1 + np.exp(-(-3.7 + 0.8 * x - 0.5 * g)))
        code = np.where(u1 < h1[:, None], 1, np.where(u2 < h2[:, None], 2, 0))
        k = np.argmax(code > 0, axis=1)
        has = code[np.arange(n), k] > 0
        ev[g] = (np.where(has, k * P + day[np.arange(n), k], np.inf),
                 np.where(has, code[np.arange(n), k], 0))
    truth = {g: {h: float(np.mean((ev[g][0] <= h) & (ev[g][1] == 1))) for h in (180, 365, 720)}
             for g in (0, 1)}
    t_obs = np.where(a == 1, ev[1][0], ev[0][0])
    s_obs = np.where(a == 1, ev[1][1], ev[0][1])
    cens = rng.integers(60, 1000, n).astype(float)
    end = np.minimum.reduce([t_obs, cens, np.full(n, 720.0)])
    reason = np.where(t_obs == end, np.where(s_obs == 1, "outcome", "competing"),
                      np.where(cens == end, "coverage_end", "max_follow_up"))
    cohort = pd.DataFrame({"person_id": np.arange(n), "treated": a, "x": x,
                           "arm": np.where(a == 1, "drug_a", "drug_b"),
                           columns.end_day("event"): end, columns.end_reason("event"): reason})
    return cohort, truth


@pytest.fixture(scope="module")
def simulated():
    return _simulate(3000, 1)


def _rd(rows, method, estimand):
    return {r["horizon_day"]: r["estimate"] for r in rows if r["measure"] == "risk_difference"
            and r["method"] == method and r["estimand"] == estimand}


@pytest.mark.parametrize("censoring_weights", [False, True])
def test_adjusted_risk_differences_near_truth(simulated, censoring_weights):
    # consistency under a known data-generating process (common practice, no single source):
    # the adjusted ATE risk differences lie near the truth, the unadjusted one does not
    cohort, truth = simulated
    prot = _protocol(estimands=("ATE",), censoring_weights=censoring_weights)
    rows, _ = time_to_event_estimates(analysis_sample(cohort, prot), "event")
    true_rd = {h: truth[1][h] - truth[0][h] for h in (180, 365, 720)}
    for method in ("ipw", "standardization", "doubly_robust"):
        got = _rd(rows, method, "ATE")
        for h in (365, 720):
            assert got[h] == pytest.approx(true_rd[h], abs=0.035), (method, h)
    crude = _rd(rows, "unadjusted", None)
    assert crude[720] - true_rd[720] > 0.07


def test_rows_and_curves_follow_the_contract(simulated):
    cohort, _ = simulated
    prot = _protocol(estimands=("ATE", "ATT", "ATO"))
    rows, curves = time_to_event_estimates(analysis_sample(cohort, prot), "event")
    df = pd.DataFrame(rows)
    keys = {"outcome", "contrast", "estimand", "method", "measure", "horizon_day", "arm",
            "comparator", "estimate", "n", "events"}
    assert set(df.columns) == keys
    un = df[df.method == "unadjusted"]
    assert un.estimand.isna().all()
    assert set(un.measure) == {"risk", "risk_difference", "risk_ratio", "hazard_ratio", "rate"}
    for est in ("ATE", "ATT", "ATO"):
        sub = df[df.estimand == est]
        assert set(sub.method) == {"ipw", "standardization", "doubly_robust"}
        assert len(sub[(sub.measure == "risk") & (sub.method == "doubly_robust")]) == 6
        assert (sub.measure == "hazard_ratio").sum() == 1  # ipw only
    rd = df[(df.measure == "risk_difference") & (df.method == "ipw") & (df.estimand == "ATE")
            & (df.horizon_day == 180)].iloc[0]
    assert (rd.arm, rd.comparator) == ("drug_a", "drug_b")
    risks = df[(df.measure == "risk") & (df.method == "ipw") & (df.estimand == "ATE")]
    r = dict(zip(zip(risks.horizon_day, risks.arm, strict=True), risks.estimate, strict=True))
    assert rd.estimate == pytest.approx(r[180, "drug_a"] - r[180, "drug_b"])
    # crude counts: n per arm and events by the horizon, by hand from the cohort
    a = cohort.treated.to_numpy()
    t, s = outcome_arrays(cohort, "event")
    row = df[(df.measure == "risk") & (df.method == "unadjusted") & (df.arm == "drug_a")
             & (df.horizon_day == 365)].iloc[0]
    assert row.n == a.sum() and row.events == np.sum((a == 1) & (s == 1) & (t <= 365))
    cv = pd.DataFrame(curves)
    assert set(cv.columns) == {"contrast", "estimand", "method", "arm", "day", "risk", "at_risk"}
    days = sorted(cv.day.unique())
    assert days == list(range(0, 721, P))
    assert set(cv.method) == {"unadjusted", "ipw", "standardization"}
    assert (cv.groupby(["estimand", "method", "arm"], dropna=False).size() == len(days)).all()
    first = cv[(cv.method == "unadjusted") & (cv.arm == "drug_b") & (cv.day == 0)].iloc[0]
    assert first.at_risk == (a == 0).sum()
    mono = cv.sort_values("day").groupby(["estimand", "method", "arm"], dropna=False)["risk"]
    assert mono.apply(lambda r: bool(np.all(np.diff(r.to_numpy()) >= -1e-12))).all()


def test_frequency_weights_equal_duplicated_rows(simulated):
    # frequency weights must act as duplicated persons (DEVELOPERS.md, the bootstrap contract)
    cohort, _ = simulated
    cohort = cohort.iloc[:800].reset_index(drop=True)
    prot = _protocol(estimands=("ATE",))
    f = np.random.default_rng(9).integers(0, 3, len(cohort))
    rows_f, curves_f = time_to_event_estimates(analysis_sample(cohort, prot, f), "event")
    dup = cohort.loc[cohort.index.repeat(f)].reset_index(drop=True)
    rows_d, curves_d = time_to_event_estimates(analysis_sample(dup, prot), "event")
    est_f = [r["estimate"] for r in rows_f]
    est_d = [r["estimate"] for r in rows_d]
    np.testing.assert_allclose(est_f, est_d, rtol=1e-6, atol=1e-9)
    assert [r["n"] for r in rows_f] == [r["n"] for r in rows_d]
    assert [c["at_risk"] for c in curves_f] == [c["at_risk"] for c in curves_d]


def test_doubly_robust_pieces():
    # with an outcome model predicting 0 the AIPW risk is the IPCW estimator; with the
    # Kaplan–Meier censoring weights and unit treatment weights that is Aalen–Johansen
    # (Satten & Datta 2001)
    rng = np.random.default_rng(2)
    n = 500
    t = rng.integers(1, 400, n).astype(float)
    s = rng.choice([0, 1, 2], n, p=[0.5, 0.3, 0.2])
    a = rng.integers(0, 2, n)
    f = np.ones(n)
    cens = censoring_at(t, s, a, f, (100, 300))
    zero = {g: np.zeros((n, 2)) for g in (0, 1)}
    dr = aipw_risk(t, s, a, f, f, zero, cens, (100, 300))
    _, ipcw = ipcw_incidence(t, s, a, f, cens, [0, 100], (100, 300))
    for g in (0, 1):
        times, cif, _ = aalen_johansen(t[a == g], s[a == g])
        for h in (100, 300):
            assert dr[g][h] == pytest.approx(ipcw[g][h], abs=1e-12)
            assert ipcw[g][h] == pytest.approx(step_at(times, cif, [h])[0], abs=1e-12)
    # target populations (Li, Morgan & Zaslavsky 2018): overlap weights e(1 - e)
    np.testing.assert_allclose(target_weights("ATO", [1, 0], [0.5, 0.2], [1, 1]), [0.25, 0.16])
    with pytest.raises(SurvivalError, match="estimands"):
        target_weights("ATX", [1], [0.5], [1])


def test_censoring_model_and_notes():
    cohort, _ = _simulate(600, 4)
    t, s = outcome_arrays(cohort, "event")
    a = cohort.treated.to_numpy()
    lost = losses(cohort, "event", np.ones(len(cohort)), 720)
    models = hazard_models(t, s, a, cohort[["x"]].to_numpy(), None, P, 720, True, lost)
    assert set(models) == {"outcome", "competing", "censoring"}
    assert all(m.converged_ for m in models.values())
    p_on, p_off = _protocol(censoring_weights=True), _protocol()
    assert "pooled logistic" in censoring_assumption(p_on)
    assert "within each arm" in censoring_assumption(p_off)
    assert "day-level" in methods_note(p_off)
    assert "untruncated propensity" in methods_note(p_off)
    assert methods_note(_protocol(methods=("ipw",))) == ""
    assert hazard_ratio_label(p_off) == "cause-specific hazard ratio"
    assert hazard_ratio_label(_protocol(competing=False)) == "hazard ratio"


def test_bad_cohort_column_is_named():
    cohort, _ = _simulate(50, 5)
    with pytest.raises(SurvivalError, match="end_day__other"):
        outcome_arrays(cohort, "other")
    bad = cohort.copy()
    bad.loc[3, columns.end_reason("event")] = "lost"
    with pytest.raises(SurvivalError, match="row 3"):
        outcome_arrays(bad, "event")


def test_unadjusted_only_without_competing_events(simulated):
    # competing events recoded as censoring: Aalen–Johansen is then 1 - Kaplan–Meier
    cohort, _ = simulated
    cohort = cohort.copy()
    col = columns.end_reason("event")
    cohort[col] = cohort[col].replace({"competing": "coverage_end"})
    prot = _protocol(methods=(), competing=False, hazard_ratio=False)
    rows, curves = time_to_event_estimates(analysis_sample(cohort, prot), "event")
    assert {r["method"] for r in rows} == {"unadjusted"}
    assert {r["measure"] for r in rows} == {"risk", "risk_difference", "risk_ratio", "rate"}
    from lifelines import KaplanMeierFitter

    t, s = outcome_arrays(cohort, "event")
    m = cohort.treated.to_numpy() == 1
    ref = KaplanMeierFitter().fit(t[m], s[m] == 1)
    r365 = next(r["estimate"] for r in rows if r["measure"] == "risk" and r["arm"] == "drug_a"
                and r["horizon_day"] == 365)
    assert r365 == pytest.approx(1 - float(ref.survival_function_at_times(365).iloc[0]), abs=1e-12)
