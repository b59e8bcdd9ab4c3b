"""Measured outcomes (a value at a fixed day, CONTRACTS §3a): means under each arm and their difference.

The estimators work on one :class:`~emulant.estimation.sample.AnalysisSample` (the point
estimate or one bootstrap replicate) and take its frequency weights ``freq`` into every fit and
every mean. For each estimand, the mean under each arm and the mean difference (treated minus
comparator) by

- ``unadjusted``: crude means among the measured (its rows leave ``estimand`` empty);
- ``ipw``: Hájek weighted means;
- ``standardization``: outcome regression fitted separately per arm, predictions averaged over
  the estimand's target population;
- ``doubly_robust``: augmented inverse probability weighting.

Missing values of a measured outcome enter through the observation weight
:math:`r_i` of the sample (``AnalysisSample.censoring``): 0 for the unmeasured, the inverse
probability of being measured for the measured (``missing: censor``), or 1 (``complete_case``).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from emulant import columns
from emulant.errors import EmulantError
from emulant.estimation.sample import AnalysisSample, SampleError, measured_indicator
from emulant.protocol import MeasuredOutcome

CONTRAST = "intention_to_treat"


class EstimationError(EmulantError):
    """An analysis that cannot be run; the message names the column, outcome or setting."""


# ----------------------------------------------------------------------------- estimators


def _wmean(x: np.ndarray, w: np.ndarray) -> float:
    s = float(w.sum())
    if s <= 0:
        raise SampleError("empty arm", "no weight in a mean")
    return float(np.dot(w, x) / s)


def hajek_means(y: np.ndarray, a: np.ndarray, w: np.ndarray) -> tuple[float, float]:
    r"""Weighted means per arm (Hájek form); ``w`` already holds freq, estimand and censoring weights.

    .. math:: \hat\mu_k = \frac{\sum_i w_i\,1[A_i=k]\,Y_i}{\sum_i w_i\,1[A_i=k]}

    Source: Hájek (1971); Hernán & Robins, *Causal Inference: What If*, §12.4 (the modified
    Horvitz–Thompson estimator). Returns ``(mu_treated, mu_comparator)``.
    """
    t = a == 1
    return _wmean(y[t], w[t]), _wmean(y[~t], w[~t])


def arm_regressions(y: np.ndarray, a: np.ndarray, X: np.ndarray,
                    w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    r"""Outcome regressions fitted separately in each arm, predicted for everyone.

    Weighted least squares of :math:`Y` on :math:`(1, X)` among arm :math:`k` with weights
    ``w`` (freq times the censoring weight; 0 for the unmeasured) — the same as one model with
    every arm-by-covariate interaction:

    .. math:: \hat\beta_k = \arg\min_\beta \sum_{i: A_i=k} w_i (Y_i - Z_i^\top\beta)^2,
              \quad \hat m_k(x) = z^\top \hat\beta_k .

    Solved through the normal equations on centred and scaled columns (weighted means and
    standard deviations of the arm), by least squares on the small cross-product matrix
    (minimum-norm where it is singular, which leaves the arm's fitted values unique).
    Returns ``(m1, m0)``.
    """
    out = []
    for k in (1.0, 0.0):
        idx = (a == k) & (w > 0)
        if not idx.any():
            raise SampleError("empty arm", "no measured outcome in an arm")
        out.append(_wls_predict(X[idx], y[idx], w[idx], X))
    return out[0], out[1]


def _wls_predict(Xk: np.ndarray, yk: np.ndarray, wk: np.ndarray, X: np.ndarray) -> np.ndarray:
    sw = wk.sum()
    mu = (wk @ Xk) / sw
    sd = np.sqrt(np.maximum((wk @ (Xk - mu) ** 2) / sw, 0.0))
    scale = np.where(sd > 1e-12 * np.maximum(1.0, np.abs(mu)), sd, 0.0)  # 0: constant in the arm
    inv = np.divide(1.0, scale, out=np.zeros_like(scale), where=scale > 0)
    Zk = np.column_stack([np.ones(len(yk)), (Xk - mu) * inv])
    A = Zk.T @ (Zk * wk[:, None])
    b = Zk.T @ (wk * yk)
    beta = np.linalg.lstsq(A, b, rcond=None)[0]
    return beta[0] + ((X - mu) * inv) @ beta[1:]


def standardized_means(m1: np.ndarray, m0: np.ndarray, target: np.ndarray) -> tuple[float, float]:
    r"""Standardization (g-formula): predictions under each arm averaged over a target population.

    .. math:: \hat\mu_k = \frac{\sum_i t_i\, \hat m_k(X_i)}{\sum_i t_i}

    with :math:`t_i` = freq (ATE), freq·A (ATT) or freq·e(1−e) (ATO). Source: Hernán & Robins,
    *Causal Inference: What If*, §13.3; Li, Morgan & Zaslavsky (2018), JASA 113:390–400 (overlap).
    """
    return _wmean(m1, target), _wmean(m0, target)


def aipw_ate_means(y, a, e, m1, m0, r, freq) -> tuple[float, float]:
    r"""Augmented IPW potential-outcome means for the ATE.

    .. math::
        \hat\mu_1 = \frac{1}{N}\sum_i f_i\Big[\hat m_1(X_i) + \frac{A_i r_i (Y_i - \hat m_1(X_i))}{e_i}\Big],\quad
        \hat\mu_0 = \frac{1}{N}\sum_i f_i\Big[\hat m_0(X_i) + \frac{(1-A_i) r_i (Y_i - \hat m_0(X_i))}{1-e_i}\Big]

    with :math:`N=\sum_i f_i` and :math:`r_i` the censoring weight (0 for the unmeasured). Uses
    the fitted propensity (not truncated). Source: Robins, Rotnitzky & Zhao (1994), JASA
    89:846–866; Funk et al. (2011), Am J Epidemiol 173:761–767.
    """
    n = float(freq.sum())
    mu1 = float(np.dot(freq, m1 + a * r * (y - m1) / e) / n)
    mu0 = float(np.dot(freq, m0 + (1 - a) * r * (y - m0) / (1 - e)) / n)
    return mu1, mu0


def dr_att_means(y, a, e, m1, m0, r, freq) -> tuple[float, float]:
    r"""Doubly robust means for the ATT: the treated mean and their counterfactual untreated mean.

    .. math::
        \hat\mu_0 = \frac{1}{N_1}\Big[\sum_i f_i A_i \hat m_0(X_i)
              + \sum_i f_i (1-A_i)\, r_i \frac{e_i}{1-e_i}(Y_i - \hat m_0(X_i))\Big],\quad
        \hat\mu_1 = \frac{1}{N_1}\sum_i f_i A_i\big[\hat m_1(X_i) + r_i (Y_i - \hat m_1(X_i))\big]

    with :math:`N_1=\sum_i f_i A_i`; without missing outcomes :math:`\hat\mu_1` is the treated
    mean. Source: Moodie, Saarela & Stephens (2018), Canadian Journal of Statistics 46:132–147.
    """
    n1 = float(np.dot(freq, a))
    mu1 = float(np.dot(freq * a, m1 + r * (y - m1)) / n1)
    mu0 = float((np.dot(freq * a, m0) + np.dot(freq * (1 - a) * r * e / (1 - e), y - m0)) / n1)
    return mu1, mu0


def dr_ato_means(y, a, e, m1, m0, r, freq) -> tuple[float, float]:
    r"""Augmented overlap-weighted means (ATO).

    .. math::
        \hat\mu_k = \frac{\sum_i f_i h_i \hat m_k(X_i)}{\sum_i f_i h_i}
              + \frac{\sum_i f_i 1[A_i=k] r_i w_{ki} (Y_i - \hat m_k(X_i))}{\sum_i f_i 1[A_i=k] r_i w_{ki}}

    with :math:`h_i=e_i(1-e_i)`, :math:`w_{1i}=1-e_i`, :math:`w_{0i}=e_i`. Source: Li, Morgan &
    Zaslavsky (2018), JASA 113:390–400 (overlap weights); the augmented form of balancing weights
    as in Mao, Li & Greene (2019), Stat Methods Med Res 28:2439–2454 (cited from memory).
    """
    h = freq * e * (1 - e)
    t = a == 1
    w1, w0 = freq * r * (1 - e) * t, freq * r * e * (~t)
    mu1 = _wmean(m1, h) + _wmean(y - m1, w1)
    mu0 = _wmean(m0, h) + _wmean(y - m0, w0)
    return mu1, mu0


DR_MEANS: dict[str, Callable] = {"ATE": aipw_ate_means, "ATT": dr_att_means, "ATO": dr_ato_means}


def target_weights(estimand: str, a: np.ndarray, e: np.ndarray, freq: np.ndarray) -> np.ndarray:
    """Who the standardized means average over: everyone (ATE), the treated (ATT), e(1−e) (ATO)."""
    if estimand == "ATE":
        return freq
    if estimand == "ATT":
        return freq * a
    if estimand == "ATO":
        return freq * e * (1 - e)
    raise EstimationError(f"estimands: unknown estimand {estimand!r}")


# ----------------------------------------------------------------------------- rows


def _row(outcome, estimand, method, measure, arm, comparator, estimate, n) -> dict[str, Any]:
    return {"outcome": outcome, "contrast": CONTRAST, "estimand": estimand, "method": method,
            "measure": measure, "horizon_day": None, "arm": arm, "comparator": comparator,
            "estimate": estimate, "n": n, "events": None}


def mean_rows(sample: AnalysisSample, outcome: str, estimand: str, method: str,
              mu1: float, mu0: float) -> list[dict[str, Any]]:
    """Three rows: the mean under each arm, and the mean difference (treated minus comparator)."""
    t, c = sample.treated_arm, sample.comparator_arm
    n1 = int(round(float(np.dot(sample.freq, sample.a))))
    n0 = int(round(float(sample.freq.sum()))) - n1
    return [
        _row(outcome, estimand, method, "mean", t, "", mu1, n1),
        _row(outcome, estimand, method, "mean", c, "", mu0, n0),
        _row(outcome, estimand, method, "mean_difference", t, c, mu1 - mu0, n1 + n0),
    ]


def measured_outcome_rows(sample: AnalysisSample, outcome: MeasuredOutcome) -> list[dict[str, Any]]:
    """All rows of one measured outcome: unadjusted, then each estimand by each protocol method."""
    name = outcome.measure
    if name in sample.censoring:
        r = np.asarray(sample.censoring[name], dtype=float)
    else:  # a sample built without censoring weights: the measured only
        r = measured_indicator(sample.cohort, name)
    seen = r > 0
    y = np.where(seen, sample.cohort[columns.value(name)].to_numpy(dtype=float), 0.0)
    a, e, f = sample.a, sample.e, sample.freq
    methods = sample.protocol.analysis.methods
    rows = mean_rows(sample, name, "", "unadjusted", *hajek_means(y, a, f * seen))
    m1 = m0 = None
    if "standardization" in methods or "doubly_robust" in methods:
        m1, m0 = arm_regressions(y, a, sample.X, f * r)
    for est in sample.protocol.estimands:
        if "ipw" in methods:
            rows += mean_rows(sample, name, est, "ipw", *hajek_means(y, a, f * sample.weights[est] * r))
        if "standardization" in methods:
            mus = standardized_means(m1, m0, target_weights(est, a, e, f))
            rows += mean_rows(sample, name, est, "standardization", *mus)
        if "doubly_robust" in methods:
            rows += mean_rows(sample, name, est, "doubly_robust", *DR_MEANS[est](y, a, e, m1, m0, r, f))
    return rows
