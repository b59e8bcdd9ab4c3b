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
With ``analysis.hazard_ratio``, Cox hazard ratios of the artificially censored data: unweighted
(``unadjusted``) and, for ``ipw``, weighted per period on the counting-process intervals
(:func:`ipw_hazard_ratio`); cause-specific with competing events, and with the caution of
:mod:`emulant.estimation.cox` (the hazard ratio averages a ratio that may change over follow-up).
"""

from __future__ import annotations

import numpy as np

from emulant.columns import DEVIATION_DAY, period_weight
from emulant.estimation.cox import cox_fit, monotone_likelihood
from emulant.estimation.events import COMPETING, SurvivalError
from emulant.estimation.pooled_logistic import (
    PooledLogistic,
    days_at_risk,
    gformula_incidence,
    time_basis,
)
from emulant.estimation.survival import aalen_johansen_intervals, step_at
from emulant.estimation.tte import OutcomeContext, _row, outcome_arrays
from emulant.estimation.tte_weighting import standardized_risks, target_weights
from emulant.models.clone_weights import clone_processes
from emulant.models.treatment_process import (
    AdherenceWeights,
    PersonPeriods,
    adherence_weights,
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


def ipw_hazard_ratio(c: OutcomeContext, pp: PersonPeriods, w_rows: np.ndarray, estimand: str):
    """The ``ipw`` hazard ratio row: a Cox model of the arm on the counting-process intervals of
    :func:`intervals` (entry ``start_day - 1``), each weighted by its period's :math:`W_k` and the
    person's frequency (a marginal structural Cox model with weights over time; Hernán, Brumback
    & Robins 2000, Epidemiology 11:561). Competing events are censored: cause-specific."""
    row, entry, exit_, st = intervals(pp, c.time, c.status)
    person = pp.person[row]
    event = (st == 1).astype(int)
    why = monotone_likelihood(c.time, c.status == 1, c.a, c.f)
    log_hr = (float(cox_fit(exit_, event, c.a[person], w_rows[row], c.f[person], entry=entry)[0])
              if not why else float("nan"))
    return _row(c.outcome, estimand, "ipw", "hazard_ratio", None, c.arms[1], c.arms[0],
                np.exp(log_hr), c.f.sum(), float(c.f @ (c.status == 1)),
                note=f"not estimable: {why}" if why else "", contrast=CONTRAST)


def period_weights(pp: PersonPeriods, w_rows: np.ndarray, n: int, K: int) -> np.ndarray:
    """Person :math:`i`'s weight in period :math:`k` (n x K): the weight of their period row
    :math:`k`, the last row's weight carried on past their last row."""
    first = np.flatnonzero(pp.first_row)
    counts = np.diff(np.r_[first, pp.person.size])
    slot = np.full(n, -1)
    slot[pp.person[first]] = np.arange(first.size)
    if (slot < 0).any():
        raise SurvivalError(f"periods.parquet: cohort row {int(np.flatnonzero(slot < 0)[0])} "
                            "has no period")
    last = (counts[slot] - 1)[:, None]
    return w_rows[first[slot][:, None] + np.minimum(np.arange(K)[None, :], last)]


def standardized_incidence(c: OutcomeContext, pp: PersonPeriods, w_rows: np.ndarray,
                           problems: list[str], starts: dict | None = None,
                           fitted: dict | None = None, key: str = "") -> dict[int, np.ndarray]:
    """Each person's cumulative incidence under each arm on the grid, then at the horizons.

    The daily hazards of :class:`emulant.estimation.pooled_logistic.PooledLogistic` (arm, a
    period spline and its interaction with the arm, the baseline covariates), each day of
    period :math:`k` weighted by the person's :math:`W_k` times their frequency; then
    :func:`emulant.estimation.pooled_logistic.gformula_incidence`. Each model's Newton's method
    starts from ``starts[key + name]`` when given (a replicate starts from the point estimate's
    coefficients) and records its coefficients in ``fitted[key + name]``. A fit that does not
    converge (separation: e.g. no event among the persons of a covariate level still on
    protocol) is refitted with a light ridge penalty (lambda = 1 on the scaled arm and covariate
    coefficients, as the propensity and treatment-process models do); only a refit that does
    not converge either is a problem.
    """
    K = max(1, -(-int(c.max_days) // c.P))
    W = c.f[:, None] * period_weights(pp, w_rows, c.a.size, K)
    t = np.minimum(c.time, c.max_days)
    kinds = ["outcome"] + (["competing"] if c.competing and np.any(c.status == COMPETING) else [])
    models = {}
    for name in kinds:
        days, event = days_at_risk(t, c.status, name)
        start = (starts or {}).get(key + name)
        models[name] = PooledLogistic().fit(time_basis(K), c.X, c.a, days, event, W, c.P, start=start)
        if not models[name].converged_:  # separation (e.g. no event in a covariate level)
            models[name] = PooledLogistic(penalty=1.0).fit(time_basis(K), c.X, c.a, days, event,
                                                           W, c.P)
        if fitted is not None:
            fitted[key + name] = models[name].coef_
        if not models[name].converged_:
            problems.append(f"per-protocol {name} hazard model did not converge")
    return gformula_incidence(models, c.X, np.concatenate([c.grid, np.asarray(c.horizons, float)]))


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
    hazard_ratio = c.protocol.analysis.hazard_ratio
    if hazard_ratio:
        rows.append(c.hazard_ratio_row(None, "unadjusted", None))
    for est in c.protocol.estimands:
        w_rows = np.asarray(adherence.weights.get(est, ()), dtype=float)  # empty without ipw, standardization
        if "ipw" in methods:
            curves, risk = ipw_curves(c, pp, w_rows)
            rows += c.contrast_rows(est, "ipw", risk)
            curve_rows += c.curve_rows(est, "ipw", curves)
            if hazard_ratio:
                rows.append(ipw_hazard_ratio(c, pp, w_rows, est))
        if "standardization" in methods:
            w_cond = np.asarray(adherence.conditional[est], dtype=float)
            inc = standardized_incidence(c, pp, w_cond, problems, sample.starts.get(outcome),
                                         sample.fitted.setdefault(outcome, {}),
                                         f"{CONTRAST}_{est}_")
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


WEIGHTED_METHODS = {"ipw": "weights", "standardization": "conditional"}  # AdherenceWeights field


def weighted_periods(periods, pp: PersonPeriods, adherence: AdherenceWeights, methods):
    """``periods.parquet``: the person-periods (sorted by the cohort's person order and period)
    with ``weight_<method>_<ESTIMAND>``, the weights over time each of ``methods`` used
    (``ipw``: stabilised by the period alone; ``standardization``: by period and baseline
    covariates), frequency not multiplied in."""
    out = periods.iloc[pp.source_row].reset_index(drop=True)
    for method, field in WEIGHTED_METHODS.items():
        if method in methods:
            for est, w in getattr(adherence, field).items():
                out[period_weight(method, est)] = np.asarray(w, dtype=float)
    return out


def adherence_summary(sample, pp: PersonPeriods, adherence: AdherenceWeights):
    """Per estimand, arm and period: persons, on protocol, deviating, and the ``ipw`` weights
    (mean, 1st/99th percentile, max) — the table behind the report's per-protocol section."""
    return weight_summary(pp, sample.a, {1: sample.treated_arm, 0: sample.comparator_arm},
                          adherence.weights)
