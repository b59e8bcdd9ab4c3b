"""Influence-function (M-estimation) standard errors (``analysis.variance: influence``).

Outside references:

* the sandwich of the stacked estimating equations, :math:`A^{-1} B A^{-\\top}` with the
  Jacobian :math:`A` taken by numerical differentiation (Stefanski & Boos 2002, The American
  Statistician 56:29–38, eq. 3) and the nuisance coefficients fitted by statsmodels — computed
  here independently of the package's analytic influence functions;
* the propensity model's own sandwich: statsmodels' GLM (binomial) with ``cov_type="HC0"``;
* Greenwood's variance of the Kaplan–Meier estimate: statsmodels' ``SurvfuncRight``
  (``surv_prob_se``; Greenwood 1926);
* the Aalen–Johansen derivatives: numerical differentiation of
  :func:`emulant.estimation.survival.aalen_johansen` with respect to each weight.

The data of these formula checks are drawn at random here (invented numbers; no estimator is
checked against a truth with them). The comparison with the bootstrap on the synthetic registry
is in ``test_influence_bootstrap.py``.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from scipy.special import expit
from two_arm import two_arm_protocol

from emulant.estimation.influence import (
    aj_influence,
    logistic_nuisance,
    se_of,
    standard_design,
)
from emulant.estimation.influence_rows import bootstrap_needed, measured_ses
from emulant.estimation.measured import measured_outcome_rows
from emulant.estimation.sample import build_sample
from emulant.estimation.survival import aalen_johansen

sm = pytest.importorskip("statsmodels.api")


def _protocol(estimands=("ATE", "ATT", "ATO"), missing="censor", **analysis):
    return two_arm_protocol(
        "influence-check", extra_concepts={"lab": {"source": "measurements", "codes": ["LB1"]}},
        outcomes={"primary": {"measure": "lab", "at_day": 365, "missing": missing}},
        estimands=list(estimands),
        analysis={"methods": ["ipw", "doubly_robust"], "variance": "influence", **analysis})


def _data(n=600, seed=3):
    rng = np.random.default_rng(seed)
    X = np.column_stack([rng.normal(size=n), rng.binomial(1, 0.4, n), rng.gamma(2.0, 1.0, n)])
    a = rng.binomial(1, expit(-0.3 + 0.8 * X[:, 0] + 0.5 * X[:, 1] - 0.3 * X[:, 2]))
    seen = rng.binomial(1, expit(1.2 + 0.4 * a - 0.6 * X[:, 0] + 0.2 * X[:, 2]))
    y = 2.0 + 1.5 * a + X @ np.array([1.0, -0.8, 0.5]) + 0.7 * a * X[:, 0] + rng.normal(size=n)
    cohort = pd.DataFrame({"treated": a, "value__lab": np.where(seen == 1, y, np.nan),
                           "measured__lab": seen})
    return X, a.astype(float), seen.astype(float), np.where(seen == 1, y, 0.0), cohort


def _sample(protocol, X, cohort):
    design = SimpleNamespace(columns=("x1", "x2", "x3"), transform=lambda c: X)
    return build_sample(cohort, protocol, design, X=X)


def _stacked_se(X, a, M, y, estimand, method, model=True):
    """(mu1, mu0) and the SEs of (mu1, mu0, mu1 - mu0) from the stacked equations' sandwich,
    the Jacobian by numerical differentiation. ``model``: the measurement model's equations are
    stacked too (``missing: censor``, r = M / p); without it r = M (complete case)."""
    n = len(a)
    Zb = np.column_stack([np.ones(n), X])
    Za = np.column_stack([np.ones(n), a, X])
    beta = sm.Logit(a, Zb).fit(disp=0, tol=1e-12).params
    alpha = sm.Logit(M, Za).fit(disp=0, tol=1e-12).params if model else np.empty(0)
    kb, ka, kg = Zb.shape[1], len(alpha), Zb.shape[1]
    r0 = M / expit(Za @ alpha) if model else M
    g1 = sm.WLS(y, Zb, weights=a * r0).fit().params
    g0 = sm.WLS(y, Zb, weights=(1 - a) * r0).fit().params

    def psi(theta):
        b, al = theta[:kb], theta[kb:kb + ka]
        c1, c0 = theta[kb + ka:kb + ka + kg], theta[kb + ka + kg:kb + ka + 2 * kg]
        mu = theta[kb + ka + 2 * kg:]
        e = expit(Zb @ b)
        p = expit(Za @ al) if model else np.ones(n)
        r = M / p
        m1, m0 = Zb @ c1, Zb @ c0
        parts = [Zb * (a - e)[:, None]] + ([Za * (M - p)[:, None]] if model else []) + [
            Zb * (a * r * (y - m1))[:, None], Zb * ((1 - a) * r * (y - m0))[:, None]]
        if method == "ipw":
            w = {"ATE": a / e + (1 - a) / (1 - e), "ATT": a + (1 - a) * e / (1 - e),
                 "ATO": a * (1 - e) + (1 - a) * e}[estimand]
            parts += [a * w * r * (y - mu[0]), (1 - a) * w * r * (y - mu[1])]
        elif estimand == "ATE":
            parts += [m1 + a * r * (y - m1) / e - mu[0], m0 + (1 - a) * r * (y - m0) / (1 - e) - mu[1]]
        elif estimand == "ATT":
            parts += [a * (m1 + r * (y - m1) - mu[0]),
                      a * (m0 - mu[1]) + (1 - a) * r * e / (1 - e) * (y - m0)]
        else:  # ATO: mu_k = A_k + B_k, four parameters
            h = e * (1 - e)
            parts += [h * (m1 - mu[0]), a * r * (1 - e) * (y - m1 - mu[1]),
                      h * (m0 - mu[2]), (1 - a) * r * e * (y - m0 - mu[3])]
        return np.column_stack([q if q.ndim == 2 else q[:, None] for q in parts])

    k_mu = 4 if (method == "doubly_robust" and estimand == "ATO") else 2
    theta = np.concatenate([beta, alpha, g1, g0, np.zeros(k_mu)])
    for _ in range(3):  # the mean parameters solve their own (linear) equations
        S = psi(theta).sum(axis=0)
        J = _jacobian(psi, theta)
        theta[-k_mu:] -= np.linalg.solve(J[-k_mu:, -k_mu:], S[-k_mu:])
    P = psi(theta)
    assert np.abs(P.sum(axis=0)).max() < 1e-6
    Ainv = np.linalg.inv(_jacobian(psi, theta))
    V = Ainv @ (P.T @ P) @ Ainv.T
    C = np.zeros((3, len(theta)))
    if k_mu == 2:
        C[0, -2], C[1, -1] = 1, 1
    else:
        C[0, -4:-2], C[1, -2:] = 1, 1
    C[2] = C[0] - C[1]
    return C[:2] @ theta, np.sqrt(np.diag(C @ V @ C.T))


def _jacobian(psi, theta, h=1e-6):
    J = np.empty((len(theta), len(theta)))
    for j in range(len(theta)):
        d = np.zeros_like(theta)
        d[j] = h * max(1.0, abs(theta[j]))
        J[:, j] = (psi(theta + d).sum(axis=0) - psi(theta - d).sum(axis=0)) / (2 * d[j])
    return J


@pytest.mark.parametrize("missing", ["censor", "complete_case"])
def test_measured_means_match_the_stacked_sandwich(missing):
    X, a, M, y, cohort = _data()
    protocol = _protocol(missing=missing)
    sample = _sample(protocol, X, cohort)
    outcome = protocol.outcomes.primary
    rows = measured_outcome_rows(sample, outcome)
    Zx = standard_design(X)
    beta = logistic_nuisance(Zx, sample.a, sample.e, "propensity")
    ses = measured_ses(sample, outcome, beta, Zx)
    for est in ("ATE", "ATT", "ATO"):
        for method in ("ipw", "doubly_robust"):
            mus, ref = _stacked_se(X, a, M, y, est, method, model=missing == "censor")
            got = [ses[est, method, "mean", "drug_a"], ses[est, method, "mean", "drug_b"],
                   ses[est, method, "mean_difference", "drug_a"]]
            mine = {(r["measure"], r["arm"]): r["estimate"] for r in rows
                    if r["estimand"] == est and r["method"] == method}
            assert mine["mean", "drug_a"] == pytest.approx(mus[0], rel=1e-7)
            assert mine["mean", "drug_b"] == pytest.approx(mus[1], rel=1e-7)
            np.testing.assert_allclose(got, ref, rtol=2e-4, err_msg=f"{est} {method}")


def test_propensity_influence_is_statsmodels_hc0_sandwich():
    X, a, *_ = _data(n=400, seed=11)
    Z = np.column_stack([np.ones(len(a)), X])
    fit = sm.GLM(a, Z, family=sm.families.Binomial()).fit(cov_type="HC0", tol=1e-12)
    nu = logistic_nuisance(Z, a, fit.predict(Z), "propensity")
    # the coefficients' influence values, column by column: IF_i^T e_j
    IF = np.column_stack([nu.apply(np.eye(Z.shape[1])[j]) for j in range(Z.shape[1])])
    np.testing.assert_allclose(IF.T @ IF, fit.cov_params(), rtol=1e-6)


def test_penalised_propensity_is_refused():
    X, a, *_ = _data(n=400, seed=11)
    Z = np.column_stack([np.ones(len(a)), X])
    p = expit(Z @ np.array([0.1, 0.3, 0.2, -0.1]))  # not the maximum-likelihood fit
    with pytest.raises(Exception, match="penalised"):
        logistic_nuisance(Z, a, p, "propensity")


def test_aalen_johansen_derivative_is_numerical_derivative():
    rng = np.random.default_rng(5)
    n = 60
    t = rng.integers(1, 40, n).astype(float)  # ties on purpose
    s = rng.choice([0, 1, 2], n, p=[0.4, 0.4, 0.2])
    w = rng.uniform(0.5, 2.0, n)
    days = [10.0, 25.0, 45.0]
    risks, grads = aj_influence(t, s, w, days)
    for day, risk, g in zip(days, risks, grads, strict=True):
        def F(ww, day=day):
            times, cif, _ = aalen_johansen(t, s, ww)
            k = np.searchsorted(times, day, side="right") - 1
            return cif[k] if k >= 0 else 0.0
        assert risk == pytest.approx(F(w), rel=1e-12)
        num = np.empty(n)
        for i in range(n):
            d = np.zeros(n)
            d[i] = 1e-6
            num[i] = (F(w + d) - F(w - d)) / 2e-6
        np.testing.assert_allclose(g, num, atol=1e-8)


def test_kaplan_meier_influence_gives_greenwood():
    rng = np.random.default_rng(8)
    n = 300
    t = rng.integers(1, 200, n).astype(float)
    s = rng.binomial(1, 0.6, n)
    days = [50.0, 100.0, 150.0]
    risks, grads = aj_influence(t, s, np.ones(n), days)
    ref = sm.SurvfuncRight(t, s)
    for day, risk, g in zip(days, risks, grads, strict=True):
        k = np.searchsorted(ref.surv_times, day, side="right") - 1
        assert 1 - risk == pytest.approx(ref.surv_prob[k], rel=1e-12)
        assert se_of(g) == pytest.approx(ref.surv_prob_se[k], rel=1e-9)


def test_bootstrap_needed_only_for_rows_without_an_influence_function():
    assert bootstrap_needed(_protocol(variance="bootstrap"))
    assert not bootstrap_needed(_protocol())  # measured: ipw and doubly_robust covered
    assert bootstrap_needed(_protocol(methods=["standardization"]))
    assert bootstrap_needed(_protocol(weights={"truncate": [0.01, 0.99]}))
    assert not bootstrap_needed(_protocol(estimands=["ATO"], weights={"truncate": [0.01, 0.99]}))
    tte = two_arm_protocol("influence-tte", estimands=["ATE"],
                           analysis={"methods": ["ipw"], "variance": "influence", "hazard_ratio": False})
    assert not bootstrap_needed(tte)
    for extra in ({"hazard_ratio": True}, {"censoring_weights": True},
                  {"methods": ["ipw", "doubly_robust"]}):
        p = two_arm_protocol("influence-tte", estimands=["ATE"], analysis={
            "methods": ["ipw"], "variance": "influence", "hazard_ratio": False, **extra})
        assert bootstrap_needed(p), extra


def test_no_bootstrap_chunk_job_when_every_row_has_an_influence_function():
    from emulant.paths import bootstrap_chunks

    assert bootstrap_chunks(_protocol(), "auto") == []
    # the default 200 replicates in chunks of 25 when any row needs them
    assert len(bootstrap_chunks(_protocol(variance="bootstrap"), "auto")) == 8
    assert len(bootstrap_chunks(_protocol(methods=["standardization"]), 2)) == 2
