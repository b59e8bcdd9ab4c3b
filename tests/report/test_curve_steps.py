"""Risk curves under the disclosure rule: no drawn step reflects fewer than ``min_cell`` events.

The pooling rule is ours (the report's "How counts are shown" states it); the expected indices
in the first test are hand computation. The property test draws random event counts.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from hypothesis import given, settings
from hypothesis import strategies as st
from test_report import _protocol, write_results

from emulant import columns as col
from emulant.report import build_context
from emulant.report.curve_steps import curve_rule_text, events_by_day, pooled_steps


def test_small_steps_merge_into_the_next():
    days = [0, 30, 60, 90, 120, 150, 180]
    at_risk = [100, 90, 80, 70, 60, 4, 3]
    events = {10.0: 3, 40.0: 1, 61.0: 2, 95.0: 6, 130.0: 1}
    # events up to each day: 30 -> 3, 60 -> 4, 90 -> 6, 120 -> 12 (day 130's event is later).
    # min_cell 5: days 30 and 60 pool 3 and 4 (merged on), day 90 pools 6, day 120 pools the 6
    # events of day 95; day 150 has 4 at risk (< 5), so the curve ends at day 120.
    assert pooled_steps(days, at_risk, events, 5) == [(0, 0), (3, 6), (4, 6)]
    # min_cell 2: day 30 pools 3, day 60 only 1 (merged into day 90: 1 + 2 = 3), day 120 pools 6
    assert pooled_steps(days, at_risk, events, 2) == [(0, 0), (1, 3), (3, 3), (4, 6)]
    assert pooled_steps(days, [3] * 7, events, 5) == []  # too few at risk from the start


@settings(max_examples=200, derandomize=True)
@given(st.lists(st.integers(0, 9), min_size=1, max_size=40), st.integers(1, 12),
       st.integers(0, 60))
def test_no_step_pools_fewer_than_min_cell(counts, min_cell, cut):
    days = [30.0 * i for i in range(len(counts))]
    events = {d - 3.0: c for d, c in zip(days, counts, strict=True) if c and d > 0}
    at_risk = [max(0, 200 - 5 * i) if i < cut else 0 for i in range(len(days))]
    steps = pooled_steps(days, at_risk, events, min_cell)
    drawn = [i for i, _ in steps]
    assert drawn == sorted(drawn)
    for (i, _), (j, pooled) in zip(steps[:-1], steps[1:], strict=True):
        between = sum(n for d, n in events.items() if days[i] < d <= days[j])
        assert between == pooled >= min_cell
    assert all(p >= min_cell for _, p in steps[1:])
    assert all(at_risk[i] >= min_cell for i in drawn)


def test_report_curves_follow_the_rule(tmp_path):
    protocol = _protocol(tmp_path)
    write_results(tmp_path / "results")
    m = protocol.report.min_cell
    ctx = build_context(tmp_path / "results", protocol)
    cohort = pd.read_parquet(tmp_path / "results" / "cohort.parquet")
    assert ctx["curves"]
    n_steps = 0
    for c in ctx["curves"]:
        for panel in c["panels"]:
            for arm in panel["arms"]:
                ev = cohort[(cohort.arm == arm["name"])
                            & (cohort[col.end_reason("admission")] == "outcome")]
                ev_days = ev[col.end_day("admission")].to_numpy()
                d = arm["day"]
                for a, b in zip(d[:-1], d[1:], strict=True):
                    assert ((ev_days > a) & (ev_days <= b)).sum() >= m
                    n_steps += 1
                assert events_by_day(cohort, protocol, "admission", arm["name"]) is not None
    assert n_steps > 0
    # the fixture's curves are on a 15-day grid: the drawn steps are fewer than the days
    assert max(len(a["day"]) for c in ctx["curves"] for p in c["panels"] for a in p["arms"]) < 74
    # numbers at risk on a readable grid: at most 14 columns, every 90 days for 1,095 days
    grid = [int(g.replace(",", "")) for g in ctx["curves"][0]["grid"]]
    assert len(grid) <= 14 and np.all(np.diff(grid) <= 90)
    assert "pools at least 5 outcome events" in curve_rule_text(5)
