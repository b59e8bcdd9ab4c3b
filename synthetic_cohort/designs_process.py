"""The tone, treatment and hazard process of the "designs" scenario, shared by the generator and
the truths (so the data and the truths come from one process).

Time is measured in days after the index flare (day 0). Period ``k`` is ``[30k, 30k + 30)``; the
visit of period ``k`` is on day ``30k``, where the tone ``L_k`` is recorded and a person not yet on
kestrel starts it (:class:`Natural`: with probability ``p_k``, decided on the previous visit's tone
``L_{k-1}``; the routine value ``L_-1`` of day -30 for the visit on day 0). Once started, kestrel
is taken for good. The crisis and death hazards are constant within a period and follow ``L_k``,
the age then and the treatment taken; the event clock starts on day 1 (nothing happens on day 0).

A *rule* decides, at each visit, who among those not yet started starts; the strategies of the
truths are rules (:class:`Window`, :class:`Dynamic`, :class:`StartAt`, :class:`Never`, ...).
Simulating the same persons under two rules with the same random numbers (``eps`` for the tone
steps, ``u`` for the start decisions) gives the common-random-numbers contrasts of the truths.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from synthetic_cohort import designs_params as D

DAYS_PER_YEAR = 365.25


def expit(x):
    return 1.0 / (1.0 + np.exp(-x))


def start_probability(k: int, tone_prev: np.ndarray, age_k: np.ndarray) -> np.ndarray:
    """P(start at visit k | not started), from the previous visit's tone and the age then."""
    s = D.START
    return expit(s["intercept"] + s["early"] * np.exp(-k / s["early_scale"])
                 + s["tone5"] * (tone_prev - 55.0) / 5.0 + s["age10"] * (age_k - D.AGE_MEAN) / 10.0)


class Natural:
    """Starts as in the data: whoever the start probability picks."""

    def __call__(self, k, tone, go):
        return go


class Never:
    """No start."""

    def __call__(self, k, tone, go):
        return np.zeros(len(go), bool)


class Window:
    """``start_within [a, b]`` as CONTRACTS §5d reads it when estimated: no start before day a;
    at the visits inside ``[a, b]`` starts happen as in the data; whoever has not started by the
    window's last visit (the first day of its last period) starts there."""

    def __init__(self, a: int, b: int):
        self.first, self.last = -(-a // D.PERIOD), b // D.PERIOD
        if self.first > self.last:
            raise ValueError(f"window [{a}, {b}] holds no visit day (multiples of {D.PERIOD})")

    def __call__(self, k, tone, go):
        inside = (k >= self.first) & (k <= self.last)
        return inside & (go | (k == self.last))


class Dynamic:
    """``when: {above: x, within_days: g}``: the trigger is the first visit whose tone is above
    ``x``; no start before it; at the visits in ``[trigger, trigger + g]`` starts happen as in the
    data, the last of them forced; no trigger, no start."""

    def __init__(self, above: float, within_days: int, n: int):
        self.above, self.extra = float(above), within_days // D.PERIOD
        self.trigger = np.full(n, -1, np.int64)

    def __call__(self, k, tone, go):
        self.trigger[(self.trigger < 0) & (tone > self.above)] = k
        last = self.trigger + self.extra
        return (self.trigger >= 0) & (k <= last) & (go | (k == last))


class StartAt:
    """Sequential trials, "start in the first interval": start at visit ``k_start`` (per row)."""

    def __init__(self, k_start: np.ndarray):
        self.k_start = k_start

    def __call__(self, k, tone, go):
        return k == self.k_start


class NaturalAfter:
    """Sequential trials, "do not start in the first interval" (intention to treat): no start up
    to visit ``k_start``, then as in the data."""

    def __init__(self, k_start: np.ndarray):
        self.k_start = k_start

    def __call__(self, k, tone, go):
        return go & (k > self.k_start)


@dataclass
class Run:
    """Per row: tone ``L`` (n, K; NaN before the first simulated period), kestrel taken in each
    period ``on`` (n, K), the start visit ``start`` (K when none; -1 when started before)."""

    L: np.ndarray
    on: np.ndarray
    start: np.ndarray


def simulate(tone_prev: np.ndarray, tone: np.ndarray, age0: np.ndarray, started: np.ndarray,
             eps: np.ndarray, u: np.ndarray, rule, k0=0) -> Run:
    """Tone and treatment from period ``k0`` (a number, or one per row) to the last column of
    ``eps``: ``tone`` is ``L_k0``, ``tone_prev`` is ``L_{k0-1}``; ``age0`` the age at day 0."""
    n, K = eps.shape
    k0 = np.broadcast_to(np.asarray(k0, np.int64), (n,))
    L = np.full((n, K), np.nan)
    on = np.zeros((n, K), bool)
    start = np.where(started, -1, K).astype(np.int64)
    cur, prev, started = tone.astype(float).copy(), tone_prev.astype(float).copy(), started.copy()
    step = D.TONE_STEP
    target = np.array([step["target"]["none"], step["target"]["kestrel"]])
    for k in range(int(k0.min()), K):
        act = k >= k0
        go = u[:, k] < start_probability(k, prev, age0 + D.PERIOD * k / DAYS_PER_YEAR)
        new = act & ~started & rule(k, np.where(act, cur, np.nan), go)
        start[new] = k
        started |= new
        L[act, k] = cur[act]
        on[act, k] = started[act]
        nxt = np.round(cur + step["rate"] * (target[started.astype(int)] - cur)
                       + step["sd"] * eps[:, k], 1)
        prev = np.where(act, cur, prev)
        cur = np.where(act, nxt, cur)
    return Run(L, on, start)


def hazards(par: dict, run: Run, age0: np.ndarray, male: np.ndarray) -> np.ndarray:
    """Daily hazards (n, K) of ``par`` (``designs_params.CRISIS`` or ``DEATH``) along a run
    (zero where the run has no tone)."""
    K = run.L.shape[1]
    age = age0[:, None] + D.PERIOD * np.arange(K)[None, :] / DAYS_PER_YEAR
    log_h = (np.log(par["rate"] / DAYS_PER_YEAR) + par["age10"] * (age - D.AGE_MEAN) / 10.0
             + par["male"] * np.asarray(male, float)[:, None]
             + par["tone10"] * (run.L - 55.0) / 10.0 + np.log(par["hr"]) * run.on)
    return np.nan_to_num(np.exp(log_h), nan=0.0)


def _overlap(K: int, s, e) -> np.ndarray:
    """Days of ``[s, e)`` (per row) inside each period ``[30k, 30k + 30)``."""
    a = D.PERIOD * np.arange(K)[None, :]
    s, e = np.asarray(s, float).reshape(-1, 1), np.asarray(e, float).reshape(-1, 1)
    if np.any(e > D.PERIOD * K):
        raise ValueError(f"a risk window ends after the {K} simulated periods")
    return np.clip(np.minimum(e, a + D.PERIOD) - np.maximum(s, a), 0.0, None)


def risks(h: np.ndarray, hd: np.ndarray, s, e) -> tuple[np.ndarray, np.ndarray]:
    """Per row: the probability of the outcome (hazards ``h``, death ``hd`` competing) and of
    death (all causes) in ``[s, e)``, given alive and event-free at ``s``:

    .. math:: F(s, e) = \\sum_k e^{-H_k} \\frac{h_k}{h_k + d_k}\\left(1 - e^{-(h_k + d_k)\\ell_k}\\right)

    with :math:`\\ell_k` the days of ``[s, e)`` in period k and :math:`H_k` the total hazard over
    the earlier ones (piecewise-constant cause-specific hazards; Kalbfleisch and Prentice, 2002,
    ch. 8)."""
    length = _overlap(h.shape[1], s, e)
    total = h + hd
    expo = total * length
    before = np.cumsum(expo, axis=1) - expo
    with np.errstate(invalid="ignore", divide="ignore"):
        part = np.where(total > 0, h / total, 0.0) * -np.expm1(-expo)
    return (np.exp(-before) * part).sum(axis=1), -np.expm1(-(hd * length).sum(axis=1))


def event_times(rng: np.random.Generator, h: np.ndarray) -> np.ndarray:
    """Event times (days, continuous, from day 1 on) from piecewise-constant hazards ``h`` (n, K),
    the last period's hazard carrying on (inversion of the cumulative hazard)."""
    n, K = h.shape
    length = _overlap(K, np.ones(n), np.full(n, D.PERIOD * K))
    H = np.cumsum(h * length, axis=1)
    e = rng.exponential(1.0, n)
    k = np.minimum((H < e[:, None]).sum(axis=1), K - 1)
    rows = np.arange(n)
    before = np.where(k > 0, H[rows, np.maximum(k - 1, 0)], 0.0)
    begin = np.maximum(D.PERIOD * k, 1.0)
    return begin + (e - before) / h[rows, k]
