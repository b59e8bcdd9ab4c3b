"""Pooled logistic hazards and the g-formula (emulant.estimation.pooled_logistic), the weighting pieces
(emulant.estimation.tte_weighting) and the estimates of one outcome (emulant.estimation.tte)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from two_arm import two_arm_protocol

from emulant import columns
from emulant.estimation.pooled_logistic import (
    PooledLogistic,
    at_days,
    cumulative_incidence,
    hazard_models,
    last_period,
    person_period,
    time_basis,
)
from emulant.estimation.sample import AnalysisSample
from emulant.estimation.survival import SurvivalError, aalen_johansen, step_at
from emulant.estimation.tte import outcome_arrays, time_to_event_estimates
from emulant.estimation.tte_weighting import aipw_risk, censoring_at, ipcw_incidence, target_weights
from emulant.wording import censoring_assumption, hazard_ratio_label

P = 30


def test_person_period_hand_computation():
    # hand computation, P = 30: day 0 censored -> no period; day 0 event -> period 0;
    # day 31 outcome -> periods 0, 1; day 60 censored -> periods 0, 1; day 61 competing -> 0..2
    pp = person_period([0, 0, 31, 60, 61], [0, 1, 1, 0, 2], P)
    np.testing.assert_array_equal(pp["row"], [1, 2, 2, 3, 3, 4, 4, 4])
    np.testing.assert_array_equal(pp["period"], [0, 0, 1, 0, 1, 0, 1, 2])
    np.testing.assert_array_equal(pp["outcome"], [1, 0, 1, 0, 0, 0, 0, 0])
    np.testing.assert_array_equal(pp["competing"], [0, 0, 0, 0, 0, 0, 0, 1])
    np.testing.assert_array_equal(pp["censored"], [0, 0, 0, 0, 1, 0, 0, 0])
    np.testing.assert_array_equal(last_period([0, 0, 31], [0, 1, 1], P), [-1, 0, 1])


def test_pooled_logistic_equals_statsmodels_glm():
    # reference: statsmodels GLM Binomial with freq_weights on the explicit person-period table
    rng = np.random.default_rng(3)
    n, K = 1500, 12
    X = rng.normal(size=(n, 2))
    a = rng.integers(0, 2, n)
    t = rng.integers(0, 361, n).astype(float)
    s = rng.choice([0, 1, 2], n, p=[0.5, 0.3, 0.2])
    f = rng.integers(0, 4, n)
    B = time_basis(K)
    model = PooledLogistic().fit(B, X, a, last_period(t, s, P), s == 1, f)
    assert model.converged_
    pp = person_period(t, s, P)
    r, k = pp["row"], pp["period"]
    design = np.column_stack([B[k], a[r, None] * B[k], X[r]])
    ref = sm.GLM(pp["outcome"], design, family=sm.families.Binomial(), freq_weights=f[r]).fit(
        tol=1e-12)
    treated = np.column_stack([B[k], B[k], X[r]])
    np.testing.assert_allclose(model.predict_hazard(X, 1)[r, k], ref.predict(treated), atol=1e-9)
    assert model.loglik_ == pytest.approx(ref.llf, rel=1e-9)


def test_saturated_gformula_equals_aalen_johansen():
    # fact of the method: with one indicator per period, no covariates and events at period ends,
    # the discrete-time hazards are d_k / n_k and the g-formula cumulative incidence is the
    # Aalen–Johansen estimate at the period ends
    rng = np.random.default_rng(8)
    n, K = 3000, 12
    a = rng.integers(0, 2, n)
    t = (rng.integers(1, K + 1, n) * P).astype(float)
    s = rng.choice([0, 1, 2], n, p=[0.5, 0.3, 0.2])
    f = rng.integers(0, 3, n)
    X0 = np.zeros((n, 0))
    last = np.minimum(last_period(t, s, P), K - 1)
    B = time_basis(K, "saturated")
    out = PooledLogistic().fit(B, X0, a, last, s == 1, f)
    comp = PooledLogistic().fit(B, X0, a, last - (s == 1), s == 2, f)
    for g in (0, 1):
        F = cumulative_incidence(out.predict_hazard(X0, g), comp.predict_hazard(X0, g))[0]
        m = a == g
        times, cif, _ = aalen_johansen(t[m], s[m], f[m])
        np.testing.assert_allclose(F, step_at(times, cif, np.arange(1, K + 1) * P), atol=1e-10)


def test_cumulative_incidence_and_interpolation_hand_computation():
    # hand computation: constant hazards h = 0.1, c = 0.2 over 3 periods
    h, c = np.full((1, 3), 0.1), np.full((1, 3), 0.2)
    q = 0.9 * 0.8
    np.testing.assert_allclose(cumulative_incidence(h, c)[0], [0.1, 0.1 + 0.1 * q,
                                                                0.1 + 0.1 * q + 0.1 * q * q])
    np.testing.assert_allclose(cumulative_incidence(h)[0], 1 - 0.9 ** np.arange(1, 4))
    F = np.array([0.1, 0.3, 0.4])
    np.testing.assert_allclose(at_days(F, [0, 15, 30, 45, 90, 120], P),
                               [0, 0.05, 0.1, 0.2, 0.4, 0.4])
    # a last period cut short at day 70: it ends there
    np.testing.assert_allclose(at_days(F, [65, 70, 90], P, last_end=70), [0.35, 0.4, 0.4])


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


def _sample(cohort, protocol, freq=None):
    # the propensity: a plain statsmodels logit (reference library), weights written out
    a = cohort["treated"].to_numpy(float)
    X = cohort[["x"]].to_numpy(float)
    f = np.ones(len(a)) if freq is None else np.asarray(freq, float)
    Z = sm.add_constant(X)
    e = sm.GLM(a, Z, family=sm.families.Binomial(), freq_weights=f).fit().predict(Z)
    w = {"ATE": np.where(a == 1, 1 / e, 1 / (1 - e)), "ATT": np.where(a == 1, 1, e / (1 - e)),
         "ATO": np.where(a == 1, 1 - e, e)}
    return AnalysisSample(cohort, protocol, X, ("x",), a, f, e, {k: w[k] for k in protocol.estimands})


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
    rows, _ = time_to_event_estimates(_sample(cohort, prot), "event")
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
    rows, curves = time_to_event_estimates(_sample(cohort, prot), "event")
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
    rows_f, curves_f = time_to_event_estimates(_sample(cohort, prot, f), "event")
    dup = cohort.loc[cohort.index.repeat(f)].reset_index(drop=True)
    rows_d, curves_d = time_to_event_estimates(_sample(dup, prot), "event")
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
    cens = censoring_at(t, s, a, f, (100, 300), P)
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
    models = hazard_models(t, s, a, cohort[["x"]].to_numpy(), None, P, 24, True, censoring=True)
    assert set(models) == {"outcome", "competing", "censoring"}
    assert all(m.converged_ for m in models.values())
    p_on, p_off = _protocol(censoring_weights=True), _protocol()
    assert "pooled logistic" in censoring_assumption(p_on)
    assert "within each arm" in censoring_assumption(p_off)
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
    rows, curves = time_to_event_estimates(_sample(cohort, prot), "event")
    assert {r["method"] for r in rows} == {"unadjusted"}
    assert {r["measure"] for r in rows} == {"risk", "risk_difference", "risk_ratio", "rate"}
    from lifelines import KaplanMeierFitter

    t, s = outcome_arrays(cohort, "event")
    m = cohort.treated.to_numpy() == 1
    ref = KaplanMeierFitter().fit(t[m], s[m] == 1)
    r365 = next(r["estimate"] for r in rows if r["measure"] == "risk" and r["arm"] == "drug_a"
                and r["horizon_day"] == 365)
    assert r365 == pytest.approx(1 - float(ref.survival_function_at_times(365).iloc[0]), abs=1e-12)
