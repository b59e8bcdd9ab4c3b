"""Per-protocol effects of one time-to-event outcome (CONTRACTS §5b, §5e).

Follow-up is artificially censored on the day a person deviates from their arm's strategy
(``deviation_day``; on a tie with the end of follow-up the intention-to-treat reason wins: an
outcome on the deviation day counts). Rows carry ``contrast: per_protocol``; the rows' shape,
horizons and day grid are those of :mod:`emulant.estimation.tte`. Methods:

* ``unadjusted``: Aalen–Johansen (Kaplan–Meier) risks of the artificially censored data, no
  weights: the naive per-protocol analysis, biased when deviating depends on prognosis.
* ``ipw``: the same, weighted per period by :math:`W_k` of
  :mod:`emulant.models.treatment_process` (the estimand's baseline weight times the stabilised
  inverse probability of having stayed on protocol), on counting-process intervals
  (:func:`emulant.estimation.survival.aalen_johansen_intervals`).
* ``standardization``: pooled logistic hazards of the outcome (and the competing event) on the
  artificially censored person-periods, weighted by :math:`W_k`, with the arm, the arm by a
  period spline and the baseline covariates; each person's cumulative incidence under each arm
  (:func:`emulant.estimation.pooled_logistic.cumulative_incidence`) averaged over the estimand's
  population (Hernán & Robins, *Causal Inference: What If*, §17.4 and ch. 21; Danaei et al. 2013,
  Stat Methods Med Res 22:70).

Periods follow CONTRACTS §5a: period :math:`k` holds days :math:`kP .. (k+1)P-1`. In the pooled
model a person with an event on day :math:`T` is at risk in periods :math:`0..\\lfloor T/P
\\rfloor`; a censored person in the periods observed to their end, :math:`0..\\lfloor (T+1)/P
\\rfloor - 1`. A period's risk is read at day :math:`(k+1)P` (the last one at ``max_days``).
Hazard ratios are not estimated per protocol (a weighted Cox model with weights varying over
time is not built here).
"""

from __future__ import annotations

import numpy as np

from emulant.estimation.events import COMPETING, OUTCOME, SurvivalError
from emulant.estimation.pooled_logistic import cumulative_incidence
from emulant.estimation.survival import aalen_johansen_intervals, step_at
from emulant.estimation.tte import OutcomeContext, outcome_arrays
from emulant.estimation.tte_weighting import standardized_risks, target_weights
from emulant.models.propensity import PropensityModel
from emulant.models.treatment_process import (
    DEVIATION_DAY,
    AdherenceWeights,
    PersonPeriods,
    adherence_weights,
    period_basis,
    weight_summary,
)

CONTRAST = "per_protocol"


def per_protocol_arrays(cohort, outcome: str) -> tuple[np.ndarray, np.ndarray]:
    """``time`` and ``status`` of one outcome, artificially censored at ``deviation_day``."""
    time, status = outcome_arrays(cohort, outcome)
    if DEVIATION_DAY not in cohort.columns:
        raise SurvivalError(f"cohort: column {DEVIATION_DAY!r} is missing (per-protocol contrast)")
    dev = np.asarray(cohort[DEVIATION_DAY], dtype=float)
    cut = ~np.isnan(dev) & (dev < time)
    return np.where(cut, dev, time), np.where(cut, 0, status)


def _row_of(pp: PersonPeriods, k: np.ndarray, person: np.ndarray) -> np.ndarray:
    """Index of person's period row ``k`` in ``pp`` (the last one when ``k`` is past it)."""
    first = np.flatnonzero(pp.first_row)
    counts = np.diff(np.r_[first, pp.person.size])
    slot = np.full(int(pp.person.max()) + 1 if pp.person.size else 0, -1)
    slot[pp.person[first]] = np.arange(first.size)
    j = slot[person]
    if (j < 0).any():
        raise SurvivalError(f"periods.parquet: cohort row {int(person[j < 0][0])} has no period")
    return first[j] + np.minimum(k, counts[j] - 1)


def intervals(pp: PersonPeriods, time: np.ndarray, status: np.ndarray):
    """Counting-process intervals (days ``start_day .. exit``) of the period rows up to ``time``.

    Returns ``(row, entry, exit, status)``: the period row, ``start_day - 1`` (exclusive),
    the last day in the interval, and the status at its exit (the person's status in the row
    holding ``time``, else 0). A person's last row runs to ``time`` even when it is past the
    rows of ``periods.parquet`` (the last weight is carried on).
    """
    T = time[pp.person]
    keep = pp.start_day <= T
    row = np.flatnonzero(keep)
    person = pp.person[row]
    last = np.r_[person[1:] != person[:-1], True]
    exit_ = np.where(last, T[row], np.minimum(pp.start_day[row] + pp.period_days - 1, T[row]))
    st = np.where(last, status[person], 0)
    return row, pp.start_day[row] - 1.0, exit_, st


def ipw_curves(c: OutcomeContext, pp: PersonPeriods, w_rows: np.ndarray):
    """Weighted Aalen–Johansen risks by arm with weights per period row (freq multiplied in)."""
    row, entry, exit_, st = intervals(pp, c.time, c.status)
    person = pp.person[row]
    w = c.f[person] * w_rows[row]
    days = np.concatenate([c.grid, np.asarray(c.horizons, dtype=float)])
    curves, risk = {}, {}
    for g in (0, 1):
        m = c.a[person] == g
        t, cif, _ = aalen_johansen_intervals(entry[m], exit_[m], st[m], w[m])
        vals = step_at(t, cif, days, 0.0)
        curves[g] = vals[: c.grid.size]
        risk[g] = dict(zip(c.horizons, vals[c.grid.size:], strict=True))
    return curves, risk


def _long(time, status, P: int, K: int):
    """Person-periods of the pooled model: ``(person, k, outcome, competing)`` per row."""
    s = np.asarray(status)
    event_last = np.floor(time / P)
    cens_last = np.floor((time + 1) / P) - 1
    last = np.minimum(np.where(s != 0, event_last, cens_last), K - 1).astype(int)
    n_rows = last + 1
    person = np.repeat(np.arange(s.size), np.maximum(n_rows, 0))
    first = np.repeat(np.cumsum(np.maximum(n_rows, 0)) - np.maximum(n_rows, 0), np.maximum(n_rows, 0))
    k = np.arange(person.size) - first
    final = k == last[person]
    return person, k, final & (s[person] == OUTCOME), final & (s[person] == COMPETING)


def _hazard(Z, y, f, what: str, problems: list[str]):
    model = PropensityModel().fit(Z, y.astype(float), sample_weight=f)
    if not model.converged_:
        problems.append(f"per-protocol {what} hazard model did not converge")
    return model


def _predict(model, B: np.ndarray, X: np.ndarray, g: int) -> np.ndarray:
    """:math:`h_i(k)` for everyone had they been in arm ``g`` (n x K)."""
    q = B.shape[1]
    coef = model.coef_
    time_part = g * coef[0] + B @ coef[1:1 + q] + g * (B @ coef[1 + q:1 + 2 * q])
    eta = model.intercept_ + (X @ coef[1 + 2 * q:])[:, None] + time_part[None, :]
    return 1.0 / (1.0 + np.exp(-np.clip(eta, -700, 700)))


def standardized_incidence(c: OutcomeContext, pp: PersonPeriods, w_rows: np.ndarray,
                           problems: list[str]) -> dict[int, np.ndarray]:
    """Each person's cumulative incidence under each arm at the period ends (n x K)."""
    K = int(c.max_days // c.P) + 1
    person, k, out, comp = _long(c.time, c.status, c.P, K)
    f = c.f[person] * w_rows[_row_of(pp, k, person)]
    use = f > 0
    person, k, out, comp, f = person[use], k[use], out[use], comp[use], f[use]
    Bk = period_basis(np.arange(K), K)
    a = c.a[person].astype(float)
    Z = np.column_stack([a, Bk[k], a[:, None] * Bk[k], c.X[person]])
    models = {"outcome": _hazard(Z, out, f, "outcome", problems)}
    if c.competing and comp.any():
        keep = ~out
        models["competing"] = _hazard(Z[keep], comp[keep], f[keep], "competing-event", problems)
    inc = {}
    for g in (0, 1):
        h = _predict(models["outcome"], Bk, c.X, g)
        hc = _predict(models["competing"], Bk, c.X, g) if "competing" in models else None
        inc[g] = cumulative_incidence(h, hc)
    return inc


def per_protocol_estimates(sample, pp: PersonPeriods, adherence: AdherenceWeights,
                           outcome: str) -> tuple[list[dict], list[dict], list[str]]:
    """Per-protocol rows, curve rows and fit problems of one time-to-event outcome.

    ``adherence`` holds the weights over time fitted with ``sample.freq``
    (:func:`emulant.models.treatment_process.adherence_weights`).
    """
    arrays = per_protocol_arrays(sample.cohort, outcome)
    c = OutcomeContext(sample, outcome, arrays=arrays, contrast=CONTRAST)
    methods = c.protocol.analysis.methods
    rows, curve_rows, problems = [], [], list(adherence.problems)
    curves, risk = c.aj_curves(c.f)
    rows += c.contrast_rows(None, "unadjusted", risk)
    curve_rows += c.curve_rows(None, "unadjusted", curves)
    for est in c.protocol.estimands:
        w_rows = np.asarray(adherence.weights[est], dtype=float)
        if "ipw" in methods:
            curves, risk = ipw_curves(c, pp, w_rows)
            rows += c.contrast_rows(est, "ipw", risk)
            curve_rows += c.curve_rows(est, "ipw", curves)
        if "standardization" in methods:
            w_cond = np.asarray(adherence.conditional[est], dtype=float)
            inc = standardized_incidence(c, pp, w_cond, problems)
            v = target_weights(est, c.a, c.e, c.f)
            curves, risk = standardized_risks(inc, v, c.grid, c.horizons, c.P, c.max_days)
            rows += c.contrast_rows(est, "standardization", risk)
            curve_rows += c.curve_rows(est, "standardization", curves)
    return rows, curve_rows, problems


def sample_adherence(sample, pp: PersonPeriods) -> AdherenceWeights:
    """The weights over time of one sample (point estimate or replicate), refitted with its
    frequency weights, on its baseline weights, with ``analysis.weights`` (stabilise, truncate)."""
    ws = sample.protocol.analysis.weights
    return adherence_weights(pp, sample.a, sample.X, sample.freq, sample.weights,
                             truncate=ws.truncate, stabilize=ws.stabilize)


def adherence_summary(sample, pp: PersonPeriods, adherence: AdherenceWeights):
    """Per estimand, arm and period: persons, on protocol, deviating, and the ``ipw`` weights
    (mean, 1st/99th percentile, max) — the table behind the report's per-protocol section."""
    return weight_summary(pp, sample.a, {1: sample.treated_arm, 0: sample.comparator_arm},
                          adherence.weights)
