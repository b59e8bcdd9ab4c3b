"""Weighted risk curves (emulant.estimation.survival) and the Cox hazard ratio (emulant.estimation.cox), against
lifelines, a textbook table and hand computation."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from lifelines import AalenJohansenFitter, CoxPHFitter, KaplanMeierFitter
from lifelines.datasets import load_rossi

from emulant.estimation.cox import cox_fit, cox_hazard_ratio
from emulant.estimation.survival import (
    SurvivalError,
    aalen_johansen,
    censoring_survival,
    crude_rate,
    day_grid,
    km,
    number_at_risk,
    step_at,
    step_before,
)

# lifelines stops on its own criterion (its score there is ~1e-6 from 0, ours ~1e-8):
# coefficients agree to ~1e-6, so they are compared at 1e-5
TIGHT = {"precision": 1e-12, "r_precision": 1e-14}


@pytest.fixture(scope="module")
def rossi() -> pd.DataFrame:
    return load_rossi()


def _quiet(fn, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # lifelines warns on non-integer weights (FIELD_NOTES)
        return fn(*args, **kwargs)


def test_weighted_km_equals_lifelines(rossi):
    # reference: lifelines KaplanMeierFitter.fit(weights=) (a general-purpose library)
    w = np.random.default_rng(7).uniform(0.1, 4.0, len(rossi))
    times, surv, at_risk = km(rossi.week, rossi.arrest, w)
    ref = _quiet(KaplanMeierFitter().fit, rossi.week, rossi.arrest, weights=w)
    ours = step_at(times, surv, ref.timeline, before=1.0)
    np.testing.assert_allclose(ours, ref.survival_function_.to_numpy()[:, 0], rtol=0, atol=1e-10)
    table = ref.event_table.loc[times]
    np.testing.assert_allclose(at_risk, table["at_risk"].to_numpy(), rtol=1e-12)


def test_km_freireich_6mp_textbook():
    # Freireich et al. (1963) leukaemia remission, 6-MP arm (weeks; 0 = censored). Expected
    # values as printed in survival-analysis textbooks, e.g. Kleinbaum & Klein, "Survival
    # Analysis: A Self-Learning Text" (values from memory, 3 decimals).
    t = [6, 6, 6, 6, 7, 9, 10, 10, 11, 13, 16, 17, 19, 20, 22, 23, 25, 32, 32, 34, 35]
    e = [1, 1, 1, 0, 1, 0, 1, 0, 0, 1, 1, 0, 0, 0, 1, 1, 0, 0, 0, 0, 0]
    times, surv, _ = km(t, e)
    expected = {6: 0.857, 7: 0.807, 10: 0.753, 13: 0.690, 16: 0.627, 22: 0.538, 23: 0.448}
    got = step_at(times, surv, list(expected), before=1.0)
    np.testing.assert_allclose(got, list(expected.values()), atol=5e-4)


def test_km_frequency_weights_equal_duplicated_rows(rossi):
    # frequency weights are row duplication (FIELD_NOTES; a fact of the estimator)
    f = np.random.default_rng(3).integers(0, 4, len(rossi))
    t1, s1, n1 = km(rossi.week, rossi.arrest, f)
    t2, s2, n2 = km(np.repeat(rossi.week, f), np.repeat(rossi.arrest, f))
    np.testing.assert_array_equal(t1, t2)
    np.testing.assert_allclose(s1, s2, atol=1e-14)
    np.testing.assert_allclose(n1, n2)


def test_aalen_johansen_equals_lifelines_tie_free():
    # reference: lifelines AalenJohansenFitter (unweighted). Continuous times have no ties, so its
    # tie jitter (jitter_level) never acts; calculate_variance off for speed.
    rng = np.random.default_rng(11)
    n = 600
    t = rng.exponential(100.0, n)
    status = rng.choice([0, 1, 2], n, p=[0.4, 0.35, 0.25])
    assert np.unique(t).size == n
    times, cif, _ = aalen_johansen(t, status)
    for cause in (1, 2):
        ref = AalenJohansenFitter(calculate_variance=False).fit(t, status, event_of_interest=cause)
        _, cif_c, _ = aalen_johansen(t, status, cause=cause)
        idx = ref.cumulative_density_.index.to_numpy()
        np.testing.assert_allclose(step_at(times, cif_c, idx), ref.cumulative_density_.to_numpy()[:, 0],
                                   atol=1e-12)


def test_aalen_johansen_without_competing_is_one_minus_km(rossi):
    # fact of the method: with no competing event the Aalen–Johansen estimate is 1 - KM
    w = np.random.default_rng(1).uniform(0.5, 2, len(rossi))
    t1, cif, _ = aalen_johansen(rossi.week, rossi.arrest, w)
    t2, surv, _ = km(rossi.week, rossi.arrest, w)
    np.testing.assert_allclose(cif, 1 - surv, atol=1e-14)


def test_ipcw_with_km_censoring_reproduces_aalen_johansen():
    # Satten & Datta 2001 (Am Stat 55:207): IPCW with the Kaplan–Meier censoring survival G(T-)
    # equals the Aalen–Johansen / Kaplan–Meier estimate; ties included (integer days)
    rng = np.random.default_rng(5)
    n = 400
    t = rng.integers(0, 60, n).astype(float)
    s = rng.choice([0, 1, 2], n, p=[0.5, 0.3, 0.2])
    w = rng.uniform(0.2, 3.0, n)
    gt, g = censoring_survival(t, s, w)
    contrib = w * (s == 1) / step_before(gt, g, t, 1.0)
    days = np.arange(0, 61)
    ipcw = np.array([contrib[t <= d].sum() for d in days]) / w.sum()
    times, cif, _ = aalen_johansen(t, s, w)
    np.testing.assert_allclose(ipcw, step_at(times, cif, days), atol=1e-12)


def test_crude_rate_and_at_risk_hand_computation():
    # hand computation: 2 events over (10 + 20 + 30 + 5 * 2) days, person 4 counted twice
    t = [10, 20, 30, 5]
    s = [1, 0, 1, 2]
    f = [1, 1, 1, 2]
    r = crude_rate(t, s, f)
    assert r["events"] == 2 and r["n"] == 5
    assert r["rate"] == pytest.approx(1000 * 2 / (70 / 365.25))
    np.testing.assert_array_equal(number_at_risk(t, f, [0, 5, 6, 20, 31]), [5, 5, 3, 2, 0])


def test_day_grid_and_step_functions():
    np.testing.assert_array_equal(day_grid(100, 30), [0, 30, 60, 90, 100])
    np.testing.assert_array_equal(day_grid(90, 30), [0, 30, 60, 90])
    np.testing.assert_array_equal(step_at([1, 3], [0.2, 0.5], [0, 1, 2, 3, 9]), [0, .2, .2, .5, .5])
    np.testing.assert_array_equal(step_before([1, 3], [0.8, 0.5], [1, 2, 3, 4]), [1, .8, .8, .5])


def test_bad_input_names_the_row():
    with pytest.raises(SurvivalError, match="row 1"):
        km([1, -2], [1, 0])
    with pytest.raises(SurvivalError, match="status: row 2"):
        aalen_johansen([1, 2, 3], [0, 1, 3])
    with pytest.raises(SurvivalError, match="weight: row 0"):
        km([1, 2], [1, 0], [np.nan, 1])
    with pytest.raises(SurvivalError, match="period_days"):
        day_grid(10, 0)


def test_cox_rossi_matches_lifelines_and_published(rossi):
    # reference: lifelines CoxPHFitter on its bundled Rossi recidivism data (Efron ties); the
    # coefficient of fin printed in the lifelines documentation is about -0.38 (from memory)
    X = rossi.drop(columns=["week", "arrest"])
    beta = cox_fit(rossi.week, rossi.arrest, X.to_numpy())
    ref = CoxPHFitter().fit(rossi, "week", "arrest", fit_options=TIGHT)
    np.testing.assert_allclose(beta, ref.params_[X.columns].to_numpy(), atol=1e-5)
    assert beta[list(X.columns).index("fin")] == pytest.approx(-0.38, abs=0.005)


def test_weighted_cox_matches_lifelines_weights_col(rossi):
    # reference: lifelines CoxPHFitter(weights_col=, robust=True), one covariate (fin)
    w = np.random.default_rng(2).uniform(0.2, 5.0, len(rossi))
    df = rossi[["week", "arrest", "fin"]].assign(w=w)
    ref = _quiet(CoxPHFitter().fit, df, "week", "arrest", weights_col="w", robust=True,
                 fit_options=TIGHT)
    hr = cox_hazard_ratio(rossi.week, rossi.arrest, rossi.fin, w, robust_se=True)
    assert hr.log_hr == pytest.approx(ref.params_["fin"], abs=1e-5)
    assert hr.se_robust == pytest.approx(ref.standard_errors_["fin"], rel=1e-6)
    assert hr.hr == pytest.approx(np.exp(ref.params_["fin"]), rel=1e-5)
    assert not hr.cause_specific
    assert set(hr.to_dict()) <= set(hr.summary.columns)


def test_cox_with_late_entry_matches_lifelines_entry_col(rossi):
    # reference: lifelines CoxPHFitter(entry_col=, weights_col=) on counting-process rows: each
    # Rossi person's weeks cut into spells of 10 weeks, each spell with its own weight (weights
    # that change over time, as per protocol); tied exits (Efron) and spells entering at the
    # same week as others leave
    spell = np.minimum(rossi.week.to_numpy() // 10 + 1, 6)
    person = np.repeat(np.arange(len(rossi)), spell)
    k = np.arange(person.size) - np.repeat(np.cumsum(spell) - spell, spell)
    last = k == spell[person] - 1
    exit_ = np.where(last, rossi.week.to_numpy()[person], 10 * k + 10).astype(float)
    entry = 10.0 * k
    keep = exit_ > entry
    event = (last & (rossi.arrest.to_numpy()[person] == 1)).astype(int)
    w = np.random.default_rng(3).uniform(0.3, 3.0, person.size)
    df = pd.DataFrame({"T": exit_, "E": event, "fin": rossi.fin.to_numpy()[person],
                       "age": rossi.age.to_numpy()[person], "en": entry, "w": w})[keep]
    ref = _quiet(CoxPHFitter().fit, df, "T", "E", weights_col="w", entry_col="en",
                 fit_options=TIGHT)
    beta = cox_fit(df["T"], df["E"], df[["fin", "age"]].to_numpy(), df["w"], entry=df["en"])
    np.testing.assert_allclose(beta, ref.params_[["fin", "age"]].to_numpy(), atol=1e-6)
    # one spell per person (entry before every time): the ordinary fit
    whole = cox_fit(rossi.week, rossi.arrest, rossi.fin, entry=np.full(len(rossi), -1.0))
    np.testing.assert_allclose(whole, cox_fit(rossi.week, rossi.arrest, rossi.fin), atol=1e-12)


def test_cause_specific_hazard_ratio_censors_competing_events(rossi):
    # the cause-specific hazard ratio is the Cox model with competing events censored
    # (Putter, Fiocco & Geskus 2007, Stat Med 26:2389); reference: lifelines on recoded data
    rng = np.random.default_rng(4)
    status = np.where(rossi.arrest == 1, rng.choice([1, 2], len(rossi), p=[0.7, 0.3]), 0)
    # frequency weights count as duplicated rows (also in tied deaths): lifelines on the rows
    # duplicated
    f = rng.integers(0, 3, len(rossi))
    hr = cox_hazard_ratio(rossi.week, status, rossi.fin, freq=f)
    df = pd.DataFrame({"T": rossi.week, "E": (status == 1).astype(int), "fin": rossi.fin})
    ref = CoxPHFitter().fit(df.loc[df.index.repeat(f)], "T", "E", fit_options=TIGHT)
    assert hr.log_hr == pytest.approx(ref.params_["fin"], abs=1e-5)
    assert hr.cause_specific and hr.events == float(np.sum(f * (status == 1)))


def test_cox_without_events_is_nan():
    assert np.isnan(cox_fit([1, 2, 3], [0, 0, 0], [0, 1, 1])[0])
