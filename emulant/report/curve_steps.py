"""Risk curves that show their shape and still protect persons.

A curve from ``curves.csv`` is drawn at every day at which it changes, but a step is drawn only
where it pools at least ``min_cell`` outcome events of the arm (unweighted, counted from the
cohort's follow-up columns); smaller changes are merged into the next step. A curve ends at the
last day with at least ``min_cell`` persons at risk; events after the last drawn step that pool
fewer than ``min_cell`` are not drawn. Numbers at risk are shown on a readable grid of days under
the figure. Pooling small steps in this way is our rule (the cell-suppression rule applied to the
events behind each step); it has no single published source.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import pandas as pd

from emulant import columns as col
from emulant.protocol import Protocol


def curve_rule_text(min_cell: int) -> str:
    """The rule for risk curves and numbers at risk, in words for "How counts are shown"."""
    return (f"Each risk curve is drawn at the days at which it changes, but a step is drawn only "
            f"where it pools at least {min_cell} outcome events of the arm; smaller changes are "
            f"merged into the next step, so no drawn step reflects fewer than {min_cell} events. "
            f"A curve ends at the last day with at least {min_cell} persons at risk. Numbers at "
            f"risk are given on a grid of days under each figure, each under the rule above.")


def events_by_day(cohort: pd.DataFrame | None, protocol: Protocol, outcome: str,
                  arm: str) -> dict[float, int] | None:
    """Unweighted outcome events of ``arm`` per day of follow-up (``None`` without the columns)."""
    if cohort is None:
        return None
    day_c, why_c = col.end_day(outcome), col.end_reason(outcome)
    if day_c not in cohort or why_c not in cohort:
        day_c, why_c = "end_day", "end_reason"
        if day_c not in cohort or why_c not in cohort or outcome != protocol.outcomes.primary:
            return None
    g = cohort[(cohort["arm"].astype(str) == arm) & (cohort[why_c].astype(str) == "outcome")]
    days = pd.to_numeric(g[day_c], errors="coerce").dropna()
    return {float(k): int(v) for k, v in days.value_counts().items()}


def pooled_steps(days: Sequence[float], at_risk: Sequence[float], events: dict[float, int],
                 min_cell: int) -> list[tuple[int, int]]:
    """Indices of the curve days to draw, each with the events its step pools.

    ``days`` are the curve's days in increasing order; the first is always drawn (pooling
    nothing). A later day is drawn when the events in ``(last drawn day, day]`` reach
    ``min_cell``; the walk stops before the first day with fewer than ``min_cell`` at risk.
    """
    if not len(days):
        return []
    ev_days = np.array(sorted(events), dtype=float)
    ev_n = np.array([events[d] for d in sorted(events)], dtype=int)
    cum = np.concatenate([[0], np.cumsum(ev_n)])

    def upto(d: float) -> int:  # events on days <= d
        return int(cum[np.searchsorted(ev_days, d, side="right")])

    n0 = at_risk[0]
    if n0 is None or (isinstance(n0, float) and math.isnan(n0)) or n0 < min_cell:
        return []
    out = [(0, 0)]
    last = upto(days[0])
    for i in range(1, len(days)):
        n = at_risk[i]
        if n is None or (isinstance(n, float) and math.isnan(n)) or n < min_cell:
            break
        pooled = upto(days[i]) - last
        if pooled >= min_cell:
            out.append((i, pooled))
            last += pooled
    return out
