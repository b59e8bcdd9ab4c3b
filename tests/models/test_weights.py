"""Tests of emulant.models.weights: weights per estimand, truncation, Kish ESS, fit_weights."""

from __future__ import annotations

import nhefs_data
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from two_arm import two_arm_protocol

from emulant import columns
from emulant.models.positivity import positivity_of
from emulant.models.propensity import PropensityModel, build_design
from emulant.models.weights import (
    WeightsError,
    estimand_weights,
    fit_weights,
    kish_ess,
    weighted_quantile,
)

NHEFS_COVARIATES, NHEFS_KINDS = nhefs_data.BOOK_COVARIATES, nhefs_data.BOOK_KINDS


@pytest.fixture(scope="module")
def nhefs_fit():
    """NHEFS (causaldata package), the 1,566 persons with wt82_71, and the propensity model of
    Hernán & Robins, "Causal Inference: What If", chapter 12, Program 12.2 (age, smoking intensity,
    smoking years and weight as quadratics; education, exercise, active as categoricals)."""
    d = nhefs_data.load(complete=True)
    design = build_design(d, NHEFS_COVARIATES, NHEFS_KINDS, continuous="quadratic")
    X = design.transform(d)
    a = d["qsmk"].to_numpy(float)
    e = PropensityModel().fit(X, a).predict(X)
    return d, X, a, e


def test_nhefs_ip_weights_match_the_book(nhefs_fit):
    # Hernán & Robins, "Causal Inference: What If", chapter 12, Programs 12.2 and 12.3: the
    # printed summaries of the IP weights. The values below are from memory of the book's
    # output (unstabilised: mean 1.996, min 1.054, max 16.70; stabilised: mean 0.999,
    # min 0.331, max 4.30), checked to 3 significant digits.
    _, _, a, e = nhefs_fit
    w = estimand_weights(a, e, "ATE", stabilize=False)
    assert w.mean() == pytest.approx(1.996, abs=0.001)
    assert w.min() == pytest.approx(1.054, abs=0.001)
    assert w.max() == pytest.approx(16.70, abs=0.01)
    sw = estimand_weights(a, e, "ATE", stabilize=True)
    assert sw.mean() == pytest.approx(0.999, abs=0.001)
    assert sw.min() == pytest.approx(0.331, abs=0.001)
    assert sw.max() == pytest.approx(4.30, abs=0.01)


def test_nhefs_ipw_estimates_equal_statsmodels_treatment_effect(nhefs_fit):
    # Reference: statsmodels TreatmentEffect.ipw() (ATE) and .ipw(effect_group=1) (ATT), given
    # the same logit selection model; FIELD_NOTES: compare point estimates only.
    from statsmodels.treatment.treatment_effects import TreatmentEffect

    d, X, a, e = nhefs_fit
    y = d["wt82_71"].to_numpy(float)
    Xc = sm.add_constant(X)
    logit = sm.Logit(a, Xc).fit(disp=0, tol=1e-12)
    te = TreatmentEffect(sm.OLS(y, Xc), a, results_select=logit)

    def hajek(w):
        return np.average(y[a == 1], weights=w[a == 1]) - np.average(y[a == 0], weights=w[a == 0])

    ate = hajek(estimand_weights(a, e, "ATE"))
    att = hajek(estimand_weights(a, e, "ATT"))
    assert ate == pytest.approx(float(np.asarray(te.ipw().effect)[0]), abs=1e-5)
    assert att == pytest.approx(float(np.asarray(te.ipw(effect_group=1).effect)[0]), abs=1e-5)
    # the book (chapter 12, from memory): IP-weighted ATE of quitting about 3.4 kg
    assert ate == pytest.approx(3.44, abs=0.01)


def test_overlap_weights_balance_every_model_column_exactly(nhefs_fit):
    # Li, Morgan & Zaslavsky 2018 (JASA 113:390), Theorem 3: with a logistic propensity model,
    # overlap weights give exact mean balance for every covariate in the model.
    _, X, a, e = nhefs_fit
    w = estimand_weights(a, e, "ATO", truncate=(0.01, 0.99))  # truncate is ignored for ATO
    np.testing.assert_allclose(w, np.where(a == 1, 1 - e, e))
    m1 = np.average(X[a == 1], axis=0, weights=w[a == 1])
    m0 = np.average(X[a == 0], axis=0, weights=w[a == 0])
    np.testing.assert_allclose(m1, m0, rtol=1e-7, atol=1e-9)


def test_att_weights_reproduce_the_treated_distribution_in_a_saturated_model():
    # Fact of the method (Sato & Matsuyama 2003): with a saturated model e(x) is the cell's
    # treated share, and the comparator weighted by e/(1-e) reproduces the treated arm's
    # distribution exactly.
    rng = np.random.default_rng(11)
    n = 3000
    cohort = pd.DataFrame({"region": rng.choice(["n", "s", "e", "w"], n, p=[.4, .3, .2, .1])})
    p_by = {"n": 0.2, "s": 0.5, "e": 0.7, "w": 0.35}
    a = (rng.random(n) < cohort["region"].map(p_by)).to_numpy(float)
    design = build_design(cohort, ["region"], {"region": "categorical"})
    X = design.transform(cohort)
    e = PropensityModel().fit(X, a).predict(X)
    w = estimand_weights(a, e, "ATT")
    np.testing.assert_array_equal(w[a == 1], 1.0)
    for lev in "nsew":
        x = (cohort["region"] == lev).to_numpy(float)
        assert np.average(x[a == 0], weights=w[a == 0]) == pytest.approx(x[a == 1].mean(),
                                                                         abs=1e-9)


def test_ate_weights_by_hand_and_stabilised():
    # Hand computation.
    a = np.array([1, 1, 0, 0, 0.0])
    e = np.array([0.5, 0.25, 0.5, 0.75, 0.2])
    np.testing.assert_allclose(estimand_weights(a, e, "ATE", stabilize=False),
                               [2, 4, 2, 4, 1.25])
    np.testing.assert_allclose(estimand_weights(a, e, "ATE"), [0.8, 1.6, 1.2, 2.4, 0.75])
    np.testing.assert_allclose(estimand_weights(a, e, "ATT"), [1, 1, 1, 3, 0.25])
    np.testing.assert_allclose(estimand_weights(a, e, "ATO"), [0.5, 0.75, 0.5, 0.75, 0.2])
    # stabilised by the frequency-weighted arm share: f = (3,1,1,1,2) -> P(A=1) = 4/8
    f = np.array([3, 1, 1, 1, 2.0])
    np.testing.assert_allclose(estimand_weights(a, e, "ATE", sample_weight=f),
                               [1, 2, 1, 2, 0.625])
    # ATT/ATO are not changed by stabilize
    np.testing.assert_allclose(estimand_weights(a, e, "ATT", stabilize=False),
                               estimand_weights(a, e, "ATT", stabilize=True))


def test_truncation_winsorises_at_whole_cohort_quantiles():
    rng = np.random.default_rng(12)
    a = (rng.random(500) < 0.3).astype(float)
    e = rng.uniform(0.02, 0.98, 500)
    raw = estimand_weights(a, e, "ATE")
    lo, hi = np.quantile(raw, [0.05, 0.95])
    np.testing.assert_allclose(estimand_weights(a, e, "ATE", truncate=(0.05, 0.95)),
                               np.clip(raw, lo, hi))
    # with frequency weights: the quantiles of the cohort with rows repeated
    f = rng.integers(0, 4, 500)
    rep = np.repeat(np.arange(500), f)
    raw_f = estimand_weights(a, e, "ATT", sample_weight=f)
    lo, hi = np.quantile(raw_f[rep], [0.01, 0.99])
    np.testing.assert_allclose(estimand_weights(a, e, "ATT", truncate=(0.01, 0.99),
                                                sample_weight=f), np.clip(raw_f, lo, hi))


def test_weighted_quantile_equals_numpy_on_repeated_rows():
    # Reference: numpy.quantile (linear, Hyndman & Fan type 7) on the repeated sample.
    rng = np.random.default_rng(13)
    x = rng.normal(size=50)
    f = rng.integers(0, 5, 50)
    q = np.array([0, 0.01, 0.1, 0.37, 0.5, 0.99, 1])
    np.testing.assert_allclose(weighted_quantile(x, q, f), np.quantile(np.repeat(x, f), q))


def test_kish_ess_by_hand():
    # Kish 1965: (sum w)^2 / sum w^2; hand computation: (1+1+2)^2 / (1+1+4) = 16/6.
    assert kish_ess(np.array([1.0, 1, 2])) == pytest.approx(16 / 6)
    # frequency weights equal repeated rows: f = (2, 1) on w = (1, 2): (2+2)^2/(2+4)
    assert kish_ess(np.array([1.0, 2]), np.array([2, 1])) == pytest.approx(16 / 6)


def test_bad_inputs_are_clear_errors():
    a = np.array([1.0, 0])
    with pytest.raises(WeightsError, match="unknown estimand 'ATU'"):
        estimand_weights(a, np.array([0.5, 0.5]), "ATU")
    with pytest.raises(WeightsError, match=r"outside \(0, 1\) for 1 person"):
        estimand_weights(a, np.array([1.0, 0.5]), "ATE")


def _protocol(estimands=("ATE", "ATT", "ATO"), truncate=None):
    return two_arm_protocol(
        "weights-test",
        covariates=[{"name": "age", "builtin": "age"},
                    {"name": "region", "attribute": "region", "kind": "categorical"},
                    {"name": "prior_event", "concept": "event", "window": [-365, -1],
                     "summary": "any"}],
        estimands=list(estimands), analysis={"weights": {"truncate": truncate}})


def _cohort(n=2000, seed=14):
    rng = np.random.default_rng(seed)
    age = rng.normal(62, 9, n)
    region = rng.choice(["r1", "r2", "r3"], n, p=[0.5, 0.3, 0.2])
    prior = (rng.random(n) < 0.3).astype(int)
    lin = -0.3 + 0.04 * (age - 62) + 0.5 * (region == "r2") + 0.8 * prior
    treated = (rng.random(n) < 1 / (1 + np.exp(-lin))).astype(int)
    return pd.DataFrame({"person_id": np.arange(n) + 100,
                         "arm": np.where(treated == 1, "drug_a", "drug_b"), "treated": treated,
                         "age": age, "region": region, "prior_event": prior})


def test_fit_weights_returns_the_contract_columns_and_positivity():
    cohort = _cohort()
    protocol = _protocol(truncate=[0.01, 0.99])
    fit = fit_weights(cohort, protocol)
    wdf, pos = fit.table, positivity_of(fit, protocol)
    assert list(wdf.columns) == ["person_id", "arm", "propensity",
                                 *(columns.weight(e) for e in ("ATE", "ATT", "ATO"))]
    assert (wdf["person_id"].to_numpy() == cohort["person_id"].to_numpy()).all()
    assert wdf["propensity"].between(0, 1).all()
    assert pos["weights"]["ATE"]["truncated"] and not pos["weights"]["ATO"]["truncated"]
    assert pos["model"]["converged"] and pos["model"]["columns"][0] == "age"
    assert pos["n"] == {"drug_a": int(cohort["treated"].sum()),
                        "drug_b": int((1 - cohort["treated"]).sum())}
    # untruncated ATE weights are the stabilised 1/e, 1/(1-e)
    wdf2 = fit_weights(cohort, _protocol(estimands=("ATE",))).table
    e, a = wdf2["propensity"].to_numpy(), cohort["treated"].to_numpy()
    np.testing.assert_allclose(wdf2[columns.weight("ATE")],
                               np.where(a == 1, a.mean() / e, (1 - a.mean()) / (1 - e)))


def test_a_covariate_with_a_single_level_is_left_out_with_a_note():
    # a women-only extract, or an entry window inside one year: the covariate is constant and
    # carries no information (common practice, no source); the fit must not crash on it. With
    # the constant left out the weights equal those of the same model without it.
    cohort = _cohort().assign(region="r1")
    protocol = _protocol(estimands=("ATE",))
    fit = fit_weights(cohort, protocol)
    pos = positivity_of(fit, protocol)
    assert {"column": "region", "reason": "a single level (r1) in the cohort: constant, adjusts "
            "for nothing"} in pos["model"]["dropped"]
    assert not any(c.startswith("region") for c in pos["model"]["columns"])
    without = two_arm_protocol(
        "weights-test", covariates=[c for c in protocol.as_dict()["covariates"]
                                    if c["name"] != "region"], estimands=["ATE"])
    ref = fit_weights(cohort, without)
    np.testing.assert_allclose(fit.table["propensity"], ref.table["propensity"], rtol=1e-10)
