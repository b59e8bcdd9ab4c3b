"""An independent reading of staying on a strategy (CONTRACTS §5b) over in-memory tables.

Written from the contract's text alone, in numpy, sharing no code with
``emulant.cohort.person_time`` (which unrolls the carry-over rule into window functions in
DuckDB). Here the rule is applied literally, dispensing by dispensing: the loop runs over the
rank of a dispensing within a person (at most a few dozen), each step vectorised over persons.

- supply: ``c_1 = d_1 + s_1 - 1``; ``c_j = max(c_{j-1}, d_j - 1) + s_j``;
- stop: ``c + gap_days + 1`` with ``c`` the covered-through day before the first dispensing dated
  later than ``c + gap_days`` (or after the last dispensing);
- switch: the first day ``>= 1`` with a record of a switch concept;
- deviation: the earlier of the two (``switched`` on a tie), none when after ``end_day``.

Dispensings and switch records are read on days ``0 .. max_days`` (stop and switch days later than
``max_days`` are reported as none), as ``emulant`` documents for its own columns.
"""

from __future__ import annotations

import numpy as np

from emulant.protocol import Protocol
from synthetic_cohort.records import NONE, Tables
from synthetic_cohort.rules import concept_rows, first_day

STOPPED, SWITCHED = 0, 1
DEFAULT_SUPPLY = 30


def stop_days(person: np.ndarray, day: np.ndarray, supply: np.ndarray, gap: np.ndarray,
              n: int) -> np.ndarray:
    """Per person, the stop day of §5b from their dispensings (``person``, ``day`` >= 0,
    ``supply``) and their arm's ``gap`` (an array over persons); NONE without a dispensing."""
    order = np.lexsort((supply, day, person))
    person, day, supply = person[order], day[order], supply[order]
    start = np.r_[0, np.flatnonzero(np.diff(person)) + 1]
    rank = np.arange(len(person)) - np.repeat(start, np.diff(np.r_[start, len(person)]))
    cover = np.full(n, NONE, np.int64)  # covered through, after the dispensings seen so far
    stop = np.full(n, NONE, np.int64)
    seen = np.zeros(n, bool)
    for j in range(int(rank.max()) + 1 if len(rank) else 0):
        at = rank == j
        p, d, s = person[at], day[at], supply[at]
        first = ~seen[p]
        cover[p[first]] = d[first] + s[first] - 1
        seen[p[first]] = True
        go = ~first & (stop[p] == NONE)
        late = go & (d > cover[p] + gap[p])
        stop[p[late]] = cover[p[late]] + gap[p[late]] + 1
        keep = go & ~late
        cover[p[keep]] = np.maximum(cover[p[keep]], d[keep] - 1) + s[keep]
    last = seen & (stop == NONE)
    stop[last] = cover[last] + gap[last] + 1
    return stop


def deviations(t: Tables, protocol: Protocol, t0: np.ndarray, arm: np.ndarray,
               end_day: np.ndarray) -> dict[str, np.ndarray]:
    """``stop_day``, ``switch_day``, ``deviation_day`` (NONE when none) and ``reason``
    (-1, :data:`STOPPED`, :data:`SWITCHED`) per person; ``t0`` and ``arm`` are the cohort's (NONE
    and -1 outside it), ``t`` holds the plausible rows. Every arm needs ``sustain``."""
    n, max_days = t.n, protocol.follow_up.max_days
    gap = np.zeros(n, np.int64)
    parts, switch = [], np.full(n, NONE, np.int64)
    for i, a in enumerate(protocol.strategies.arms):
        gap[arm == i] = a.sustain.gap_days
        rows = concept_rows(t, protocol.concept(a.initiate))
        p = rows.cols["person_id"]
        k = rows.cols["date"] - t0[p]
        ok = (arm[p] == i) & (t0[p] < NONE) & (k >= 0) & (k <= max_days)
        s = rows.cols["days_supply"] if "days_supply" in rows.cols else np.full(len(p), DEFAULT_SUPPLY)
        parts.append((p[ok], k[ok], s[ok].astype(np.int64)))
        for name in a.sustain.switch:
            rows = concept_rows(t, protocol.concept(name))
            p = rows.cols["person_id"]
            k = rows.cols["date"] - t0[p]
            ok = (arm[p] == i) & (t0[p] < NONE) & (k >= 1) & (k <= max_days)
            switch = np.minimum(switch, first_day(p[ok], k[ok], n))
    person, day, supply = (np.concatenate(x) for x in zip(*parts, strict=True))
    stop = stop_days(person, day, supply, gap, n)
    stop = np.where(stop <= max_days, stop, NONE)
    dev = np.minimum(stop, switch)
    within = (dev < NONE) & (dev <= end_day)
    reason = np.where(~within, -1, np.where(switch <= stop, SWITCHED, STOPPED))
    return {"stop_day": stop, "switch_day": switch, "deviation_day": np.where(within, dev, NONE),
            "reason": reason}
