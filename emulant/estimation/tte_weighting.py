"""Weighting pieces of the time-to-event estimators: target populations, censoring weights,
the IPCW cumulative incidence, standardized (g-formula) risks and the augmented IPW risk."""

from __future__ import annotations

import numpy as np

from emulant.estimation.pooled_logistic import PooledLogistic, censoring_probability_before
from emulant.estimation.survival import OUTCOME, SurvivalError, censoring_survival, step_before

ESTIMANDS = ("ATE", "ATT", "ATO")


def target_weights(estimand: str, a, e, freq) -> np.ndarray:
    """Weights :math:`v_i` of the target population over which individual risks are averaged.

    ATE: everyone (:math:`v = f`); ATT: the treated (:math:`v = f a`); ATO: the overlap population
    (:math:`v = f e (1 - e)`, Li, Morgan & Zaslavsky 2018, J Am Stat Assoc 113:390).
    """
    f = np.asarray(freq, dtype=float)
    if estimand == "ATE":
        return f
    if estimand == "ATT":
        return f * np.asarray(a, dtype=float)
    if estimand == "ATO":
        e = np.asarray(e, dtype=float)
        return f * e * (1.0 - e)
    raise SurvivalError(f"estimands: {estimand!r} is not one of {list(ESTIMANDS)}")


def standardized_risks(incidence: dict[int, np.ndarray], v, n_grid: int, horizons):
    """The g-formula risk under each arm, :math:`\\sum_i v_i \\hat F_i^{a}(t) / \\sum_i v_i`.

    ``incidence`` holds each person's :math:`\\hat F_i^a` on the grid's ``n_grid`` days, then
    at the ``horizons``.

    Returns
    -------
    curves : {arm: risk on the grid}; risk : {arm: {horizon: risk}}
    """
    v = np.asarray(v, dtype=float)
    curves, risk = {}, {}
    for g, F in incidence.items():
        mean = v @ F / v.sum()
        curves[g] = mean[:n_grid]
        risk[g] = dict(zip(horizons, mean[n_grid:], strict=True))
    return curves, risk


def censoring_at(time, status, a, freq, horizons,
                 model: PooledLogistic | None = None, X=None) -> dict:
    """Probabilities of remaining uncensored, per person: :math:`G_i(T_i^-)` and
    :math:`G_i(t^-)` at each horizon :math:`t`.

    Without ``model``: the Kaplan–Meier estimate of the censoring distribution in the person's
    arm (censoring independent of the covariates within an arm). With ``model`` (a pooled
    logistic model of the daily censoring hazard, ``analysis.censoring_weights``):
    :math:`\\prod_{j<d}(1 - c_i(k(j)))` over the days before :math:`d = T_i` (or :math:`t`);
    an event on day 0 counts on day 1, as in the hazard models.

    Returns
    -------
    dict: ``event`` (n,), ``horizon`` {t: (n,)}
    """
    t = np.asarray(time, dtype=float)
    s = np.asarray(status, dtype=int)
    a = np.asarray(a).astype(int)
    f = np.asarray(freq, dtype=float)
    if model is not None:
        days = [np.where(s != 0, np.maximum(t, 1.0), t)] + [np.full(t.size, h) for h in horizons]
        G = censoring_probability_before(model, X, a, days)
        return {"event": G[0], "horizon": dict(zip(horizons, G[1:], strict=True))}
    g_event = np.ones(t.size)
    g_h = {h: np.ones(t.size) for h in horizons}
    for g in (0, 1):
        m = a == g
        times, G = censoring_survival(t[m], s[m], f[m])
        g_event[m] = step_before(times, G, t[m], 1.0)
        for h in horizons:
            g_h[h][m] = step_before(times, G, [h], 1.0)[0]
    return {"event": g_event, "horizon": g_h}


def _inverse(g):
    g = np.asarray(g, dtype=float)
    return np.divide(1.0, g, out=np.zeros_like(g), where=g > 0)


def ipcw_incidence(time, status, a, w, cens: dict, grid, horizons):
    """Inverse probability of censoring weighted cumulative incidence by arm.

    .. math::

        \\hat F_a(t) = \\frac{\\sum_{i: A_i = a} w_i\\, [T_i \\le t, \\delta_i = 1] /
        \\hat G_i(T_i^-)}{\\sum_{i: A_i = a} w_i}

    (Robins & Finkelstein 2000, Biometrics 56:779; with :math:`\\hat G` the within-arm
    Kaplan–Meier censoring survival it equals the Aalen–Johansen estimate, Satten & Datta 2001).
    """
    t = np.asarray(time, dtype=float)
    s = np.asarray(status, dtype=int)
    a = np.asarray(a).astype(int)
    w = np.asarray(w, dtype=float)
    contrib = w * (s == OUTCOME) * _inverse(cens["event"])
    days = np.concatenate([np.asarray(grid, float), np.asarray(horizons, float)])
    curves, risk = {}, {}
    for g in (0, 1):
        m = a == g
        order = np.argsort(t[m], kind="stable")
        ts, cs = t[m][order], np.cumsum(contrib[m][order])
        idx = np.searchsorted(ts, days, side="right") - 1
        vals = np.where(idx >= 0, cs[np.clip(idx, 0, None)], 0.0) / w[m].sum()
        curves[g] = vals[: len(grid)]
        risk[g] = dict(zip(horizons, vals[len(grid):], strict=True))
    return curves, risk


def aipw_risk(time, status, a, w, v, F_h: dict[int, np.ndarray], cens: dict, horizons):
    """Augmented inverse probability weighted risk of the outcome by each horizon, by arm.

    .. math::

        \\hat\\psi_a(t) = \\frac{\\sum_i v_i \\hat F_a(t \\mid X_i)}{\\sum_i v_i}
        + \\frac{\\sum_{i: A_i = a} w_i \\frac{\\Delta_i(t)}{\\hat G_i(T_i \\wedge t^-)}
        \\bigl(Y_i(t) - \\hat F_a(t \\mid X_i)\\bigr)}{\\sum_{i: A_i = a} w_i}

    with :math:`Y_i(t) = [T_i \\le t, \\delta_i = 1]` (the outcome by :math:`t`; a competing event
    first makes it 0), :math:`\\Delta_i(t) = 1` when the status at :math:`t` is observed (an event
    of either cause by :math:`t`, or follow-up reaching :math:`t`), :math:`\\hat F_a` the
    g-formula's predicted cumulative incidence, :math:`w` the estimand's treatment weights and
    :math:`v` its target weights (:func:`target_weights`). For the ATE this is the AIPTW,IPCW
    estimator of Ozenne, Scheike, Stærk, Gerds (2020, Biometrical Journal 62:751) in its
    normalised form; for the ATT and ATO the augmented weighting estimator of the weighted
    population (Mao, Li & Greene 2019, Stat Methods Med Res 28:2439; from memory).

    Robustness: consistent when the censoring model is correct and either the propensity model
    or the outcome (and competing-event) hazard models are correct — doubly robust with respect to
    the treatment and outcome models, not to the censoring model (which the AIPTW,AIPCW variant
    would also guard against).
    """
    t = np.asarray(time, dtype=float)
    s = np.asarray(status, dtype=int)
    a = np.asarray(a).astype(int)
    w = np.asarray(w, dtype=float)
    v = np.asarray(v, dtype=float)
    g_event = _inverse(cens["event"])
    risk: dict[int, dict] = {0: {}, 1: {}}
    for j, h in enumerate(horizons):
        y = ((s == OUTCOME) & (t <= h)).astype(float)
        event_by = (s != 0) & (t <= h)
        ipcw = np.where(event_by, g_event, np.where(t >= h, _inverse(cens["horizon"][h]), 0.0))
        for g in (0, 1):
            F = F_h[g][:, j]
            m = a == g
            aug = np.sum((w * ipcw * (y - F))[m]) / w[m].sum()
            risk[g][h] = float(v @ F / v.sum() + aug)
    return risk
