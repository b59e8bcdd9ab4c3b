"""Weighted Cox proportional hazards model: a fast Newton–Raphson fit with Efron's ties.

The point estimate is computed here in vectorised numpy (one sort, suffix sums, no loop over
persons or event times), so that it can run in every bootstrap replicate; the robust (sandwich)
variance of a single fit is lifelines' ``CoxPHFitter(robust=True)``.

A caution that belongs beside every hazard ratio: the hazard ratio averages a possibly
time-varying ratio over the follow-up, weighted by who is still at risk; under a treatment that
depletes the susceptible, a period-specific hazard ratio is selected even in a randomised trial,
and the ratio does not translate into a difference in risk. Report risks at horizons beside it
(Hernán 2010, "The hazards of hazard ratios", Epidemiology 21:13–15). With competing events the
model censors them: it estimates the cause-specific hazard ratio, not a ratio of risks.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from emulant.estimation.events import check_status, check_times


def _efron(beta, x_sorted, w, d, starts, m_tied, late=None):
    """Log partial likelihood, gradient and Hessian (Efron ties), as lifelines computes them.

    ``late``: ``(order, cut)`` of rows entering late (counting-process data): the rows in
    ``order[cut[j]:]`` enter on or after event time ``j`` and leave its risk set."""
    phi = w * np.exp(x_sorted @ beta)
    px = phi[:, None] * x_sorted
    pxx = px[:, :, None] * x_sorted[:, None, :]
    dphi, dpx, dpxx = d * phi, d[:, None] * px, d[:, None, None] * pxx
    g_phi = np.add.reduceat(phi, starts)
    g_px = np.add.reduceat(px, starts, axis=0)
    g_pxx = np.add.reduceat(pxx, starts, axis=0)
    r_phi = np.cumsum(g_phi[::-1])[::-1]
    r_px = np.cumsum(g_px[::-1], axis=0)[::-1]
    r_pxx = np.cumsum(g_pxx[::-1], axis=0)[::-1]
    if late is not None:
        order, cut = late
        for r, v in ((r_phi, phi), (r_px, px), (r_pxx, pxx)):
            s = np.cumsum(v[order][::-1], axis=0)[::-1]
            r -= np.concatenate([s, np.zeros((1, *s.shape[1:]))])[cut]
    t_phi = np.add.reduceat(dphi, starts)
    t_px = np.add.reduceat(dpx, starts, axis=0)
    t_pxx = np.add.reduceat(dpxx, starts, axis=0)
    xsum = np.add.reduceat((d * w)[:, None] * x_sorted, starts, axis=0)
    wsum = np.add.reduceat(d * w, starts)
    g = np.flatnonzero(m_tied > 0)
    m = m_tied[g]
    rep = np.repeat(g, m)
    first = np.repeat(np.cumsum(m) - m, m)
    prop = (np.arange(rep.size) - first) / m_tied[rep]
    denom = 1.0 / (r_phi[rep] - prop * t_phi[rep])
    numer = r_px[rep] - prop[:, None] * t_px[rep]
    a1 = r_pxx[rep] * denom[:, None, None] - t_pxx[rep] * (prop * denom)[:, None, None]
    summand = numer * denom[:, None]
    wavg = (wsum[g] / m)[np.repeat(np.arange(g.size), m)]
    grad = xsum[g].sum(axis=0) - (wavg[:, None] * summand).sum(axis=0)
    loglik = float(xsum[g].sum(axis=0) @ beta + np.sum(wavg * np.log(denom)))
    a2 = summand[:, :, None] * summand[:, None, :]
    hess = np.sum(wavg[:, None, None] * (a2 - a1), axis=0)
    return loglik, grad, hess


def cox_fit(time, event, X, weight=None, freq=None, tol: float = 1e-10,
            max_iter: int = 60, entry=None) -> np.ndarray:
    """Maximum weighted partial likelihood estimate of the Cox model's coefficients.

    .. math::

        \\ell(\\beta) = \\sum_{j} \\Bigl[\\sum_{i \\in D_j} w_i x_i^\\top \\beta
        - \\bar w_j \\sum_{l=0}^{m_j - 1} \\log\\Bigl(\\sum_{i \\in R_j} w_i e^{x_i^\\top\\beta}
        - \\tfrac{l}{m_j} \\sum_{i \\in D_j} w_i e^{x_i^\\top\\beta}\\Bigr)\\Bigr]

    over event times :math:`j` with tied events :math:`D_j` (:math:`m_j` rows, mean weight
    :math:`\\bar w_j`) and risk set :math:`R_j` (Cox 1972, J R Stat Soc B 34:187; Efron 1977,
    J Am Stat Assoc 72:557; the weighted form lifelines uses). Newton–Raphson with step halving.
    Frequency weights ``freq`` count as duplicated rows (a tied death with ``freq`` 2 is two tied
    deaths, :math:`m_j` counts them), other weights as lifelines' ``weights_col`` does; the
    product of the two weights the rows. ``entry`` (counting-process rows, e.g. a person's
    periods with weights that change over time): a row is at risk at times ``t`` with
    ``entry < t <= time`` (left truncation, lifelines' ``entry_col``).

    Parameters
    ----------
    time, event : arrays (days >= 0; 1 event, 0 censored)
    X : array n x p (or n) of covariates
    weight : array of float >= 0, optional (e.g. inverse probability weights)
    freq : array of non-negative integers, optional (frequency weights: duplicated rows)

    Returns
    -------
    beta : array of p log hazard ratios (NaN when there is no event or the fit does not converge)
    """
    t, w = check_times(time, weight)
    _, fr = check_times(time, freq)
    d = check_status(event, t.size, (0, 1)).astype(float)
    x = np.asarray(X, dtype=float).reshape(t.size, -1)
    keep = w * fr > 0
    en = np.full(t.size, -np.inf) if entry is None else np.asarray(entry, dtype=float)
    t, w, fr, d, x, en = t[keep], w[keep], fr[keep], d[keep], x[keep], en[keep]
    p = x.shape[1]
    if not np.any(d > 0):
        return np.full(p, np.nan)
    x = x - np.average(x, axis=0, weights=w * fr)
    order = np.argsort(t, kind="stable")
    t, w, fr, d, x, en = t[order], w[order] * fr[order], fr[order], d[order], x[order], en[order]
    starts = np.flatnonzero(np.r_[True, t[1:] != t[:-1]])
    late = None
    if entry is not None:
        by_entry = np.argsort(en, kind="stable")
        late = (by_entry, np.searchsorted(en[by_entry], t[starts], side="left"))
    # tied events as duplicated rows; real-valued person weights (the Bayesian bootstrap)
    # round to whole events, at least one where an event occurs
    tied = np.add.reduceat(d * fr, starts)
    m_tied = np.where(tied > 0, np.maximum(np.rint(tied), 1), 0).astype(int)
    beta = np.zeros(p)
    ll, grad, hess = _efron(beta, x, w, d, starts, m_tied, late)
    for _ in range(max_iter):
        try:
            step = np.linalg.solve(-hess, grad)
        except np.linalg.LinAlgError:
            step = np.linalg.pinv(-hess) @ grad
        size = 1.0
        while True:
            new = beta + size * step
            ll_new, g_new, h_new = _efron(new, x, w, d, starts, m_tied, late)
            if np.isfinite(ll_new) and ll_new >= ll - 1e-12 * abs(ll) or size < 1e-4:
                break
            size /= 2
        done = np.max(np.abs(new - beta)) < tol
        beta, ll, grad, hess = new, ll_new, g_new, h_new
        if done:
            return beta
    return np.full(p, np.nan) if np.max(np.abs(grad)) > 1e-6 * max(1.0, abs(ll)) else beta


def monotone_likelihood(time, event, treated, weight) -> str:
    r"""Why the hazard ratio of a 0/1 ``treated`` has no finite maximum likelihood estimate ('' if it has).

    The log partial likelihood is concave in :math:`\beta`; its score tends, as
    :math:`\beta \to -\infty`, to the weighted number of treated events at times when someone
    of the comparator arm is still at risk (and, as :math:`\beta \to +\infty`, minus the
    comparator events at times when someone treated is at risk). When that number is zero the
    likelihood is monotone and the estimate is infinite: no events in an arm is the common case
    (Heinze & Schemper 2001, Biometrics 57:114, "monotone likelihood"). Such a ratio is not
    estimable; the fit would stop at an arbitrary large :math:`|\beta|`.
    """
    t, a, w, d = (np.asarray(x, dtype=float) for x in (time, treated, weight, event))
    keep = (w > 0) & np.isfinite(t)
    t, a, w, d = t[keep], a[keep], w[keep], d[keep]
    for g, name in ((1, "treated"), (0, "comparator")):
        ev = (d > 0) & (a == g)
        if not np.any(ev):
            return f"no events in the {name} arm"
        last_other = np.max(t[a != g], initial=-np.inf)  # the other arm is at risk up to its last time
        if not np.any(ev & (t <= last_other)):
            return (f"every event of the {name} arm comes after the other arm's last person "
                    "left follow-up (monotone likelihood)")
    return ""


@dataclass(frozen=True)
class HazardRatio:
    """A hazard ratio of the treated arm versus the comparator."""

    log_hr: float
    se_robust: float  # NaN unless computed (lifelines' sandwich variance)
    n: float
    events: float
    cause_specific: bool
    not_estimable: str = ""  # why the ratio is not estimable ('' when it is)

    @property
    def hr(self) -> float:
        return float(np.exp(self.log_hr))

    def to_dict(self) -> dict:
        return {"log_hr": self.log_hr, "hr": self.hr, "se_robust": self.se_robust, "n": self.n,
                "events": self.events, "cause_specific": self.cause_specific,
                "not_estimable": self.not_estimable}

    @property
    def summary(self) -> pd.DataFrame:
        return pd.DataFrame([self.to_dict()])


def cox_hazard_ratio(time, status, treated, weight=None, freq=None,
                     robust_se: bool = False) -> HazardRatio:
    """Weighted Cox hazard ratio of ``treated`` (0/1), cause-specific with competing events.

    Competing events (status 2) are censored, so the ratio is of cause-specific hazards. With
    inverse probability of treatment weights this is the marginal hazard ratio of a marginal
    structural Cox model (Hernán, Brumback & Robins 2000, Epidemiology 11:561); its robust
    sandwich variance (``robust_se=True``, lifelines ``CoxPHFitter(robust=True)`` with the weight
    ``weight * freq``; slow on large data) accounts for the weights, but not for their
    estimation: the pipeline's bootstrap does. ``freq`` are frequency weights (:func:`cox_fit`).

    With no finite estimate (no events in an arm, :func:`monotone_likelihood`) ``log_hr`` is
    NaN and ``not_estimable`` says why. See the module docstring for the proportional-hazards
    caution (Hernán 2010).
    """
    t, w = check_times(time, weight)
    _, fr = check_times(time, freq)
    s = check_status(status, t.size)
    a = np.asarray(treated, dtype=float)
    event = (s == 1).astype(int)
    why = monotone_likelihood(t, event, a, w * fr)
    beta = cox_fit(t, event, a, w, fr) if not why else np.full(1, np.nan)
    w = w * fr
    se = float("nan")
    if robust_se and np.isfinite(beta[0]):
        import warnings

        from lifelines import CoxPHFitter

        df = pd.DataFrame({"T": t, "E": event, "a": a, "w": w})
        df = df[df["w"] > 0]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # non-integer weights warn (FIELD_NOTES)
            fit = CoxPHFitter().fit(df, "T", "E", weights_col="w", robust=True)
        se = float(fit.standard_errors_["a"])
    return HazardRatio(log_hr=float(beta[0]), se_robust=se, n=float(fr.sum()),
                       events=float(np.sum(fr * event)), cause_specific=bool(np.any(s == 2)),
                       not_estimable=why)
