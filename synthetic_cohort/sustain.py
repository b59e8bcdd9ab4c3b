"""Staying on a strategy in the invented registry: the tone marker, deviations, the primary hazard.

Time after day 0 is cut into periods ``[30k, 30k + 30)`` (continuous time, days). Per person, in
a loop over periods (vectorised over persons, never over persons):

- the true tone ``L_k`` at the start of period ``k``: ``L_0 ~ N(50, 6^2)`` (independent of every
  baseline covariate, so it confounds nothing at time zero), then
  ``L_{k+1} = L_k + rate * (target(taken_k) - L_k)``;
- on day ``30k`` (``k >= 1``) the tone is recorded, ``R_k = round(L_k + N(0, 1.5^2), 1)``; a person
  still on their strategy then switches with probability ``expit(a_sw + b_sw (R_k - 50)/5)`` or
  stops with ``expit(a_st + b_st (R_k - 50)/5)`` (stopping only once ``30k >= s_1 + gap``); from
  period ``k`` on they take the other class (switch) or nothing (stop);
- the primary outcome's hazard in period ``k`` is the baseline hazard times
  ``exp(b_L (L_k - 50)/10)`` times the direct hazard ratio of the class taken (weaker in men).

The deviation day is ``30k`` in both cases; :func:`dispensings` writes the refills so that the
§5b reading (gap ``SUSTAIN_GAP``) finds exactly that day. Under the strategy "stay on the assigned
class throughout" nobody switches or stops, the tone path is deterministic, and the risk with
death competing (constant hazard) has the closed form of piecewise-constant hazards
(:func:`cumulative_incidence`), so the per-protocol truth carries no Monte-Carlo noise; the
intention-to-treat truth averages that closed form over simulated deviation paths.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from synthetic_cohort import params as P

OWN, NONE_TAKEN, OTHER = 0, 1, 2
STOPPED, SWITCHED = 0, 1


def _expit(x):
    return 1.0 / (1.0 + np.exp(-x))


@dataclass
class Paths:
    """Per person: tone ``L`` (n, K), recorded tone ``R`` (NaN at k = 0), what was taken in each
    period (``taken``: OWN, NONE_TAKEN, OTHER), the deviation period (K when none) and kind."""

    L: np.ndarray
    R: np.ndarray
    taken: np.ndarray
    k_dev: np.ndarray
    kind: np.ndarray


def simulate(rng: np.random.Generator, L0: np.ndarray, arm: np.ndarray, supply: np.ndarray,
             adhere: bool = False) -> Paths:
    """Tone and treatment paths; ``adhere``: everyone stays on the assigned class throughout."""
    n, K, T = len(L0), P.N_PERIODS, P.TONE
    target = np.array([[T["target"]["kestrel"], T["target"]["none"], T["target"]["plover"]],
                       [T["target"]["plover"], T["target"]["none"], T["target"]["kestrel"]]])
    L = np.empty((n, K))
    R = np.full((n, K), np.nan)
    taken = np.zeros((n, K), np.int8)
    k_dev = np.full(n, K, np.int64)
    kind = np.full(n, -1, np.int64)
    cur = np.zeros(n, np.int8)
    L[:, 0] = L0
    for k in range(1, K):
        L[:, k] = L[:, k - 1] + T["rate"] * (target[arm, cur] - L[:, k - 1])
        R[:, k] = np.round(L[:, k] + T["noise"] * rng.standard_normal(n), 1)
        u = rng.random(n)
        if not adhere:
            z = (R[:, k] - 50.0) / 5.0
            p_sw = _expit(P.SWITCH["intercept"] + P.SWITCH["tone5"] * z)
            p_st = _expit(P.STOP["intercept"] + P.STOP["tone5"] * z)
            p_st = np.where(P.PERIOD_DAYS * k >= supply + P.SUSTAIN_GAP, p_st, 0.0)
            on = cur == OWN
            sw = on & (u < p_sw)
            st = on & ~sw & (u < p_sw + p_st)
            cur[sw], cur[st] = OTHER, NONE_TAKEN
            k_dev[sw | st] = k
            kind[sw], kind[st] = SWITCHED, STOPPED
        taken[:, k] = cur
    return Paths(L, R, taken, k_dev, kind)


def _taken_log_hr(taken: dict) -> np.ndarray:
    """Log direct hazard ratio by (arm, own/none/other class)."""
    return np.log(np.array([[taken["kestrel"], taken["none"], taken["plover"]],
                            [taken["plover"], taken["none"], taken["kestrel"]]]))


def log_hazards(base_log_h: np.ndarray, arm: np.ndarray, male: np.ndarray,
                paths: Paths) -> np.ndarray:
    """Daily log hazard of the primary outcome per person and period (n, K); the class taken
    acts directly with women's (``PRIMARY_TAKEN``) or men's (``PRIMARY_TAKEN_MALE``) ratio."""
    hr_f, hr_m = _taken_log_hr(P.PRIMARY_TAKEN), _taken_log_hr(P.PRIMARY_TAKEN_MALE)
    a, taken = arm[:, None], paths.taken
    direct = np.where(np.asarray(male)[:, None] == 1, hr_m[a, taken], hr_f[a, taken])
    return base_log_h[:, None] + P.PRIMARY_TONE10 * (paths.L - 50.0) / 10.0 + direct


def draw_times(rng: np.random.Generator, h: np.ndarray) -> np.ndarray:
    """Event times (days, continuous) from piecewise-constant daily hazards ``h`` (n, K), the
    last period's hazard carrying on after the last period (inversion of the cumulative hazard)."""
    n, K = h.shape
    H = np.cumsum(h * P.PERIOD_DAYS, axis=1)
    e = rng.exponential(1.0, n)
    k = np.minimum((H < e[:, None]).sum(axis=1), K - 1)
    rows = np.arange(n)
    before = np.where(k > 0, H[rows, np.maximum(k - 1, 0)], 0.0)
    return P.PERIOD_DAYS * k + (e - before) / h[rows, k]


def cumulative_incidence(h: np.ndarray, h_death: np.ndarray, horizons) -> np.ndarray:
    """Risk of the outcome by each horizon with death competing: piecewise-constant outcome
    hazards ``h`` (n, K) and a constant death hazard ``h_death`` (n,); returns (len(horizons), n).

    .. math:: F(t) = \\sum_k S(a_k) \\frac{h_k}{h_k + h_d}
              \\left(1 - e^{-(h_k + h_d)\\,\\ell_k(t)}\\right),\\qquad
              \\ell_k(t) = \\min(30, t - a_k)^+

    with :math:`a_k = 30k` and :math:`S(a_k)` the probability of no event by :math:`a_k`
    (Kalbfleisch and Prentice, 2002, ch. 8, for constant hazards within each period).
    """
    n, K = h.shape
    a = P.PERIOD_DAYS * np.arange(K)
    total = h + h_death[:, None]
    H_before = np.concatenate([np.zeros((n, 1)), np.cumsum(total * P.PERIOD_DAYS, axis=1)[:, :-1]], axis=1)
    out = []
    for t in horizons:
        length = np.clip(float(t) - a, 0.0, P.PERIOD_DAYS)
        if t > a[-1] + P.PERIOD_DAYS:
            raise ValueError(f"horizon {t} is beyond the {K} simulated periods")
        out.append((np.exp(-H_before) * h / total * -np.expm1(-total * length)).sum(axis=1))
    return np.stack(out)


def dispensings(rng: np.random.Generator, supply: np.ndarray, paths: Paths,
                last_day: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Refills of the own class after day 0 and the switch dispensing, as (person index, day,
    supply, own: bool). ``last_day``: the last day a record can carry (coverage, death).

    Refill ``j`` covers days ``j*s .. j*s + s - 1`` and is dispensed on ``j*s - e``, ``e`` in
    0..5 (early refills carry over, so coverage is unchanged). A person who stops at ``30k``
    gets refills covering through ``c = 30k - gap - 1`` exactly (the last one part-supply), so
    the §5b stop day is ``c + gap + 1 = 30k``; a person who switches at ``30k`` gets the refills
    starting before ``30k`` and the other class on day ``30k``.
    """
    K = P.N_PERIODS
    dev_day = P.PERIOD_DAYS * paths.k_dev
    stopped = paths.kind == STOPPED
    end_cover = np.where(stopped, dev_day - P.SUSTAIN_GAP - 1, P.PERIOD_DAYS * K)
    start_limit = np.where(paths.kind == SWITCHED, dev_day - 1, end_cover)
    n_refill = np.maximum(0, (start_limit - supply) // supply + 1)  # starts j*s <= start_limit, j >= 1
    rep = np.repeat(np.arange(len(supply)), n_refill)
    j = np.arange(len(rep)) - np.repeat(np.cumsum(n_refill) - n_refill, n_refill) + 1
    start = j * supply[rep]
    s = np.minimum(supply[rep], end_cover[rep] - start + 1)
    day = start - rng.integers(0, 6, len(rep))
    ok = day <= last_day[rep]
    sw = np.flatnonzero((paths.kind == SWITCHED) & (dev_day <= last_day))
    person = np.concatenate([rep[ok], sw])
    return (person, np.concatenate([day[ok], dev_day[sw]]),
            np.concatenate([s[ok], np.full(len(sw), 30)]),
            np.concatenate([np.ones(ok.sum(), bool), np.zeros(len(sw), bool)]))
