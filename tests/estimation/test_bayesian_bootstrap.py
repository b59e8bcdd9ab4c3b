"""The Bayesian bootstrap (``analysis.bootstrap.kind: bayesian``) through the real estimators.

Source: Rubin (1981), "The Bayesian bootstrap", Ann Stat 9:130–134. With Dirichlet(1, …, 1)
person weights, the weighted share of events among the m persons of an arm with k events is
distributed as Beta(k, m − k) (the aggregation property of the Dirichlet distribution), and the
two arms' shares are independent; so the replicates of the unadjusted risk difference must follow
Beta(k1, m1 − k1) − Beta(k0, m0 − k0), whose mean is the observed difference k1/m1 − k0/m0.
"""

from __future__ import annotations

from dataclasses import replace
from functools import partial

import numpy as np
from scipy import stats
from test_effects import cohort_frame, make_protocol

from emulant.cohort.covariates import covariate_kinds
from emulant.estimation.bootstrap import ROW_KEY, replicate_freq, row_key, run_bootstrap
from emulant.estimation.effects import estimate_sample, replicate_estimates
from emulant.estimation.sample import build_sample
from emulant.models.design import build_design

R = 400
K1, M1, K0, M0 = 30, 100, 45, 100


def _bayesian(protocol):
    boot = replace(protocol.analysis.bootstrap, kind="bayesian", replicates=R)
    return replace(protocol, analysis=replace(protocol.analysis, bootstrap=boot))


def test_dirichlet_weights_from_the_seed():
    w = replicate_freq(1000, 7, 3, "bayesian")
    assert np.all(w > 0) and abs(w.sum() - 1000) < 1e-9
    assert np.array_equal(w, replicate_freq(1000, 7, 3, "bayesian"))
    assert not np.array_equal(w, replicate_freq(1000, 7, 4, "bayesian"))
    # Dirichlet(1, ..., 1) times n: each weight is Exponential(1) in the limit (mean 1, SD 1)
    assert abs(w.mean() - 1) < 1e-9 and abs(w.std() - 1) < 0.1


def test_risk_difference_posterior_is_the_beta_difference():
    a = np.r_[np.ones(M1, int), np.zeros(M0, int)]
    y = np.r_[np.ones(K1), np.zeros(M1 - K1), np.ones(K0), np.zeros(M0 - K0)]
    x1 = np.random.default_rng(5).normal(size=a.size)
    cohort = cohort_frame(a, {"x1": x1}, y)
    protocol = _bayesian(make_protocol((("x1", "continuous"),), methods=("ipw",)))
    design = build_design(cohort, protocol.covariates, covariate_kinds(protocol, cohort), "quadratic")
    X = np.asarray(design.transform(cohort), dtype=float)
    rows, curves = estimate_sample(build_sample(cohort, protocol, design, X))
    run = run_bootstrap(partial(replicate_estimates, cohort, protocol, design, X), len(cohort),
                        protocol, rows, curves, workers=1, progress=False)
    assert run.completed == R and run.kind == "bayesian"
    keys = [row_key(r, ROW_KEY) for r in rows]
    i = next(j for j, r in enumerate(rows) if r["method"] == "unadjusted"
             and r["measure"] == "mean_difference")
    assert abs(rows[i]["estimate"] - (K1 / M1 - K0 / M0)) < 1e-12
    reps = run.row_reps[:, i]
    draws = (stats.beta(K1, M1 - K1).rvs(200_000, random_state=1)
             - stats.beta(K0, M0 - K0).rvs(200_000, random_state=2))
    sd = draws.std()
    # the replicate mean is the posterior mean, the observed difference (Monte Carlo SE sd/sqrt(R))
    assert abs(reps.mean() - (K1 / M1 - K0 / M0)) < 4 * sd / np.sqrt(R)
    # the spread: the SD of R draws has a relative Monte Carlo SE of about 1/sqrt(2R) = 3.5%
    assert abs(reps.std(ddof=1) / sd - 1) < 4 / np.sqrt(2 * R)
    assert stats.ks_2samp(reps, draws).pvalue > 0.001
    # the IPW difference (a covariate unrelated to treatment) follows the same posterior
    j = keys.index(("y", "intention_to_treat", "ATE", "ipw", "mean_difference", None, "treat", "comp",
                     None))
    assert abs(run.row_reps[:, j].std(ddof=1) / sd - 1) < 0.2
