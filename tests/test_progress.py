"""Progress lines (emulant/progress.py): a line at every further tenth, with the time left.

The time left is the linear extrapolation elapsed / done * (total - done) (common practice, no
source); the expected lines are hand computations on a fake clock.
"""

from __future__ import annotations

import logging

from emulant.progress import Progress, progress_line


def test_a_line_at_every_tenth_with_time_left(caplog):
    now = [0.0]
    caplog.set_level(logging.INFO, logger="emulant")
    p = Progress("replicates", 20, clock=lambda: now[0])
    for i in range(20):
        now[0] += 3.0
        p.step(failed=1 if i == 4 else 0)
    p.close()
    lines = [r.getMessage() for r in caplog.records]
    assert lines[0] == "replicates: 20 to do"
    assert lines[1] == "replicates: 2/20 (10%), 6 s elapsed, about 54 s left"
    assert "replicates: 10/20 (50%), 1 failed, 30 s elapsed, about 30 s left" in lines
    assert lines[-1] == "replicates: 20/20 (100%), 1 failed, 1 min 00 s elapsed, done"
    assert len(lines) == 1 + 9 + 1  # start, 10% ... 90%, the end


def test_fewer_items_than_tenths_gives_a_line_per_item(caplog):
    caplog.set_level(logging.INFO, logger="emulant")
    seen = []
    p = Progress("outcomes", 3, callback=lambda d, t: seen.append((d, t)))
    for _ in range(3):
        p.step()
    p.close()
    assert seen == [(1, 3), (2, 3), (3, 3)]
    assert [r.getMessage().split(",")[0] for r in caplog.records[1:]] == [
        "outcomes: 1/3 (33%)", "outcomes: 2/3 (67%)", "outcomes: 3/3 (100%)"]


def test_long_durations_read_in_hours():
    assert progress_line("x", 1, 4, 3700.0).endswith("1 h 01 min elapsed, about 3 h 05 min left")
