"""Per-protocol estimators (emulant.estimation.per_protocol) and the counting-process
Aalen–Johansen estimator they use, against lifelines, statsmodels and a known truth."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from lifelines import KaplanMeierFitter
from two_arm import two_arm_protocol

from emulant import columns
from emulant.estimation.per_protocol import (
    _long,
    intervals,
    per_protocol_arrays,
    per_protocol_estimates,
    period_weights,
)
from emulant.estimation.pooled_logistic import PooledLogistic, time_basis
from emulant.estimation.sample import AnalysisSample
from emulant.estimation.survival import aalen_johansen, aalen_johansen_intervals, step_at
from emulant.models.treatment_process import adherence_weights, person_periods
from emulant.models.weights import estimand_weights

P = 30
TIGHT = {"precision": 1e-12, "r_precision": 1e-14}  # lifelines' convergence criterion, tighter than its default


@pytest.mark.filterwarnings("ignore:It looks like your weights")
def test_weighted_km_on_intervals_equals_lifelines_with_entry_and_weights():
    # reference: lifelines KaplanMeierFitter on the same counting-process rows (entry = left
    # truncation time, one weight per row); the weight of a person changes from row to row
    rng = np.random.default_rng(5)
    n = 400
    last = rng.integers(0, 6, n)
    person = np.repeat(np.arange(n), last + 1)
    k = np.arange(person.size) - np.repeat(np.cumsum(last + 1) - (last + 1), last + 1)
    final = k == last[person]
    exit_ = np.where(final, k * P + rng.integers(0, P, person.size), k * P + P - 1).astype(float)
    event = final & (rng.random(person.size) < 0.4)
    w = rng.uniform(0.3, 3.0, person.size)
    entry = k * P - 1.0
    times, cif, n_at = aalen_johansen_intervals(entry, exit_, event.astype(int), w)
    km = KaplanMeierFitter().fit(exit_, event, entry=entry, weights=w)
    ref = km.survival_function_at_times(times).to_numpy()
    np.testing.assert_allclose(1.0 - cif, ref, atol=1e-10)
    # at-risk sums by hand at the first event time
    s = times[0]
    assert n_at[0] == pytest.approx(w[(entry < s) & (exit_ >= s)].sum())


def test_intervals_with_one_row_per_person_equal_aalen_johansen():
    # fact of the method: unsplit intervals starting before day 0 are ordinary right-censored data
    rng = np.random.default_rng(6)
    t = rng.integers(0, 200, 300).astype(float)
    s = rng.choice([0, 1, 2], 300, p=[0.5, 0.3, 0.2])
    w = rng.uniform(0.5, 2, 300)
    t1, f1, _ = aalen_johansen_intervals(np.full(300, -1.0), t, s, w)
    t0, f0, _ = aalen_johansen(t, s, w)
    np.testing.assert_allclose(step_at(t1, f1, t0), f0, atol=1e-12)


def test_artificial_censoring_tie_keeps_the_outcome():
    # CONTRACTS §5b: follow-up ends at the earlier of end_day and deviation_day; on a tie the
    # intention-to-treat reason wins (an outcome on the deviation day counts)
    cohort = pd.DataFrame({columns.end_day("event"): [50, 50, 50, 50],
                           columns.end_reason("event"): ["outcome", "outcome", "competing",
                                                         "max_follow_up"],
                           "deviation_day": [50, 49, np.nan, 20]})
    t, s = per_protocol_arrays(cohort, "event")
    np.testing.assert_array_equal(t, [50, 49, 50, 20])
    np.testing.assert_array_equal(s, [1, 0, 2, 0])


def test_long_person_periods_hand_computation():
    # hand computation, P = 30, days at risk 1..d: d = 1 with an event -> period 0, 1 day;
    # d = 58 -> 30 + 28 days; d = 61 with an event -> 30 + 30 + 1 days, the event in period 2
    person, k, m, ev = _long(np.array([1.0, 58, 61]), np.array([True, False, True]), P, 12)
    np.testing.assert_array_equal(person, [0, 1, 1, 2, 2, 2])
    np.testing.assert_array_equal(k, [0, 0, 1, 0, 1, 2])
    np.testing.assert_array_equal(m, [1, 30, 28, 30, 30, 1])
    np.testing.assert_array_equal(ev, [1, 0, 0, 0, 0, 1])


def test_hazard_with_weights_per_period_equals_statsmodels_glm():
    # reference: statsmodels GLM Binomial on the explicit person-period table, each cell two
    # rows (the event day, the other days at risk) with var_weights = weight x days; the weight
    # of a person changes from period to period (the per-protocol standardization's model)
    rng = np.random.default_rng(9)
    n, K = 600, 8
    x = rng.normal(size=(n, 2))
    a = rng.integers(0, 2, n)
    days = rng.integers(1, K * P + 1, n).astype(float)
    event = rng.random(n) < 0.5
    W = rng.uniform(0.2, 4, (n, K))
    B = time_basis(K)  # 8 periods: a constant, k and a restricted cubic spline
    model = PooledLogistic().fit(B, x, a, days, event, W, P)
    assert model.converged_
    rows = []
    for i in range(n):
        last = int(np.ceil(days[i] / P)) - 1
        for k in range(last + 1):
            m = min(P, days[i] - k * P)
            y = bool(event[i]) and k == last
            z = np.r_[B[k], a[i] * B[k], x[i]]
            rows += [(z, 1.0, W[i, k] * y), (z, 0.0, W[i, k] * (m - y))]
    Z = np.array([r[0] for r in rows])
    y = np.array([r[1] for r in rows])
    w = np.array([r[2] for r in rows])
    keep = w > 0
    ref = sm.GLM(y[keep], Z[keep], family=sm.families.Binomial(), var_weights=w[keep]).fit(tol=1e-12)
    for g in (0, 1):
        Zg = np.column_stack([np.tile(B, (n, 1)), g * np.tile(B, (n, 1)), np.repeat(x, K, axis=0)])
        np.testing.assert_allclose(model.predict_hazard(x, g).ravel(), ref.predict(Zg), rtol=1e-6)
    # weights per person and period that are equal across periods: the fit of weights per person
    flat = PooledLogistic().fit(B, x, a, days, event, W[:, 0], P)
    again = PooledLogistic().fit(B, x, a, days, event, np.repeat(W[:, :1], K, axis=1), P)
    np.testing.assert_allclose(again.coef_, flat.coef_, rtol=1e-9, atol=1e-12)


def test_period_weights_carry_the_last_row_on():
    # hand-made: person 10 has rows for periods 0..2, person 11 for period 0 only
    cohort = pd.DataFrame({"person_id": [10, 11], "deviation_day": [np.nan, np.nan]})
    periods = pd.DataFrame({"person_id": [10, 10, 10, 11], "period": [0, 1, 2, 0],
                            "start_day": [0, 30, 60, 0]})
    pp = person_periods(cohort, periods, P)
    W = period_weights(pp, np.array([1.0, 2.0, 3.0, 5.0]), 2, 5)
    np.testing.assert_array_equal(W, [[1, 2, 3, 3, 3], [5, 5, 5, 5, 5]])


# ------------------------------------------------- time-varying confounding with a known truth

K, HORIZON = 12, 360


def _simulate(n, seed):
    """Persons whose marker L (measured at each period's start) is lowered by treatment, raises
    the outcome hazard and makes deviating (stopping) likelier: a time-varying confounder
    affected by earlier treatment. Returns the observed data and, from the same persons and
    random numbers with everyone kept on their arm (and on the other arm), the truth."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    a = (rng.random(n) < 1 / (1 + np.exp(-0.5 * x))).astype(int)
    L0, noise = 0.4 * x + rng.normal(0, 0.8, n), rng.normal(0, 0.5, (n, K))
    u_out, u_dev = rng.random((n, K)), rng.random((n, K))
    d_out, d_dev = rng.integers(0, P, (n, K)), rng.integers(1, P, (n, K))
    expit = lambda v: 1 / (1 + np.exp(-v))  # noqa: E731

    def run(arm, adhere):
        L, on = L0.copy(), np.ones(n, bool)
        end, dev = np.full(n, float(HORIZON)), np.full(n, np.nan)
        alive, marker = np.ones(n, bool), np.zeros((n, K))
        for k in range(K):
            if k:
                L = 0.8 * L + np.where(on, np.where(arm == 1, -0.5, -0.1), 0.3) + noise[:, k]
            marker[:, k] = L
            h = expit(-3.6 + 0.8 * L + 0.3 * x - 0.3 * (on & (arm == 1)))
            ev = alive & (u_out[:, k] < h)
            q = expit(-2.2 + 1.2 * L)
            dv = alive & on & (not adhere) & (u_dev[:, k] < q) & ~(ev & (d_out[:, k] <= d_dev[:, k]))
            dev[dv] = k * P + d_dev[dv, k]
            end[ev] = k * P + d_out[ev, k]
            alive &= ~ev
            on &= ~dv
        return end, end < HORIZON, dev, marker

    end, event, dev, marker = run(a, False)
    truth = {g: run(np.full(n, g), True)[1].mean() for g in (0, 1)}
    cohort = pd.DataFrame({"person_id": np.arange(n), "treated": a, "x": x,
                           columns.end_day("event"): end,
                           columns.end_reason("event"): np.where(event, "outcome", "max_follow_up"),
                           "deviation_day": dev})
    last = (np.minimum(end, HORIZON - 1) // P).astype(int)
    person = np.repeat(np.arange(n), last + 1)
    k = np.arange(person.size) - np.repeat(np.cumsum(last + 1) - (last + 1), last + 1)
    periods = pd.DataFrame({"person_id": person, "period": k, "start_day": k * P,
                            "marker": marker[person, k]})
    return cohort, periods, truth


def test_per_protocol_ipw_and_standardization_recover_the_simulated_truth():
    cohort, periods, truth = _simulate(8000, 13)
    protocol = two_arm_protocol(
        "pp", follow_up={"max_days": HORIZON}, estimands=["ATE"],
        covariates=[{"name": "x", "attribute": "x"}],
        analysis={"horizons_days": [HORIZON], "methods": ["ipw", "standardization"],
                  "period_days": P, "hazard_ratio": False})
    a = cohort.treated.to_numpy(float)
    X = cohort[["x"]].to_numpy(float)
    f = np.ones(len(a))
    e = 1 / (1 + np.exp(-0.5 * cohort.x.to_numpy()))  # the true propensity
    w0 = {"ATE": estimand_weights(a, e, "ATE", sample_weight=f)}
    sample = AnalysisSample(cohort, protocol, X, ("x",), a, f, e, w0)
    pp = person_periods(cohort, periods, P, time_varying=["marker"], kinds={"marker": "continuous"})
    aw = adherence_weights(pp, a, X, f, w0)
    rows, curves, problems = per_protocol_estimates(sample, pp, aw, "event")
    assert problems == []
    est = pd.DataFrame(rows)
    assert set(est.contrast) == {"per_protocol"}
    rd = est[est.measure == "risk_difference"].set_index("method").estimate
    true_rd = truth[1] - truth[0]
    # the naive per-protocol difference misses the truth (by 0.056 here); both adjusted ones come
    # within 0.03 (here ipw 0.007, standardization 0.002; seed 11 gave 0.027 and 0.013: sampling
    # error, and deviations on days inside a period that the per-period weights treat
    # approximately)
    assert abs(rd["unadjusted"] - true_rd) > 0.045
    assert abs(rd["ipw"] - true_rd) < 0.03
    assert abs(rd["standardization"] - true_rd) < 0.03
    row, entry, exit_, st = intervals(pp, *per_protocol_arrays(cohort, "event"))
    assert (exit_ > entry).all() and st.sum() == (per_protocol_arrays(cohort, "event")[1] == 1).sum()


def _e2e_protocol(replicates: int, hazard_ratio: bool = False):
    return two_arm_protocol(
        "pp-e2e", extra_concepts={"marker": {"source": "measurements", "codes": ["MK1"]}},
        strategies={"arms": {"drug_a": {"initiate": "drug_a", "sustain": {"gap_days": 30}},
                             "drug_b": {"initiate": "drug_b", "sustain": {"gap_days": 30}}},
                    "treated": "drug_a"},
        follow_up={"max_days": HORIZON}, estimands=["ATE"],
        contrasts=["intention_to_treat", "per_protocol"],
        covariates=[{"name": "x", "attribute": "x"}],
        time_varying=[{"name": "marker", "concept": "marker", "window": [-30, 0], "summary": "last"}],
        analysis={"horizons_days": [HORIZON], "methods": ["ipw", "standardization"],
                  "period_days": P, "hazard_ratio": hazard_ratio,
                  "bootstrap": {"replicates": replicates, "seed": 3}})


def test_estimate_effects_adds_per_protocol_rows_with_bootstrap_intervals():
    # the whole estimation stage with periods.parquet: per-protocol rows beside the
    # intention-to-treat ones, the point estimate equal to the estimator called directly, and
    # bootstrap intervals that refit the weights over time in every replicate
    from emulant.estimation.effects import estimate_effects

    cohort, periods, _ = _simulate(1500, 4)
    cohort["arm"] = np.where(cohort.treated == 1, "drug_a", "drug_b")
    protocol = _e2e_protocol(replicates=12)
    res = estimate_effects(cohort, protocol, workers=1, progress=False, periods=periods)
    est = res.estimates
    pp_rows = est[(est.contrast == "per_protocol") & (est.measure != "e_value")]
    assert set(pp_rows.method) == {"unadjusted", "ipw", "standardization"}
    assert pp_rows.se.notna().all() and (pp_rows.se > 0).all()
    assert set(res.curves.contrast) == {"intention_to_treat", "per_protocol"}
    assert res.bootstrap["failed"] == 0
    with pytest.raises(Exception, match="periods.parquet"):
        estimate_effects(cohort, protocol, workers=1, progress=False)


@pytest.mark.filterwarnings("ignore:It looks like your weights")
def test_periods_file_holds_the_weights_the_point_estimate_used():
    # periods.parquet (CONTRACTS §5g) carries the weights over time of the point estimate:
    # lifelines' KaplanMeierFitter (entry = left truncation, one weight per row) on its rows
    # with weight_ipw_ATE gives the point estimate's ipw risks, and the estimators rerun on
    # its weight columns give every per-protocol row back
    from lifelines import CoxPHFitter, KaplanMeierFitter

    from emulant.estimation.effects import _prepare, point_estimate
    from emulant.estimation.sample import build_sample
    from emulant.models.treatment_process import AdherenceWeights

    cohort, periods, _ = _simulate(1500, 4)
    cohort["arm"] = np.where(cohort.treated == 1, "drug_a", "drug_b")
    protocol = _e2e_protocol(replicates=2, hazard_ratio=True)
    point = point_estimate(cohort, protocol, periods)
    weighted = point.periods
    assert len(weighted) == len(periods)
    assert {"weight_ipw_ATE", "weight_standardization_ATE"} <= set(weighted.columns)
    assert set(point.adherence.estimand) == {"ATE"}
    rows = pd.DataFrame(point.rows)
    pp_rows = rows[rows.contrast == "per_protocol"]
    end = cohort[columns.end_day("event")].to_numpy(float)
    dev = cohort["deviation_day"].to_numpy(float)
    cut = dev < end  # NaN compares False: no deviation
    T = pd.Series(np.where(cut, dev, end), index=cohort.person_id)
    event = pd.Series((cohort[columns.end_reason("event")] == "outcome").to_numpy() & ~cut,
                      index=cohort.person_id)
    arm = cohort.set_index("person_id").arm
    w = weighted[weighted.start_day <= T.loc[weighted.person_id].to_numpy()].copy()
    t_i = T.loc[w.person_id].to_numpy()
    last = np.r_[w.person_id.to_numpy()[1:] != w.person_id.to_numpy()[:-1], True]
    w["entry"] = w.start_day - 1.0
    w["exit"] = np.where(last, t_i, np.minimum(w.start_day + P - 1, t_i))
    w["event"] = last & event.loc[w.person_id].to_numpy()
    for name in ("drug_a", "drug_b"):
        g = w[arm.loc[w.person_id].to_numpy() == name]
        km = KaplanMeierFitter().fit(g.exit, g.event, entry=g.entry, weights=g.weight_ipw_ATE)
        ours = pp_rows[(pp_rows.method == "ipw") & (pp_rows.measure == "risk") & (pp_rows.arm == name)]
        assert ours.estimate.iloc[0] == pytest.approx(1 - km.survival_function_at_times(HORIZON).iloc[0],
                                                      abs=1e-10)
    # the per-protocol hazard ratio: lifelines' CoxPHFitter on the same rows (entry_col, weights)
    w["a"] = (arm.loc[w.person_id].to_numpy() == "drug_a").astype(float)
    cox = CoxPHFitter().fit(w[["exit", "event", "a", "entry", "weight_ipw_ATE"]], "exit", "event",
                            weights_col="weight_ipw_ATE", entry_col="entry", fit_options=TIGHT)
    hr = pp_rows[(pp_rows.measure == "hazard_ratio") & (pp_rows.method == "ipw")].estimate
    assert hr.iloc[0] == pytest.approx(np.exp(cox.params_["a"]), rel=1e-6)
    # unadjusted: the artificially censored data, one row per person
    crude = CoxPHFitter().fit(pd.DataFrame({"T": T.to_numpy(), "E": event.to_numpy(),
                                            "a": cohort.treated.to_numpy(float)}), "T", "E",
                            fit_options=TIGHT)
    hr0 = pp_rows[(pp_rows.measure == "hazard_ratio") & (pp_rows.method == "unadjusted")].estimate
    assert hr0.iloc[0] == pytest.approx(np.exp(crude.params_["a"]), rel=1e-6)
    # every per-protocol row again from the file's weights
    design, X, _, _ = _prepare(cohort, protocol)
    sample = build_sample(cohort, protocol, design, X)
    pp = person_periods(cohort, periods, P, protocol.time_varying, {"marker": "continuous"})
    from_file = AdherenceWeights({"ATE": weighted.weight_ipw_ATE.to_numpy()},
                                 {"ATE": weighted.weight_standardization_ATE.to_numpy()}, ())
    again = pd.DataFrame(per_protocol_estimates(sample, pp, from_file, "event")[0])
    np.testing.assert_allclose(again.estimate.to_numpy(float), pp_rows.estimate.to_numpy(float),
                               rtol=1e-12, equal_nan=True)


def test_ridge_refit_of_a_separated_hazard_maximises_the_penalised_likelihood():
    # no event among persons with x = 1 (separation): the refit's coefficients maximise the
    # explicit person-period binomial log-likelihood minus (1/2) * sum of squared arm and
    # scaled covariate coefficients (scipy.optimize on the explicit table, an outside optimiser)
    from scipy.optimize import minimize

    rng = np.random.default_rng(1)
    n, K = 300, 8
    x = rng.integers(0, 2, (n, 1)).astype(float)
    a = rng.integers(0, 2, n)
    days = rng.integers(1, K * P + 1, n).astype(float)
    event = (rng.random(n) < 0.4) & (x[:, 0] == 0)
    W = rng.uniform(0.5, 2, (n, K))
    B = time_basis(K)
    model = PooledLogistic(penalty=1.0).fit(B, x, a, days, event, W, P)
    assert model.converged_
    z = (x - model.x_mean_) / model.x_scale_
    rows = []
    for i in range(n):
        last = int(np.ceil(days[i] / P)) - 1
        for k in range(last + 1):
            m = min(P, days[i] - k * P)
            y = bool(event[i]) and k == last
            rows.append((np.r_[B[k], a[i] * B[k], z[i]], W[i, k] * y, W[i, k] * (m - y)))
    Z = np.array([r[0] for r in rows])
    wy, wn = np.array([r[1] for r in rows]), np.array([r[2] for r in rows])
    pen = np.r_[np.zeros(B.shape[1]), np.ones(Z.shape[1] - B.shape[1])]

    def negative(b):
        eta = Z @ b
        return -(wy @ -np.logaddexp(0, -eta) + wn @ -np.logaddexp(0, eta)) + 0.5 * pen @ (b * b)

    ref = minimize(negative, np.zeros(Z.shape[1]), method="BFGS", options={"gtol": 1e-9})
    np.testing.assert_allclose(model.coef_, ref.x, atol=2e-4)
    assert negative(model.coef_) <= ref.fun + 1e-8
