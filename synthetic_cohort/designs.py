"""The "designs" scenario of the invented registry: an index flare, then a tone marker that drives
starting kestrel, the crisis outcome and death (see ``synthetic_cohort/README.md``).

``build(persons, seed)`` draws the extract (:class:`~synthetic_cohort.records.Tables`) and the
latent values the truths need (:class:`Latent`). ``clone_cohort`` and ``sequential_candidates``
are independent numpy readings of CONTRACTS §5d and §5c eligibility for the example protocols in
``synthetic_cohort/designs/`` (they share no code with ``emulant.cohort``). The demo scenario's
persons, stream and truths are untouched: this scenario writes its own extract folder.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from synthetic_cohort import designs_params as D
from synthetic_cohort import designs_process as S
from synthetic_cohort.records import NONE, Rows, Table, Tables
from synthetic_cohort.rules import completed_years

VOCAB = (*D.FLARE_CODES, *D.CRISIS_CODES, *D.KESTREL_CODES, D.TONE_CODE)
CODE = {c: i for i, c in enumerate(VOCAB)}
SETTINGS = ("inpatient", "outpatient")
N_PERIODS = -(-(D.DATA_END - D.INDEX_FIRST + 1) // D.PERIOD) + 1


@dataclass
class Latent:
    """Per person: index day ``d0``, age at it, sex, the tone before (day -30) and at the flare,
    the natural-course run, event times (days after the flare, continuous), coverage, records."""

    d0: np.ndarray
    birth: np.ndarray
    age0: np.ndarray
    male: np.ndarray
    tone_before: np.ndarray
    prevalent: np.ndarray
    run: S.Run
    t_crisis: np.ndarray
    t_death: np.ndarray
    cov_start: np.ndarray
    cov_end: np.ndarray  # calendar day
    first_kestrel: np.ndarray  # first kestrel dispensing day on or after the flare (calendar)


def _not_feb29(days: np.ndarray) -> np.ndarray:
    d = days.astype("datetime64[D]")
    month = (d.astype("datetime64[M]") - d.astype("datetime64[Y]").astype("datetime64[M]"))
    dom = d - d.astype("datetime64[M]").astype("datetime64[D]")
    feb29 = (month.astype(np.int64) == 1) & (dom.astype(np.int64) == 28)
    return days - feb29


def build(persons: int, seed: int) -> tuple[Tables, Latent]:
    """Draw the scenario's extract and its latent values (one stream, in a fixed order)."""
    rng = np.random.default_rng(seed)
    n, K = persons, N_PERIODS
    d0 = rng.integers(D.INDEX_FIRST, D.INDEX_LAST + 1, n)
    age_draw = np.clip(rng.normal(D.AGE_MEAN, D.AGE_SD, n), D.AGE_LO, D.AGE_HI)
    birth = _not_feb29(d0 - np.round(age_draw * S.DAYS_PER_YEAR).astype(np.int64))
    age0 = (d0 - birth) / S.DAYS_PER_YEAR
    male = rng.random(n) < D.MALE_PROB
    prevalent = rng.random(n) < D.PREVALENT_PROB
    short = rng.random(n) < D.SHORT_COVERAGE_PROB
    cov_start = d0 - np.where(short, rng.integers(30, 301, n),
                              rng.integers(D.COVERAGE_BEFORE_DAYS[0], D.COVERAGE_BEFORE_DAYS[1] + 1, n))
    cend = np.floor(rng.exponential(S.DAYS_PER_YEAR / D.COVERAGE_END_RATE, n)).astype(np.int64)
    cov_end = np.minimum(d0 + cend, D.DATA_END)
    tb = D.TONE_BEFORE
    tone_before = np.round(rng.normal(tb["mean"] + tb["age10"] * (age0 - D.AGE_MEAN) / 10, tb["sd"]), 1)
    tone0 = np.round(tone_before + D.TONE_FLARE["rise"] + rng.normal(0.0, D.TONE_FLARE["sd"], n), 1)
    eps, u = rng.standard_normal((n, K)), rng.random((n, K))
    run = S.simulate(tone_before, tone0, age0, prevalent, eps, u, S.Natural())
    t_crisis = S.event_times(rng, S.hazards(D.CRISIS, run, age0, male))
    t_death = S.event_times(rng, S.hazards(D.DEATH, run, age0, male))
    death_day = d0 + np.floor(t_death).astype(np.int64)
    death = np.where(death_day <= D.DATA_END, death_day, NONE)
    last = np.minimum(cov_end, death_day) - d0  # the last day a record can carry

    diag, meas, disp = (Rows({"code": np.int64, "setting": np.int64}),
                        Rows({"code": np.int64, "value": float, "unit": np.int64}),
                        Rows({"code": np.int64, "days_supply": np.int64}))
    everyone = np.arange(n)
    diag.add(everyone, d0, code=CODE[D.FLARE_CODES[0]] + rng.integers(0, len(D.FLARE_CODES), n),
             setting=0)
    d_crisis = np.floor(t_crisis).astype(np.int64)
    ok = (t_crisis < t_death) & (d_crisis <= last)
    diag.add(everyone[ok], d0[ok] + d_crisis[ok], code=CODE[D.CRISIS_CODES[0]], setting=0)
    ok = cov_start <= d0 - D.PERIOD
    meas.add(everyone[ok], d0[ok] - D.PERIOD, code=CODE[D.TONE_CODE], value=tone_before[ok], unit=0)
    k = np.arange(K)
    visit = D.PERIOD * k[None, :] <= last[:, None]
    p, kk = np.nonzero(visit)
    meas.add(p, d0[p] + D.PERIOD * kk, code=CODE[D.TONE_CODE], value=run.L[p, kk], unit=0)
    drug = CODE[D.KESTREL_CODES[0]] + rng.integers(0, len(D.KESTREL_CODES), n)
    p, kk = np.nonzero(visit & (k[None, :] >= run.start[:, None]))  # prevalent users: start -1
    disp.add(p, d0[p] + D.PERIOD * kk, code=drug[p], days_supply=D.PERIOD)
    since = rng.integers(60, 901, n)  # prevalent users: refills every 30 days before the flare
    j = np.arange(-(-900 // D.PERIOD) + 1)
    p, jj = np.nonzero(prevalent[:, None] & (D.PERIOD * j[None, :] < since[:, None]))
    day = d0[p] - since[p] + D.PERIOD * jj
    ok = day >= cov_start[p]
    disp.add(p[ok], day[ok], code=drug[p[ok]], days_supply=D.PERIOD)

    coverage = Table({"person_id": everyone, "start_date": cov_start, "end_date": cov_end})
    vocab = np.asarray(VOCAB, dtype=object)
    events = {"dispensings": disp.table({"code": vocab}),
              "diagnoses": diag.table({"code": vocab, "setting": np.asarray(SETTINGS, object)}),
              "measurements": meas.table({"code": vocab, "unit": np.asarray((D.TONE_UNIT,), object)})}
    tables = Tables(birth, male.astype(np.int64), {}, death, coverage, events)
    started = run.start.copy()
    first = np.where((started >= 0) & (started < K) & (D.PERIOD * started <= last),
                     d0 + D.PERIOD * started, NONE)
    latent = Latent(d0, birth, age0, male, tone_before, prevalent, run, t_crisis, t_death,
                    cov_start, cov_end, first)
    return tables, latent


def _any_in(tab: Table, codes: tuple[str, ...], n: int, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Per person: a record of ``codes`` dated in ``[lo, hi]`` (per person)."""
    codes_idx = [i for i, c in enumerate(tab.levels["code"]) if c in codes]
    p, d = tab.cols["person_id"], tab.cols["date"]
    sel = np.isin(tab.cols["code"], codes_idx)
    p, d = p[sel], d[sel]
    hit = (d >= lo[p]) & (d <= hi[p])
    out = np.zeros(n, bool)
    out[p[hit]] = True
    return out


def clone_cohort(t: Tables, lat: Latent) -> tuple[np.ndarray, list[tuple[str, int]]]:
    """The clone protocols' eligible persons (CONTRACTS §5d steps) and the attrition."""
    n = t.n
    steps = [("persons", np.ones(n, bool))]
    steps.append(("indexed", (lat.d0 >= D.ENTRY_START) & (lat.d0 <= D.ENTRY_END)))
    age = completed_years(t.birth, lat.d0)
    steps.append(("age", (age >= D.AGE_MIN) & (age <= D.AGE_MAX)))
    steps.append(("coverage_before", (lat.cov_start <= lat.d0 - D.COVERAGE_BEFORE)
                  & (lat.cov_end >= lat.d0)))
    steps.append(("washout", ~_any_in(t.events["dispensings"], D.KESTREL_CODES, n,
                                       lat.d0 - D.WASHOUT, lat.d0 - 1)))
    keep = np.ones(n, bool)
    attrition = []
    for name, ok in steps:
        keep &= ok
        attrition.append((name, int(keep.sum())))
    return keep, attrition


def trial_starts() -> np.ndarray:
    """The sequential protocol's trial start days (CONTRACTS §5c)."""
    return np.arange(D.TRIALS_START, D.TRIALS_END + 1, D.TRIAL_EVERY)


@dataclass
class PersonTrials:
    """Candidate person-trials: person index, trial number and start day, initiator or not."""

    person: np.ndarray
    trial: np.ndarray
    t0: np.ndarray
    initiator: np.ndarray
    attrition: list[tuple[str, int]]


def sequential_candidates(t: Tables, lat: Latent) -> PersonTrials:
    """The sequential protocol's candidates (CONTRACTS §5c steps, counted in person-trials)."""
    n = t.n
    disp, diag = t.events["dispensings"], t.events["diagnoses"]
    names = ("person_trials", "alive", "age", "coverage_before", "washout", "require:flare",
             "exclude:crisis")
    counts = dict.fromkeys(names, 0)
    out = {"person": [], "trial": [], "t0": [], "initiator": []}
    for j, tj in enumerate(trial_starts()):
        day = np.full(n, tj)
        age = completed_years(t.birth, day)
        steps = (np.ones(n, bool), t.death >= tj, (age >= D.AGE_MIN) & (age <= D.AGE_MAX),
                 (lat.cov_start <= tj - D.COVERAGE_BEFORE) & (lat.cov_end >= tj),
                 ~_any_in(disp, D.KESTREL_CODES, n, day - D.WASHOUT, day - 1),
                 _any_in(diag, D.FLARE_CODES, n, day + D.REQUIRE_FLARE[0], day + D.REQUIRE_FLARE[1]),
                 ~_any_in(diag, D.CRISIS_CODES, n, day + D.REQUIRE_FLARE[0], day))
        keep = np.ones(n, bool)
        for name, ok in zip(names, steps, strict=True):
            keep &= ok
            counts[name] += int(keep.sum())
        who = np.flatnonzero(keep)
        start = _any_in(disp, D.KESTREL_CODES, n, day, day + D.TRIAL_EVERY - 1)
        out["person"].append(who)
        out["trial"].append(np.full(len(who), j))
        out["t0"].append(np.full(len(who), tj))
        out["initiator"].append(start[who])
    cat = {k: np.concatenate(v) for k, v in out.items()}
    return PersonTrials(cat["person"], cat["trial"], cat["t0"], cat["initiator"].astype(bool),
                        list(counts.items()))
