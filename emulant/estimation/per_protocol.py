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
* ``standardization``: pooled logistic daily hazards of the outcome (and the competing event),
  constant within a period, on the artificially censored person-periods (each a binomial of its
  days at risk), weighted by :math:`W_k`, with the arm, the arm by a period spline and the
  baseline covariates; each person's cumulative incidence under each arm
  (:func:`emulant.estimation.pooled_logistic.incidence_at`) averaged over the estimand's
  population (Hernán & Robins, *Causal Inference: What If*, §17.4 and ch. 21; Danaei et al. 2013,
  Stat Methods Med Res 22:70).

The weights follow the periods of CONTRACTS §5a (period :math:`k` holds days
:math:`kP .. (k+1)P-1`); the daily hazard model counts days as
:mod:`emulant.estimation.pooled_logistic` does (days :math:`kP+1 .. (k+1)P`), each day-period
taking the weight of the §5a period of its first day.
Hazard ratios are not estimated per protocol (a weighted Cox model with weights varying over
time is not built here).
"""

from __future__ import annotations

import warnings

import numpy as np

from emulant.columns import DEVIATION_DAY
from emulant.estimation.events import COMPETING, SurvivalError
from emulant.estimation.pooled_logistic import days_at_risk, incidence_at
from emulant.estimation.survival import aalen_johansen_intervals, step_at
from emulant.estimation.tte import OutcomeContext, outcome_arrays
from emulant.estimation.tte_weighting import standardized_risks, target_weights
from emulant.models.clone_weights import clone_processes
from emulant.models.propensity import PropensityModel, PropensityWarning
from emulant.models.treatment_process import (
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


def _long(days, event, P: int, K: int):
    """Person-periods of a daily hazard model: ``(person, k, at_risk_days, event)`` per row.

    A person at risk on days :math:`1..d` is at risk :math:`\\min(P, d - kP)` days of period
    :math:`k` (days :math:`kP+1 .. (k+1)P`, the convention of
    :mod:`emulant.estimation.pooled_logistic`); the event falls on day :math:`d`.
    """
    d = np.minimum(np.asarray(days, dtype=float), K * P)
    n_rows = np.ceil(d / P).astype(int)
    person = np.repeat(np.arange(d.size), n_rows)
    k = np.arange(person.size) - np.repeat(np.cumsum(n_rows) - n_rows, n_rows)
    m = np.clip(d[person] - k * P, 0, P)
    ev = np.asarray(event, dtype=bool)[person] & (k == n_rows[person] - 1)
    return person, k, m, ev


def _hazard(Z, y, f, what: str, problems: list[str]):
    with warnings.catch_warnings():  # separation: the ridge refit of PropensityModel handles it
        warnings.simplefilter("ignore", PropensityWarning)
        model = PropensityModel().fit(Z, y.astype(float), sample_weight=f)
    if not model.converged_:
        problems.append(f"per-protocol {what} hazard model did not converge")
    return model


def _daily_model(c: OutcomeContext, pp: PersonPeriods, w_rows, name: str, K: int, Bk,
                 problems: list[str]):
    """A weighted pooled logistic model of the daily hazard: each person-period is a binomial
    of its days at risk, written as two weighted Bernoulli rows (event days, other days)."""
    days, event = days_at_risk(np.minimum(c.time, c.max_days), c.status, name)
    person, k, m, ev = _long(days, event, c.P, K)
    w = c.f[person] * w_rows[_row_of(pp, np.minimum(k, pp.n_periods - 1), person)]
    a = c.a[person].astype(float)
    Z = np.column_stack([a, Bk[k], a[:, None] * Bk[k], c.X[person]])
    y = np.r_[np.ones(int(ev.sum())), np.zeros(person.size)]
    f = np.r_[w[ev], w * (m - ev)]
    keep = f > 0
    return _hazard(np.vstack([Z[ev], Z])[keep], y[keep], f[keep], name, problems)


def _predict(model, B: np.ndarray, X: np.ndarray, g: int) -> np.ndarray:
    """Daily :math:`h_i(k)` for everyone had they been in arm ``g`` (n x K)."""
    q = B.shape[1]
    coef = model.coef_
    time_part = g * coef[0] + B @ coef[1:1 + q] + g * (B @ coef[1 + q:1 + 2 * q])
    eta = model.intercept_ + (X @ coef[1 + 2 * q:])[:, None] + time_part[None, :]
    return 1.0 / (1.0 + np.exp(-np.clip(eta, -700, 700)))


def standardized_incidence(c: OutcomeContext, pp: PersonPeriods, w_rows: np.ndarray,
                           problems: list[str]) -> dict[int, np.ndarray]:
    """Each person's cumulative incidence under each arm on the grid, then at the horizons.

    Daily hazards constant within each period (:func:`emulant.estimation.pooled_logistic.
    incidence_at`); a day-period's weight is that of the person's period of CONTRACTS §5a
    holding its first day.
    """
    K = max(1, -(-int(c.max_days) // c.P))
    Bk = period_basis(np.arange(K), K)
    models = {"outcome": _daily_model(c, pp, w_rows, "outcome", K, Bk, problems)}
    if c.competing and np.any(c.status == COMPETING):
        models["competing"] = _daily_model(c, pp, w_rows, "competing", K, Bk, problems)
    days = np.concatenate([c.grid, np.asarray(c.horizons, dtype=float)])
    inc = {}
    for g in (0, 1):
        h = _predict(models["outcome"], Bk, c.X, g)
        hc = _predict(models["competing"], Bk, c.X, g) if "competing" in models else None
        inc[g] = incidence_at(h, hc, days, c.P)
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
        w_rows = np.asarray(adherence.weights.get(est, ()), dtype=float)  # empty without ipw, standardization
        if "ipw" in methods:
            curves, risk = ipw_curves(c, pp, w_rows)
            rows += c.contrast_rows(est, "ipw", risk)
            curve_rows += c.curve_rows(est, "ipw", curves)
        if "standardization" in methods:
            w_cond = np.asarray(adherence.conditional[est], dtype=float)
            inc = standardized_incidence(c, pp, w_cond, problems)
            v = target_weights(est, c.a, c.e, c.f)
            curves, risk = standardized_risks(inc, v, c.grid.size, c.horizons)
            rows += c.contrast_rows(est, "standardization", risk)
            curve_rows += c.curve_rows(est, "standardization", curves)
    return rows, curve_rows, problems


def sample_adherence(sample, pp: PersonPeriods) -> AdherenceWeights:
    """The weights over time of one sample (point estimate or replicate), refitted with its
    frequency weights, on its baseline weights, with ``analysis.weights`` (stabilise, truncate);
    the clone design's processes from :func:`emulant.models.clone_weights.clone_processes`."""
    ws = sample.protocol.analysis.weights
    process = stay = carry = None
    if sample.protocol.strategies.design == "clone":  # starting, its window's last period, sustaining
        process, stay, carry = clone_processes(pp, sample.cohort, sample.protocol)
    return adherence_weights(pp, sample.a, sample.X, sample.freq, sample.weights,
                             truncate=ws.truncate, stabilize=ws.stabilize, process=process,
                             stay=stay, carry=carry)


def adherence_summary(sample, pp: PersonPeriods, adherence: AdherenceWeights):
    """Per estimand, arm and period: persons, on protocol, deviating, and the ``ipw`` weights
    (mean, 1st/99th percentile, max) — the table behind the report's per-protocol section."""
    return weight_summary(pp, sample.a, {1: sample.treated_arm, 0: sample.comparator_arm},
                          adherence.weights)
