"""The estimators of emulant/estimation/measured.py and effects.py against outside references.

- statsmodels ``TreatmentEffect`` (a general-purpose reference library) on the NHEFS complete
  cases (``causaldata``): IPW for the ATE and the ATT, regression adjustment (ATE, ATT) and AIPW
  (ATE) — point estimates equal to 1e-6 (FIELD_NOTES: its standard errors are not comparable).
- Exact covariate balance of overlap weights under a logistic propensity model (Li, Morgan &
  Zaslavsky 2018, JASA 113:390, Theorem 3): with an outcome linear in the model's covariates and
  a constant effect, the overlap-weighted difference equals that effect exactly.
- Frequency weights equal duplicated rows (common practice, no single source).
- Hand computations on tiny tables.
- The synthetic cohort's known truth (synthetic_cohort.generate), when the generator is present.
"""

from __future__ import annotations

import nhefs_data
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from statsmodels.treatment.treatment_effects import TreatmentEffect

from emulant import columns
from emulant.cohort.covariates import covariate_kinds
from emulant.estimation.effects import EffectsError, estimate_effects, estimate_sample
from emulant.estimation.measured import dr_att_means, hajek_means
from emulant.estimation.sample import build_sample
from emulant.models.propensity import build_design
from emulant.protocol import parse_protocol

causaldata = pytest.importorskip("causaldata")

NHEFS_COVARIATES = (("sex", "categorical"), ("race", "categorical"), ("age", "continuous"),
                    ("education", "categorical"), ("smokeintensity", "continuous"),
                    ("smokeyrs", "continuous"), ("exercise", "categorical"),
                    ("active", "categorical"), ("wt71", "continuous"))


def make_protocol(covariates, missing="censor", estimands=("ATE", "ATT"), replicates=0,
                  methods=("ipw", "standardization", "doubly_robust"), continuous="quadratic",
                  interval="wald", measure="y"):
    """A protocol with one measured outcome ``y`` and attribute covariates."""
    return parse_protocol({
        "study": {"id": "t"},
        "concepts": {"a1": {"source": "dispensings", "codes": ["RXA1"]},
                     "b1": {"source": "dispensings", "codes": ["RXB1"]},
                     measure: {"source": "measurements", "codes": ["LABY"]}},
        "eligibility": {"entry": {"start": "2020-01-01", "end": "2020-12-31"}},
        "strategies": {"arms": {"treat": {"initiate": "a1"}, "comp": {"initiate": "b1"}},
                       "treated": "treat"},
        "follow_up": {"max_days": 400},
        "outcomes": {"primary": {"measure": measure, "at_day": 365, "missing": missing}},
        "covariates": [{"name": n, "attribute": n, "kind": k} for n, k in covariates],
        "estimands": list(estimands),
        "analysis": {"propensity": {"continuous": continuous}, "methods": list(methods),
                     "horizons_days": [365],
                     "bootstrap": {"replicates": replicates, "seed": 11, "interval": interval}},
    })


def cohort_frame(a, covs: dict, y, measured=None, measure="y") -> pd.DataFrame:
    a = np.asarray(a, dtype=int)
    df = pd.DataFrame({"person_id": np.arange(len(a)), "arm": np.where(a == 1, "treat", "comp"),
                       "treated": a, **covs})
    y = np.asarray(y, dtype=float)
    m = np.isfinite(y) if measured is None else np.asarray(measured, dtype=bool)
    df[columns.value(measure)] = np.where(m, y, np.nan)
    df[columns.measured(measure)] = m.astype(int)
    return df


def estimate(rows, estimand, method, measure="mean_difference", arm=None):
    hit = [r for r in rows if r["estimand"] == estimand and r["method"] == method
           and r["measure"] == measure and (arm is None or r["arm"] == arm)]
    assert len(hit) == 1, hit
    return hit[0]["estimate"]


def point(cohort, protocol):
    kinds = covariate_kinds(protocol, cohort)
    design = build_design(cohort, protocol.covariates, kinds, protocol.analysis.propensity.continuous)
    sample = build_sample(cohort, protocol, design)
    return sample, estimate_sample(sample)[0]


# ----------------------------------------------------------------------------- statsmodels


@pytest.fixture(scope="module")
def nhefs_complete():
    d = nhefs_data.load(complete=True)
    covs = {n: (d[n].astype(int) if k == "categorical" else d[n]).to_numpy()
            for n, k in NHEFS_COVARIATES}
    cohort = cohort_frame(d["qsmk"].to_numpy(), covs, d["wt82_71"].to_numpy())
    protocol = make_protocol(NHEFS_COVARIATES)
    sample, rows = point(cohort, protocol)
    Z = sm.add_constant(sample.X)
    logit = sm.Logit(sample.a, Z).fit(disp=0, tol=1e-12, maxiter=200)
    te = TreatmentEffect(sm.OLS(d["wt82_71"].to_numpy(), Z), sample.a.astype(int),
                         results_select=logit)
    return sample, rows, te, logit


def test_propensity_matches_statsmodels_logit(nhefs_complete):
    sample, _, _, logit = nhefs_complete
    assert np.allclose(sample.e, logit.predict(), atol=1e-8)


def test_ipw_matches_statsmodels(nhefs_complete):
    # statsmodels TreatmentEffect.ipw: normalised (Hajek) weights, ATE and effect_group=1 (ATT).
    _, rows, te, _ = nhefs_complete
    ate, pom0, pom1 = te.ipw(return_results=False)
    assert estimate(rows, "ATE", "ipw") == pytest.approx(ate, abs=1e-6)
    assert estimate(rows, "ATE", "ipw", "mean", "treat") == pytest.approx(pom1, abs=1e-6)
    assert estimate(rows, "ATE", "ipw", "mean", "comp") == pytest.approx(pom0, abs=1e-6)
    att, _, _ = te.ipw(return_results=False, effect_group=1)
    assert estimate(rows, "ATT", "ipw") == pytest.approx(att, abs=1e-6)


def test_standardization_matches_statsmodels_ra(nhefs_complete):
    # statsmodels TreatmentEffect.ra: OLS per arm, predictions averaged (all; the treated).
    _, rows, te, _ = nhefs_complete
    ate, pom0, pom1 = te.ra(return_results=False)
    assert estimate(rows, "ATE", "standardization") == pytest.approx(ate, abs=1e-6)
    assert estimate(rows, "ATE", "standardization", "mean", "comp") == pytest.approx(pom0, abs=1e-6)
    att, _, _ = te.ra(return_results=False, effect_group=1)
    assert estimate(rows, "ATT", "standardization") == pytest.approx(att, abs=1e-6)


def test_doubly_robust_matches_statsmodels_aipw(nhefs_complete):
    # statsmodels TreatmentEffect.aipw: the augmented IPW estimator of the ATE (no ATT option).
    _, rows, te, _ = nhefs_complete
    ate, pom0, pom1 = te.aipw(return_results=False)
    assert estimate(rows, "ATE", "doubly_robust") == pytest.approx(ate, abs=1e-6)
    assert estimate(rows, "ATE", "doubly_robust", "mean", "treat") == pytest.approx(pom1, abs=1e-6)


def test_unadjusted_is_the_crude_difference(nhefs_complete):
    sample, rows, _, _ = nhefs_complete
    y = sample.cohort[columns.value("y")]
    crude = y[sample.a == 1].mean() - y[sample.a == 0].mean()
    assert estimate(rows, "", "unadjusted") == pytest.approx(crude, abs=1e-12)


# ----------------------------------------------------------------------------- overlap weights


def linear_world(n=3000, seed=5, tau=2.0, noise=0.0):
    rng = np.random.default_rng(seed)
    x1, x2 = rng.normal(size=n), rng.binomial(1, 0.4, n)
    a = rng.binomial(1, 1 / (1 + np.exp(-(0.8 * x1 - 0.7 * x2 + 0.2))))
    y = 1.0 + 1.5 * x1 - 2.0 * x2 + tau * a + noise * rng.normal(size=n)
    return a, {"x1": x1, "x2": x2}, y


def test_overlap_weights_recover_a_constant_effect_exactly():
    # Li, Morgan & Zaslavsky (2018), Theorem 3: overlap weights balance the propensity model's
    # covariate means exactly, so with y linear in them and a constant effect tau, every ATO
    # estimate is tau (also standardization and DR, whose outcome model is then exact).
    a, covs, y = linear_world()
    protocol = make_protocol((("x1", "continuous"), ("x2", "binary")), estimands=("ATO",),
                             continuous="linear")
    _, rows = point(cohort_frame(a, covs, y), protocol)
    for method in ("ipw", "standardization", "doubly_robust"):
        assert estimate(rows, "ATO", method) == pytest.approx(2.0, abs=1e-8)
    assert abs(estimate(rows, "", "unadjusted") - 2.0) > 0.5  # confounded: the check can fail


# ----------------------------------------------------------------------------- frequency weights


def test_frequency_weights_equal_duplicated_rows():
    # Frequency weights are the same as repeating rows (common practice, no single source):
    # propensity, weights, censoring and outcome models all see the repeats.
    a, covs, y = linear_world(n=400, seed=8, noise=1.0)
    rng = np.random.default_rng(1)
    y = np.where(rng.random(len(y)) < 0.15, np.nan, y)  # some unmeasured: censoring weights on
    freq = rng.integers(0, 4, len(a))
    protocol = make_protocol((("x1", "continuous"), ("x2", "binary")),
                             estimands=("ATE", "ATT", "ATO"), continuous="linear")
    cohort = cohort_frame(a, covs, y)
    kinds = covariate_kinds(protocol, cohort)
    design = build_design(cohort, protocol.covariates, kinds, "linear")
    rows_f = estimate_sample(build_sample(cohort, protocol, design, freq=freq))[0]
    dup = cohort.loc[np.repeat(np.arange(len(a)), freq)].reset_index(drop=True)
    rows_d = estimate_sample(build_sample(dup, protocol, design))[0]
    assert len(rows_f) == len(rows_d) == 3 * (1 + 3 * 3)
    for rf, rd in zip(rows_f, rows_d, strict=True):
        assert rf["estimate"] == pytest.approx(rd["estimate"], abs=1e-8), rf
        assert rf["n"] == rd["n"]


# ----------------------------------------------------------------------------- hand computations


def test_hajek_means_by_hand():
    # hand computation: treated (y 1, 3; w 1, 3) -> 10/4; comparator (y 2, 6; w 2, 2) -> 4
    y, a, w = np.array([1, 3, 2, 6.]), np.array([1, 1, 0, 0.]), np.array([1, 3, 2, 2.])
    assert hajek_means(y, a, w) == (2.5, 4.0)


def test_dr_att_by_hand():
    # hand computation: treated y 5, 7 (mean 6); m0 for them 2, 4; one comparator with y 3,
    # m0 1, e 0.5 (odds 1). mu0 = (2 + 4 + 1 * (3 - 1)) / 2 = 4.
    y, a = np.array([5, 7, 3.]), np.array([1, 1, 0.])
    e, m1, m0 = np.array([.6, .7, .5]), np.array([5, 7, 9.]), np.array([2, 4, 1.])
    mu1, mu0 = dr_att_means(y, a, e, m1, m0, np.ones(3), np.ones(3))
    assert (mu1, mu0) == (6.0, 4.0)


def test_censoring_weights_correct_missing_at_random():
    # Missing at random given x: complete cases are biased, censoring weights are not (Robins,
    # Rotnitzky & Zhao 1995). The reference is the same estimator with every outcome observed.
    rng = np.random.default_rng(3)
    n = 20000
    x = rng.normal(size=n)
    a = rng.binomial(1, 0.5, n)
    y = 1.0 + 2.0 * x + 1.0 * a + rng.normal(size=n)
    seen = rng.random(n) < 1 / (1 + np.exp(-(1.0 * x + 0.5 * a)))
    protocol = make_protocol((("x", "continuous"),), continuous="linear",
                             estimands=("ATE", "ATT", "ATO"))
    _, full = point(cohort_frame(a, {"x": x}, y), protocol)
    _, rows = point(cohort_frame(a, {"x": x}, np.where(seen, y, np.nan)), protocol)
    for est in ("ATE", "ATT", "ATO"):
        for method in ("ipw", "standardization", "doubly_robust"):
            for arm in ("treat", "comp"):
                ref = estimate(full, est, method, "mean", arm)
                assert estimate(rows, est, method, "mean", arm) == pytest.approx(ref, abs=0.05)
    assert estimate(rows, "", "unadjusted", "mean", "treat") > estimate(full, "", "unadjusted", "mean", "treat") + 0.5


def test_only_the_protocol_methods_are_reported():
    a, covs, y = linear_world(n=300)
    protocol = make_protocol((("x1", "continuous"), ("x2", "binary")), methods=("ipw",),
                             estimands=("ATT",))
    _, rows = point(cohort_frame(a, covs, y), protocol)
    assert {(r["estimand"], r["method"]) for r in rows} == {("", "unadjusted"), ("ATT", "ipw")}


def test_missing_outcome_column_is_a_clear_error():
    a, covs, y = linear_world(n=100)
    cohort = cohort_frame(a, covs, y).drop(columns=[columns.value("y")])
    protocol = make_protocol((("x1", "continuous"), ("x2", "binary")))
    with pytest.raises(EffectsError, match="value__y"):
        estimate_effects(cohort, protocol, workers=1)


def test_results_object():
    a, covs, y = linear_world(n=300)
    protocol = make_protocol((("x1", "continuous"), ("x2", "binary")), replicates=4)
    res = estimate_effects(cohort_frame(a, covs, y), protocol, workers=1, progress=False)
    assert res.summary is res.estimates
    d = res.to_dict()
    assert d["bootstrap"]["completed"] == 4 and len(d["estimates"]) == len(res.estimates)
    assert res.estimates["se"].notna().all()
    assert res.estimates["horizon_day"].isna().all() and res.estimates["events"].isna().all()


# ----------------------------------------------------------------------------- synthetic truth


def test_synthetic_cohort_known_truth(tmp_path):
    # The invented demo registry's known truth (synthetic_cohort, truth.json: the measured
    # outcome's true ATE and ATT mean differences): adjusted estimates lie within 3 bootstrap
    # SEs of the truth, the confounded crude difference does not.
    import dataclasses

    generate = pytest.importorskip("synthetic_cohort.generate")
    from emulant.cohort import build_cohort
    from emulant.extract import open_extract
    from emulant.protocol import load_protocol

    truth = generate.write_synthetic(tmp_path, 8000, 3, "parquet")
    protocol = load_protocol(tmp_path / "protocol.yaml")
    if not protocol.outcomes.measured():
        pytest.skip("the synthetic protocol has no measured outcome")
    m = protocol.outcomes.measured()[0]
    outcomes = dataclasses.replace(protocol.outcomes, primary=m, secondary=(), negative_controls=(),
                                   for_decision=())
    boot = dataclasses.replace(protocol.analysis.bootstrap, replicates=20)
    protocol = dataclasses.replace(protocol, outcomes=outcomes, estimands=("ATE", "ATT"), decision=None,
                                   contrasts=("intention_to_treat",),
                                   analysis=dataclasses.replace(protocol.analysis, bootstrap=boot))
    cohort = build_cohort(open_extract(tmp_path, protocol), protocol).cohort
    res = estimate_effects(cohort, protocol, workers=2, progress=False)
    e = res.estimates[(res.estimates.measure == "mean_difference") & res.estimates.subgroup.isna()]
    assert len(e) == 1 + 2 * len(protocol.analysis.methods)
    for row in e.itertuples():
        target = truth["measured"][m.measure][row.estimand or "ATE"]["mean_difference"]
        z = abs(row.estimate - target) / row.se
        if row.method == "unadjusted":
            assert z > 3, row
        else:
            assert z < 3, row


def test_time_to_event_outcomes_are_routed_in_protocol_order(tmp_path):
    # Wiring only (the time-to-event estimators have their own tests): every outcome of the
    # demo protocol, in the protocol's order, curves told apart by an outcome column.
    import dataclasses

    generate = pytest.importorskip("synthetic_cohort.generate")
    from emulant.cohort import build_cohort
    from emulant.extract import open_extract
    from emulant.protocol import load_protocol, outcome_name

    generate.write_synthetic(tmp_path, 1500, 9, "parquet")
    protocol = load_protocol(tmp_path / "protocol.yaml")
    boot = dataclasses.replace(protocol.analysis.bootstrap, replicates=2)
    protocol = dataclasses.replace(protocol, analysis=dataclasses.replace(protocol.analysis, bootstrap=boot),
                                   contrasts=("intention_to_treat",))  # per protocol: its own tests
    cohort = build_cohort(open_extract(tmp_path, protocol), protocol).cohort
    res = estimate_effects(cohort, protocol, workers=1, progress=False)
    names = [outcome_name(o) for o in protocol.outcomes.all()]
    assert list(pd.unique(res.estimates["outcome"])) == names
    assert res.curves.columns[0] == "outcome"
    assert set(res.curves["outcome"]) == set(protocol.outcomes.time_to_event())
    assert res.curves["ci_low"].notna().any() and res.estimates["se"].notna().any()


def test_doubly_robust_survives_a_wrong_outcome_model():
    # Double robustness (Bang & Robins 2005, Biometrics 61:962; for the ATT, Moodie, Saarela &
    # Stephens 2018): with the propensity model right and the outcome model wrong (linear in x
    # where the truth is exponential), the DR estimates stay near the constant effect 2 while
    # standardization strays (clearly for the ATT).
    rng = np.random.default_rng(12)
    n = 20000
    x = rng.normal(size=n)
    a = rng.binomial(1, 1 / (1 + np.exp(-(1.0 * x))))
    y = 2.0 * np.exp(x) + 2.0 * a + rng.normal(size=n)
    protocol = make_protocol((("x", "continuous"),), continuous="linear")
    _, rows = point(cohort_frame(a, {"x": x}, y), protocol)
    for est in ("ATE", "ATT"):
        dr, std = estimate(rows, est, "doubly_robust"), estimate(rows, est, "standardization")
        assert dr == pytest.approx(2.0, abs=0.25)
        assert abs(dr - 2.0) < abs(std - 2.0)
    assert abs(estimate(rows, "ATT", "standardization") - 2.0) > 0.5
