"""An independent, vectorised reading of the cohort rules (CONTRACTS §3a) over in-memory tables.

The generator uses it to know exactly who is eligible (and in which arm) in the data it wrote,
so ``truth.json`` can be compared with the cohort builder's counts. It is written from the
contract's text alone, in numpy, sharing no code with ``emulant.cohort`` (which uses DuckDB).

Reading of step 2 (``initiated``): time zero is the earliest record, among the records dated
inside the entry window, of any arm's initiating concept; earlier records (before the window)
are what the washout step tests.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from emulant.protocol import Concept, Covariate, MeasuredOutcome, Protocol
from synthetic_cohort.records import NONE, SEXES, Table, Tables


def days_since_epoch(d) -> int:
    return int(np.datetime64(d, "D").astype(np.int64))


def ymd(days: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Year, month (1-12) and day of month of day numbers."""
    d = np.asarray(days).astype("datetime64[D]")
    y = d.astype("datetime64[Y]")
    m = d.astype("datetime64[M]")
    return (y.astype(np.int64) + 1970, (m - y.astype("datetime64[M]")).astype(np.int64) + 1,
            (d - m.astype("datetime64[D]")).astype(np.int64) + 1)


def completed_years(birth: np.ndarray, on: np.ndarray) -> np.ndarray:
    """Age in whole years on a day (birthday rule: a year is complete on the birthday)."""
    by, bm, bd = ymd(birth)
    y, m, d = ymd(on)
    before = (m < bm) | ((m == bm) & (d < bd))
    return y - by - before.astype(np.int64)


def plausible(t: Tables) -> Tables:
    """Drop event rows dated before the person's birth or after their death (CONTRACTS §2)."""
    events = {}
    for name, tab in t.events.items():
        p, d = tab.cols["person_id"], tab.cols["date"]
        events[name] = tab.take(np.flatnonzero((d >= t.birth[p]) & (d <= t.death[p])))
    return Tables(t.birth, t.sex, t.attributes, t.death, t.coverage, events)


def concept_mask(tab: Table, concept: Concept) -> np.ndarray:
    """Rows of ``tab`` that are records of the concept (prefix or exact codes, ``where``)."""
    vocab = np.asarray(tab.levels["code"], dtype=str)
    if concept.match == "exact":
        hit = np.isin(vocab, list(concept.codes))
    else:
        hit = np.zeros(len(vocab), bool)
        for c in concept.codes:
            hit |= np.char.startswith(vocab, c)
    mask = hit[tab.cols["code"]]
    for col, allowed in concept.where:
        levels = np.asarray(tab.levels[col], dtype=str)
        mask &= np.isin(levels, list(allowed))[tab.cols[col]]
    return mask


def concept_rows(t: Tables, concept: Concept) -> Table:
    tab = t.events[concept.source]
    return tab.take(np.flatnonzero(concept_mask(tab, concept)))


def first_day(person: np.ndarray, value: np.ndarray, n: int) -> np.ndarray:
    """Per person, the smallest value (NONE when the person has none)."""
    out = np.full(n, NONE, np.int64)
    np.minimum.at(out, person, value)
    return out


def any_in_window(rows: Table, t0: np.ndarray, window: tuple[int, int], n: int) -> np.ndarray:
    p = rows.cols["person_id"]
    k = rows.cols["date"] - t0[p]
    hit = (t0[p] < NONE) & (k >= window[0]) & (k <= window[1])
    return np.bincount(p[hit], minlength=n) > 0


def merged_coverage(cov: Table) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Merge overlapping or touching periods: (person, start, end) of each merged period."""
    p, s, e = cov.cols["person_id"], cov.cols["start_date"], cov.cols["end_date"]
    o = np.lexsort((s, p))
    p, s, e = p[o], s[o], e[o]
    key = p * (2**24) + e  # ends are below 2**24 days, so a running max stays within a person
    run = np.maximum.accumulate(key) - p * (2**24)
    new = np.ones(len(p), bool)
    new[1:] = (p[1:] != p[:-1]) | (s[1:] > run[:-1] + 1)
    starts = np.flatnonzero(new)
    return p[starts], s[starts], np.maximum.reduceat(e, starts) if len(p) else e


def period_holding(cov: Table, t0: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Start and end of the merged period holding each person's day 0 (NONE when none)."""
    p, s, e = merged_coverage(cov)
    hold = (t0[p] < NONE) & (s <= t0[p]) & (e >= t0[p])
    start = np.full(n, NONE, np.int64)
    end = np.full(n, NONE, np.int64)
    start[p[hold]], end[p[hold]] = s[hold], e[hold]  # merged periods are disjoint: one at most
    return start, end


@dataclass
class Cohort:
    """Who is eligible: time zero and arm per person, the attrition steps in order."""

    t0: np.ndarray  # day of time zero, NONE when not initiated
    arm: np.ndarray  # index into protocol arms, -1 when none
    eligible: np.ndarray  # bool
    attrition: list[tuple[str, int]]


def eligibility(t: Tables, protocol: Protocol) -> Cohort:
    """Apply the eligibility steps of CONTRACTS §3a in their fixed order."""
    t = plausible(t)
    n, el, st = t.n, protocol.eligibility, protocol.strategies
    lo, hi = days_since_epoch(el.entry_start), days_since_epoch(el.entry_end)
    arm_rows = [concept_rows(t, protocol.concept(a.initiate)) for a in st.arms]
    firsts = []
    for rows in arm_rows:
        d = rows.cols["date"]
        w = (d >= lo) & (d <= hi)
        firsts.append(first_day(rows.cols["person_id"][w], d[w], n))
    t0 = np.minimum(firsts[0], firsts[1])
    alive = t0 < NONE
    steps = [("persons", n), ("initiated", int(alive.sum()))]
    starts = np.stack([(f == t0) & alive for f in firsts])
    arm = np.where(starts[0], 0, np.where(starts[1], 1, -1))
    both = starts[0] & starts[1]
    if st.same_day == "exclude":
        alive &= ~both
    steps.append(("same_day", int(alive.sum())))
    age = completed_years(t.birth, np.where(t0 < NONE, t0, 0))
    if el.age_min is not None:
        alive &= age >= el.age_min
    if el.age_max is not None:
        alive &= age <= el.age_max
    steps.append(("age", int(alive.sum())))
    cstart, _ = period_holding(t.coverage, t0, n)
    alive &= (cstart < NONE) & (cstart <= t0 - el.coverage_before_days)
    steps.append(("coverage_before", int(alive.sum())))
    if st.washout_days > 0:
        for rows in arm_rows:
            alive &= ~any_in_window(rows, t0, (-st.washout_days, -1), n)
    steps.append(("washout", int(alive.sum())))
    for crit in el.require:
        alive &= any_in_window(concept_rows(t, protocol.concept(crit.concept)), t0, crit.window, n)
        steps.append((f"require:{crit.concept}", int(alive.sum())))
    for crit in el.exclude:
        alive &= ~any_in_window(concept_rows(t, protocol.concept(crit.concept)), t0, crit.window, n)
        steps.append((f"exclude:{crit.concept}", int(alive.sum())))
    t0_alive = np.where(alive, t0, NONE)
    for cov in protocol.covariates:
        if cov.missing == "exclude":
            alive &= ~np.isnan(np.asarray(covariate(t, protocol, cov, t0_alive), float))
            steps.append((f"covariate:{cov.name}", int(alive.sum())))
    for m in protocol.outcomes.measured():
        if m.missing == "complete_case":
            alive &= ~np.isnan(measured_outcome(t, protocol, m, np.where(alive, t0, NONE)))
            steps.append(("outcome_measured", int(alive.sum())))
    return Cohort(np.where(arm >= 0, t0, NONE), arm, alive, steps)


def _window_rows(rows: Table, t0: np.ndarray, window: tuple[int, int]):
    p = rows.cols["person_id"]
    k = rows.cols["date"] - t0[p]
    keep = np.flatnonzero((t0[p] < NONE) & (k >= window[0]) & (k <= window[1]))
    return p[keep], k[keep], keep


def covariate(t: Tables, protocol: Protocol, cov: Covariate, t0: np.ndarray) -> np.ndarray:
    """A covariate's value per person at time zero (NaN when missing or no time zero).

    ``t`` must already be :func:`plausible`. Text values (sex, attributes) come back as strings.
    """
    n = t.n
    if cov.builtin == "age":
        return np.where(t0 < NONE, completed_years(t.birth, np.where(t0 < NONE, t0, 0)), np.nan)
    if cov.builtin == "calendar_year":
        return np.where(t0 < NONE, ymd(np.where(t0 < NONE, t0, 0))[0], np.nan)
    if cov.builtin == "sex":
        return np.asarray(SEXES, dtype=object)[t.sex]
    if cov.attribute is not None:
        idx, levels = t.attributes[cov.attribute]
        return np.asarray(levels, dtype=object)[idx]
    if cov.concept is not None:
        rows = concept_rows(t, protocol.concept(cov.concept))
    else:
        rows = t.events[cov.source]
    p, k, keep = _window_rows(rows, t0, cov.window)
    if cov.summary in ("any", "count"):
        c = np.bincount(p, minlength=n).astype(float)
        return (c > 0).astype(float) if cov.summary == "any" else c
    if cov.summary == "distinct_codes":
        pairs = np.unique(p * (2**20) + rows.cols["code"][keep])
        return np.bincount(pairs // (2**20), minlength=n).astype(float)
    v = rows.cols["value"][keep].astype(float)
    out = np.full(n, np.nan)
    if cov.summary == "last":
        o = np.lexsort((v, k, p))  # latest day, the largest value on a tie: the last row
        p, v = p[o], v[o]
        last = np.ones(len(p), bool)
        last[:-1] = p[1:] != p[:-1]
        out[p[last]] = v[last]
        return out
    c = np.bincount(p, minlength=n)
    if cov.summary == "mean":
        s = np.bincount(p, weights=v, minlength=n)
        return np.where(c > 0, s / np.maximum(c, 1), np.nan)
    fill = np.inf if cov.summary == "min" else -np.inf
    agg = np.full(n, fill)
    (np.minimum if cov.summary == "min" else np.maximum).at(agg, p, v)
    return np.where(c > 0, agg, np.nan)


def measured_outcome(t: Tables, protocol: Protocol, m: MeasuredOutcome,
                     t0: np.ndarray) -> np.ndarray:
    """The value nearest to ``at_day`` within the tolerance (the earlier on a tie); NaN if none."""
    rows = concept_rows(t, protocol.concept(m.measure))
    p, k, keep = _window_rows(rows, t0, (m.at_day - m.tolerance_days, m.at_day + m.tolerance_days))
    v = rows.cols["value"][keep].astype(float)
    o = np.lexsort((k, np.abs(k - m.at_day), p))
    p, v = p[o], v[o]
    first = np.ones(len(p), bool)
    first[1:] = p[1:] != p[:-1]
    out = np.full(t.n, np.nan)
    out[p[first]] = v[first]
    if m.change_from_baseline:
        base = Covariate("baseline", concept=m.measure, window=(-m.tolerance_days, 0),
                         summary="last")
        out = out - covariate(t, protocol, base, t0)
    return out


REASONS = ("outcome", "competing", "administrative_end", "max_follow_up", "coverage_end")


def follow_up(t: Tables, protocol: Protocol, outcome: str, t0: np.ndarray
              ) -> tuple[np.ndarray, np.ndarray]:
    """``end_day`` and ``end_reason`` (index into :data:`REASONS`) of a time-to-event outcome.

    ``t`` must already be :func:`plausible`; persons without time zero get NONE.
    """
    n = t.n
    ok = t0 < NONE
    rows = concept_rows(t, protocol.concept(outcome))
    p, k, _ = _window_rows(rows, t0, (1, 10**9))
    cand = [first_day(p, k, n)]
    if protocol.outcomes.competing:
        death = np.where(ok & (t.death < NONE), t.death - t0, NONE)
        cand.append(np.where(death >= 0, death, NONE))
    else:
        cand.append(np.full(n, NONE))
    adm = protocol.follow_up.administrative_end
    cand.append(np.full(n, days_since_epoch(adm)) - t0 if adm else np.full(n, NONE))
    cand.append(np.full(n, protocol.follow_up.max_days))
    _, cend = period_holding(t.coverage, t0, n)  # last: coverage ending on a planned end is no censoring
    cand.append(np.where(cend < NONE, cend - t0, NONE))
    c = np.stack(cand)
    reason = np.argmin(c, axis=0)  # the first minimum: the order of REASONS breaks ties
    return np.where(ok, c.min(axis=0), NONE), np.where(ok, reason, -1)
