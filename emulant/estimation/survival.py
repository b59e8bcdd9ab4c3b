"""Weighted risk curves: Kaplan–Meier, Aalen–Johansen, censoring survival, rates, at-risk counts.

Every function takes plain arrays (``time`` in days, an event or status code, a non-negative
``weight``: frequency weights, possibly multiplied by inverse probability weights) and works by
one sort and cumulative sums, :math:`O(n \\log n)`, with no Python loop over persons. Rows with
weight 0 are ignored. Hazard ratios live in :mod:`emulant.estimation.cox`; the estimates of one outcome
(rows of ``estimates.csv`` and ``curves.csv``) in :mod:`emulant.estimation.tte`.
"""

from __future__ import annotations

import numpy as np

from emulant.estimation.events import (  # noqa: F401 - the status codes belong to this interface
    CENSORED,
    COMPETING,
    DAYS_PER_YEAR,
    OUTCOME,
    SurvivalError,
    check_status,
    check_times,
)


def _tables(t: np.ndarray, w: np.ndarray, s: np.ndarray):
    """Distinct times with positive weight, the weighted number at risk and events by status."""
    keep = w > 0
    t, w, s = t[keep], w[keep], s[keep]
    times, inv = np.unique(t, return_inverse=True)
    m = times.size
    leaving = np.bincount(inv, weights=w, minlength=m)
    at_risk = np.cumsum(leaving[::-1])[::-1]
    d1 = np.bincount(inv, weights=w * (s == OUTCOME), minlength=m)
    d2 = np.bincount(inv, weights=w * (s == COMPETING), minlength=m)
    return times, at_risk, d1, d2


def km(time, event, weight=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Weighted Kaplan–Meier estimate of the survival function.

    .. math::

        \\hat S(t) = \\prod_{s \\le t} \\Bigl(1 - \\frac{d_s}{n_s}\\Bigr), \\qquad
        d_s = \\sum_i w_i\\, \\delta_i [T_i = s], \\quad n_s = \\sum_i w_i [T_i \\ge s]

    (Kaplan & Meier 1958, J Am Stat Assoc 53:457). A censoring tied with an event is at risk at
    that time (censoring just after events), as is common practice.

    Parameters
    ----------
    time : array of float, days (>= 0)
    event : array of 0/1 (1 = event)
    weight : array of float >= 0, optional (frequency or inverse probability weights)

    Returns
    -------
    times : distinct observed times (weight > 0), ascending
    surv : :math:`\\hat S` at each of ``times`` (right-continuous)
    at_risk : :math:`n_s`, the weighted number at risk just before each of ``times``
    """
    t, w = check_times(time, weight)
    s = check_status(event, t.size, (0, 1))
    times, n, d1, _ = _tables(t, w, s)
    surv = np.cumprod(1.0 - np.divide(d1, n, out=np.zeros_like(d1), where=n > 0))
    return times, surv, n


def aalen_johansen(time, status, weight=None, cause: int = OUTCOME):
    """Weighted Aalen–Johansen cumulative incidence of one cause with one competing event.

    .. math::

        \\hat F_1(t) = \\sum_{s \\le t} \\hat S(s^-)\\, \\frac{d_{1s}}{n_s}, \\qquad
        \\hat S(t) = \\prod_{s \\le t} \\Bigl(1 - \\frac{d_{1s} + d_{2s}}{n_s}\\Bigr)

    with :math:`\\hat S` the all-cause Kaplan–Meier estimate (Aalen & Johansen 1978, Scand J Stat
    5:141; Putter, Fiocco & Geskus 2007, Stat Med 26:2389). Without competing events
    :math:`\\hat F_1 = 1 - \\hat S`.

    Parameters
    ----------
    time : array of float, days (>= 0)
    status : array of int: 0 censored, 1 outcome, 2 competing event
    weight : array of float >= 0, optional
    cause : 1 (the outcome, default) or 2 (the competing event)

    Returns
    -------
    times, cif, at_risk : as :func:`km`, with the cumulative incidence of ``cause``
    """
    t, w = check_times(time, weight)
    s = check_status(status, t.size)
    times, n, d1, d2 = _tables(t, w, s)
    d = d1 if cause == OUTCOME else d2
    frac = np.divide(d1 + d2, n, out=np.zeros_like(d1), where=n > 0)
    surv = np.cumprod(1.0 - frac)
    surv_before = np.concatenate(([1.0], surv[:-1]))
    cif = np.cumsum(surv_before * np.divide(d, n, out=np.zeros_like(d), where=n > 0))
    return times, cif, n


def aalen_johansen_intervals(entry, exit, status, weight, cause: int = OUTCOME):
    """Weighted Aalen–Johansen cumulative incidence on counting-process data.

    Each row is an interval :math:`(\text{entry}, \text{exit}]` of one person with a weight of
    its own (a weight that changes over time: one row per period) and ``status`` at ``exit``
    (0 when the interval ends without an event). At an event time :math:`s`,

    .. math::

        n_s = \\sum_r w_r [\text{entry}_r < s \\le \text{exit}_r], \\qquad
        d_{cs} = \\sum_r w_r [\text{exit}_r = s, \text{status}_r = c],

    and :math:`\\hat F` is :func:`aalen_johansen`'s formula with these sums (Andersen, Borgan,
    Gill & Keiding 1993, Statistical Models Based on Counting Processes, §IV.4; weights varying
    over time as in Robins & Finkelstein 2000, Biometrics 56:779). With one row per person and
    entry below 0 it equals :func:`aalen_johansen`.

    Returns
    -------
    times, cif, at_risk : at the distinct exit times with an event (at_risk: :math:`n_s`)
    """
    t, w = check_times(exit, weight, "exit")
    e = np.asarray(entry, dtype=float)
    if e.shape != t.shape or (e >= t).any():
        raise SurvivalError("entry: expected one value per row, below the row's exit")
    s = check_status(status, t.size)
    keep = w > 0
    t, e, w, s = t[keep], e[keep], w[keep], s[keep]
    ev = s != CENSORED
    times = np.unique(t[ev])
    inv = np.searchsorted(times, t[ev])
    d1 = np.bincount(inv, weights=w[ev] * (s[ev] == OUTCOME), minlength=times.size)
    d2 = np.bincount(inv, weights=w[ev] * (s[ev] == COMPETING), minlength=times.size)
    oe, ot = np.argsort(e, kind="stable"), np.argsort(t, kind="stable")
    ce = np.concatenate([[0.0], np.cumsum(w[oe])])
    ct = np.concatenate([[0.0], np.cumsum(w[ot])])
    entered = ce[np.searchsorted(e[oe], times, side="left")]  # entry < s
    left = ct[np.searchsorted(t[ot], times, side="left")]  # exit < s
    n = entered - left
    d = d1 if cause == OUTCOME else d2
    frac = np.divide(d1 + d2, n, out=np.zeros_like(d1), where=n > 0)
    surv_before = np.concatenate(([1.0], np.cumprod(1.0 - frac)[:-1]))
    cif = np.cumsum(surv_before * np.divide(d, n, out=np.zeros_like(d), where=n > 0))
    return times, cif, n


def censoring_survival(time, status, weight=None) -> tuple[np.ndarray, np.ndarray]:
    """Kaplan–Meier estimate of the censoring distribution, :math:`G(t) = P(C > t)`.

    Censoring (status 0) is the event; at a tie, events of any cause come first and leave the
    risk set, so that :math:`\\hat S(t^-)\\hat G(t^-) = n_t / n` and inverse probability of
    censoring weighting with :math:`\\hat G(T_i^-)` reproduces the Kaplan–Meier and
    Aalen–Johansen estimates exactly (Satten & Datta 2001, Am Stat 55:207).

    Returns
    -------
    times : distinct observed times, ascending
    g : :math:`\\hat G` at each time (right-continuous); use :func:`step_before` for
        :math:`\\hat G(t^-)`
    """
    t, w = check_times(time, weight)
    s = check_status(status, t.size)
    times, n, d1, d2 = _tables(t, w, s)
    cens = (w > 0) & (s == CENSORED)
    c = np.bincount(np.searchsorted(times, t[cens]), weights=w[cens], minlength=times.size)
    r = n - d1 - d2  # at risk of censoring at s: events at s have left
    g = np.cumprod(1.0 - np.divide(c, r, out=np.zeros_like(c), where=r > 0))
    return times, g


def step_at(times, values, days, before: float = 0.0) -> np.ndarray:
    """A right-continuous step function (``values`` from each of ``times`` on) at ``days``.

    ``before`` is its value before the first time (0 for a risk, 1 for a survival).
    """
    times = np.asarray(times, dtype=float)
    values = np.asarray(values, dtype=float)
    idx = np.searchsorted(times, np.asarray(days, dtype=float), side="right") - 1
    return np.where(idx >= 0, values[np.clip(idx, 0, None)], before) if times.size else \
        np.full(np.shape(days), before, dtype=float)


def step_before(times, values, days, before: float = 1.0) -> np.ndarray:
    """The left limit :math:`f(t^-)` of a right-continuous step function at ``days``."""
    times = np.asarray(times, dtype=float)
    values = np.asarray(values, dtype=float)
    idx = np.searchsorted(times, np.asarray(days, dtype=float), side="left") - 1
    return np.where(idx >= 0, values[np.clip(idx, 0, None)], before) if times.size else \
        np.full(np.shape(days), before, dtype=float)


def number_at_risk(time, weight, days) -> np.ndarray:
    """:math:`\\sum_i w_i [T_i \\ge d]` at each of ``days`` (with frequency weights: a count)."""
    t, w = check_times(time, weight)
    order = np.argsort(t, kind="stable")
    ts, tail = t[order], np.cumsum(w[order][::-1])[::-1]
    idx = np.searchsorted(ts, np.asarray(days, dtype=float), side="left")
    return np.where(idx < ts.size, tail[np.clip(idx, 0, max(ts.size - 1, 0))], 0.0)


def events_by(time, status, weight, day: float) -> float:
    """Weighted number of outcome events (status 1) on or before ``day``."""
    t, w = check_times(time, weight)
    s = check_status(status, t.size)
    return float(np.sum(w * ((s == OUTCOME) & (t <= day))))


def crude_rate(time, status, weight=None) -> dict:
    """Events, person-time and the crude rate per 1,000 person-years.

    .. math::

        \\text{rate} = 1000 \\cdot \\frac{\\sum_i w_i \\delta_i}
        {\\sum_i w_i T_i / 365.25}

    (common practice, no single source). Person-time runs from day 0 to ``end_day``.

    Returns
    -------
    dict with ``events``, ``n`` (weighted counts), ``person_years`` and ``rate`` (NaN without
    person-time)
    """
    t, w = check_times(time, weight)
    s = check_status(status, t.size)
    events = float(np.sum(w * (s == OUTCOME)))
    py = float(np.sum(w * t)) / DAYS_PER_YEAR
    return {"events": events, "n": float(w.sum()), "person_years": py,
            "rate": 1000.0 * events / py if py > 0 else float("nan")}


def day_grid(max_days: int, period_days: int) -> np.ndarray:
    """The fixed grid of curve days: 0, P, 2P, … and ``max_days`` (so replicates line up)."""
    if period_days <= 0:
        raise SurvivalError(f"analysis.period_days: {period_days}; expected a positive integer")
    grid = np.arange(0, max_days + 1, period_days, dtype=float)
    if grid[-1] != max_days:
        grid = np.append(grid, float(max_days))
    return grid
