"""Simulated two-arm cohorts with constant daily hazards, for estimator-versus-truth checks.

Each person has a confounder ``x``; the arm follows a logistic propensity in ``x``. On every day
of follow-up the outcome happens with probability ``h1`` (first), then the competing event with
probability ``h2``; the coverage ends (censoring) with probability ``c`` after both. All three are
logistic in ``x`` (and the arm for ``h1``; optionally in :math:`x^2`), constant over time, so the pooled logistic model of a
daily hazard with any time basis is correctly specified and a person's cumulative incidence by
day ``d`` has the closed form

.. math:: F(d) = h_1 \\frac{1 - q^d}{1 - q}, \\qquad q = (1 - h_1)(1 - h_2).

The truth of a contrast is that closed form under each arm averaged over the target population
of the sample drawn (everyone for the ATE, the treated for the ATT): a sample-average truth, so
only estimation error separates an estimate from it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from emulant import columns


def expit(z):
    return 1.0 / (1.0 + np.exp(-z))


@dataclass(frozen=True)
class Design:
    n: int = 3000
    max_days: int = 1095
    outcome: tuple[float, float, float] = (-7.6, 0.7, -0.6)  # intercept, x, arm (daily logit)
    competing: tuple[float, float] = (-9.2, 0.4)  # intercept, x
    censoring: tuple[float, float] = (-7.7, 0.9)  # intercept, x; None-like: intercept -inf
    propensity: tuple[float, float] = (0.0, 0.8)
    outcome_x2: float = 0.0  # a term in x squared (an outcome model linear in x then misses it)


def hazards(design: Design, x, arm):
    b = design.outcome
    h1 = expit(b[0] + b[1] * x + design.outcome_x2 * x ** 2 + b[2] * arm)
    h2 = expit(design.competing[0] + design.competing[1] * x)
    return h1, h2


def true_risk(design: Design, x, arm, day):
    h1, h2 = hazards(design, x, arm)
    q = (1 - h1) * (1 - h2)
    return h1 * (1 - q ** day) / (1 - q)


def simulate(design: Design, seed: int, horizons) -> tuple[pd.DataFrame, dict]:
    """The cohort (``treated``, ``x``, ``arm``, ``end_day__event``, ``end_reason__event``) and
    the truth ``{estimand: {arm 0/1: {horizon: risk}}}``."""
    rng = np.random.default_rng(seed)
    n = design.n
    x = rng.normal(size=n)
    a = (rng.uniform(size=n) < expit(design.propensity[0] + design.propensity[1] * x)).astype(int)
    h1, h2 = hazards(design, x, a)
    q = (1 - h1) * (1 - h2)
    first = rng.geometric(1 - q)  # day of the first event of either cause (>= 1)
    cause = np.where(rng.uniform(size=n) < h1 / (1 - q), "outcome", "competing")
    c = expit(design.censoring[0] + design.censoring[1] * x)
    lost = rng.geometric(c)  # day the coverage ends
    end = np.minimum.reduce([first, lost, np.full(n, design.max_days)]).astype(float)
    reason = np.where(first == end, cause,
                      np.where(end == design.max_days, "max_follow_up", "coverage_end"))
    cohort = pd.DataFrame({"person_id": np.arange(n), "treated": a, "x": x,
                           "arm": np.where(a == 1, "drug_a", "drug_b"),
                           columns.end_day("event"): end, columns.end_reason("event"): reason})
    truth = {}
    for est, pop in (("ATE", np.ones(n, bool)), ("ATT", a == 1)):
        truth[est] = {g: {h: float(np.mean(true_risk(design, x[pop], g, h))) for h in horizons}
                      for g in (0, 1)}
    return cohort, truth


def analysis_sample(cohort: pd.DataFrame, protocol, freq=None, covariates=("x",)):
    """The analysis sample with a plain statsmodels logistic propensity (reference library) and
    the estimands' weights written out; ``covariates=()`` fits no covariate anywhere."""
    import statsmodels.api as sm

    from emulant.estimation.sample import AnalysisSample

    a = cohort["treated"].to_numpy(float)
    X = cohort[list(covariates)].to_numpy(float).reshape(len(a), -1)
    f = np.ones(len(a)) if freq is None else np.asarray(freq, float)
    Z = sm.add_constant(X, has_constant="add")
    e = sm.GLM(a, Z, family=sm.families.Binomial(), freq_weights=f).fit().predict(Z)
    w = {"ATE": np.where(a == 1, 1 / e, 1 / (1 - e)), "ATT": np.where(a == 1, 1, e / (1 - e)),
         "ATO": np.where(a == 1, 1 - e, e)}
    return AnalysisSample(cohort, protocol, X, tuple(covariates), a, f, e,
                          {k: w[k] for k in protocol.estimands})


def bootstrap(estimate, n: int, replicates: int, seed: int) -> np.ndarray:
    """``estimate(freq)`` (a 1-d array) under ``replicates`` multinomial frequency weights."""
    rng = np.random.default_rng(seed)
    return np.array([estimate(rng.multinomial(n, np.full(n, 1 / n)).astype(float))
                     for _ in range(replicates)])
