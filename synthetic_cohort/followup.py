"""Step 3 of the generator: everything after each person's index date.

Event times are drawn from constant hazards (:mod:`synthetic_cohort.truth`) that depend on the
covariates as the protocol measures them and on the arm: the outcome, the negative control,
death, the end of coverage. An event is recorded on day ``ceil(T)`` (so day >= 1) when it comes
before death and within the coverage period holding day 0; deaths are recorded whatever the
coverage. Censoring (coverage end, administrative end) depends on measured covariates and the
arm only, so it is independent of the potential outcomes given them.
"""

from __future__ import annotations

import numpy as np

from synthetic_cohort import params as P
from synthetic_cohort import sustain
from synthetic_cohort.baseline import (
    CODE,
    INPATIENT,
    OUTPATIENT,
    Baseline,
    arm_codes,
    logistic,
    uniform_days,
)
from synthetic_cohort.records import NONE
from synthetic_cohort.truth import DAYS_PER_YEAR, log_rate, marker_mean, marker_measured_logit


def _draw(rng, log_h: np.ndarray) -> np.ndarray:
    return rng.exponential(1.0, len(log_h)) / np.exp(log_h)


def follow(rng: np.random.Generator, b: Baseline, followed: np.ndarray, t0: np.ndarray,
           arm: np.ndarray, x: dict[str, np.ndarray]) -> None:
    """Add follow-up rows, coverage ends and deaths to ``b`` in place.

    ``followed`` marks the persons with an index dispensing to follow, ``t0`` and ``arm`` their
    index day and arm, ``x`` their measured covariates (arrays over all persons).
    """
    n = len(b.t0p)
    idx = np.flatnonzero(followed)
    m, day0, a = len(idx), t0[idx], arm[idx]
    xs = {k: v[idx] for k, v in x.items()}
    supply = b.days_supply[idx]
    b.tone0[idx] = rng.normal(P.TONE["mean0"], P.TONE["sd0"], m)
    paths = sustain.simulate(rng, b.tone0[idx], a, supply)
    t_out = sustain.draw_times(rng, np.exp(sustain.log_hazards(log_rate(P.PRIMARY, xs, a), a, xs["male"], paths)))
    t_nc = _draw(rng, log_rate(P.NEGATIVE_CONTROL, xs, a))
    t_death = _draw(rng, log_rate(P.DEATH, xs, a))
    t_cov = _draw(rng, log_rate(P.COVERAGE_END, xs, a))
    last = P.DATA_END - day0  # the last day of the extract, relative to day 0
    cend = np.minimum(np.floor(t_cov).astype(np.int64), last)  # >= 0: covers day 0
    open_ = b.cov.parts[0]["end_date"]
    open_[idx] = day0 + cend
    resume = (rng.random(m) < P.COVERAGE_RESUME_PROB)
    start = day0 + cend + 1 + uniform_days(rng, 1, 200, m)  # a gap of at least one day
    r = resume & (start <= P.DATA_END)
    b.cov.add(idx[r], start[r], end_date=P.DATA_END)
    d_death = np.ceil(t_death).astype(np.int64)
    dead = d_death <= last
    b.death[idx[dead]] = day0[dead] + d_death[dead]

    def allowed(day):
        """Recorded: before death (continuous time) and inside the first coverage period."""
        return (day <= cend) & (day < t_death)

    d_out = np.ceil(t_out).astype(np.int64)
    ok = (t_out < t_death) & (d_out <= cend)  # dated on or before the day of death
    hf = CODE[P.HF_CODES[0]] + rng.integers(0, len(P.HF_CODES), m)
    b.diag.add(idx[ok], day0[ok] + d_out[ok], code=hf[ok], setting=INPATIENT)
    later = d_out + uniform_days(rng, 14, 60, m)
    ok2 = ok & allowed(later)
    b.diag.add(idx[ok2], day0[ok2] + later[ok2], code=hf[ok2], setting=OUTPATIENT)
    d_opd = np.ceil(rng.exponential(DAYS_PER_YEAR / P.OUTPATIENT_HF_RATE, m)).astype(np.int64)
    ok = allowed(d_opd)  # outpatient heart-failure records: not the (inpatient) outcome
    b.diag.add(idx[ok], day0[ok] + d_opd[ok], code=hf[ok], setting=OUTPATIENT)
    d_nc = np.ceil(t_nc).astype(np.int64)
    ok = (t_nc < t_death) & (d_nc <= cend)
    b.diag.add(idx[ok], day0[ok] + d_nc[ok], code=CODE["LNS2"], setting=OUTPATIENT)
    k = rng.poisson(1.0, m)
    rep = np.repeat(np.arange(m), k)
    dd = uniform_days(rng, 1, 1000, len(rep))
    ok = (dd <= cend[rep]) & (dd < t_death[rep])
    b.diag.add(idx[rep[ok]], day0[rep[ok]] + dd[ok],
               code=CODE[P.NOISE_DX_CODES[0]] + rng.integers(0, len(P.NOISE_DX_CODES), int(ok.sum())),
               setting=OUTPATIENT)

    mu = {arm_i: marker_mean(xs, np.full(m, arm_i)) for arm_i in range(len(P.ARMS))}
    mean = np.where(a == 0, mu[0], mu[1])
    p_measured = logistic(marker_measured_logit(xs, a))
    for centre, jitter, share in ((180, 20, 0.6), (P.MARKER_AT_DAY, P.MARKER_JITTER, None),
                                  (730, 30, 0.5)):
        dm = centre + rng.integers(-jitter, jitter + 1, m)
        take = rng.random(m) < (p_measured if share is None else share)
        ok = take & allowed(dm)
        value = np.round(mean + rng.normal(0.0, P.MARKER_OUTCOME["sd"], m), 1)
        b.meas.add(idx[ok], day0[ok] + dm[ok], code=CODE[P.MARKER_CODE], value=value[ok], unit=0)

    # the tone on the first day of every period k >= 1 up to a deviation; refills and switches
    last_day = np.minimum(cend, np.ceil(t_death).astype(np.int64) - 1)
    k = np.arange(1, P.N_PERIODS)
    pk, kk = np.nonzero((P.PERIOD_DAYS * k[None, :] <= last_day[:, None])
                        & (k[None, :] <= paths.k_dev[:, None]))  # none after a deviation
    b.meas.add(idx[pk], day0[pk] + P.PERIOD_DAYS * k[kk], code=CODE[P.TONE_CODE],
               value=paths.R[pk, k[kk]], unit=2)
    who, dd, s, own = sustain.dispensings(rng, supply, paths, last_day)
    code = np.where(own, b.arm_code[idx[who]], arm_codes(rng, 1 - a[who]))
    b.disp.add(idx[who], day0[who] + dd, code=code, days_supply=s)
    dfl = uniform_days(rng, 1, 120, m)
    ok = b.first_line[idx] & allowed(dfl)
    b.disp.add(idx[ok], day0[ok] + dfl[ok], code=CODE[P.FIRST_LINE_CODES[0]], days_supply=90)

    _not_followed(rng, b, ~followed, n)


def _not_followed(rng, b: Baseline, sel: np.ndarray, n: int) -> None:
    """Coverage ends and deaths of persons without an index dispensing to follow."""
    open_ = b.cov.parts[0]["end_date"]
    die = sel & (b.death == NONE) & (rng.random(n) < 0.15)
    later = b.t0p + 1 + np.floor(rng.random(n) * (P.DATA_END - b.t0p)).astype(np.int64)
    b.death[die] = np.maximum(later, P.ENTRY_START)[die]
    end = np.minimum(b.t0p + uniform_days(rng, 0, 2500, n), P.DATA_END)
    end = np.where(b.death < NONE, np.minimum(end, b.death), end)
    open_[sel] = np.maximum(end, b.cov.parts[0]["date"])[sel]
