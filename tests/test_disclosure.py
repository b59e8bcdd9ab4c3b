"""Disclosure control: primary and secondary cell suppression, the attrition chain, curve grids.

Primary/secondary suppression is common practice in registry research and official statistics
(no single source). Expected values are hand computation. The property checks use hypothesis:
whatever the cells, no hidden small cell can be recovered by subtracting the shown cells from the
shown total.
"""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st

from emulant import disclosure as dc


def test_show_count_and_percent():
    assert dc.show_count(0, 5) == "0"
    assert [dc.show_count(n, 5) for n in (1, 2, 3, 4)] == ["<5"] * 4
    assert dc.show_count(5, 5) == "5"
    assert dc.show_count(12345, 5) == "12,345"
    assert dc.show_count(12, 5, suppressed=True) == dc.SECONDARY
    assert dc.show_count(float("nan"), 5) == ""
    assert dc.show_count(3, 10) == "<10"
    assert dc.show_percent(3, 30, 5) == ""  # the percentage of a small count is hidden too
    assert dc.show_percent(12, 30, 5) == "40.0%"  # hand computation: 12/30
    assert dc.show_percent(12, 30, 5, suppressed=True) == ""
    assert dc.show_percent(2, 4, 5) == ""


def test_suppress_cells_secondary():
    # hand computation: 15 + 12 + 3 = 30; hiding 3 alone leaves 30 - 27 = 3, so 12 goes too
    assert dc.suppress_cells([15, 12, 3], 5) == [False, True, True]
    # two small cells already protect each other
    assert dc.suppress_cells([20, 3, 4], 5) == [False, True, True]
    # nothing small: nothing hidden
    assert dc.suppress_cells([20, 10, 5], 5) == [False, False, False]
    # the complement cell is a positive one even when a zero cell is smaller
    assert dc.suppress_cells([0, 3, 9, 20], 5) == [False, True, True, False]
    # total not printed anywhere: no secondary suppression needed
    assert dc.suppress_cells([15, 12, 3], 5, total_shown=False) == [False, False, True]


def test_suppress_binary():
    assert dc.suppress_binary(3, 30, 5)  # small count
    assert dc.suppress_binary(27, 30, 5)  # small complement: 30 - 27 = 3
    assert not dc.suppress_binary(10, 30, 5)
    assert not dc.suppress_binary(0, 30, 5)


def test_attrition_chain_forward_and_backward():
    # hand computation: 120 -> 117 (3 excluded) -> 90: hide 117, then 27 (else 90 + 27 = 117)
    hr, hx = dc.suppress_attrition([500, 120, 117, 90, 60], [0, 380, 3, 27, 30], 5)
    assert hr == [False, False, True, False, False]
    assert hx == [False, False, True, True, False]
    # a small exclusion at the last step: cut backwards (the final n is printed elsewhere)
    hr, hx = dc.suppress_attrition([500, 120, 90, 87], [0, 380, 30, 3], 5)
    assert hr == [False, False, True, False]
    assert hx == [False, False, True, True]


def _recoverable(remaining, excluded, hr, hx, i) -> bool:
    """Can hidden excluded[i] be got exactly by one subtraction of shown cells?"""
    if not hr[i - 1] and not hr[i]:
        return True
    if hr[i] and i + 1 < len(remaining) and not hr[i + 1] and not hx[i + 1] and not hr[i - 1]:
        return True  # remaining[i] = remaining[i+1] + excluded[i+1]
    return hr[i - 1] and i >= 2 and not hr[i - 2] and not hx[i - 1] and not hr[i]


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(0, 40), min_size=2, max_size=7), st.integers(300, 400))
def test_attrition_no_small_exclusion_recoverable(excl, start):
    remaining = [start]
    for x in excl:
        remaining.append(remaining[-1] - x)
    excluded = [0, *excl]
    hr, hx = dc.suppress_attrition(remaining, excluded, 5)
    for i in range(1, len(remaining)):
        # every relation remaining[i-1] = remaining[i] + excluded[i] has 0 or >= 2 hidden cells
        assert hr[i - 1] + hr[i] + hx[i] != 1
        if dc.is_small(excluded[i], 5):
            assert hx[i] and not _recoverable(remaining, excluded, hr, hx, i)


@settings(max_examples=300, deadline=None)
@given(st.lists(st.integers(0, 60), min_size=2, max_size=8))
def test_cells_never_one_hidden(cells):
    hidden = dc.suppress_cells(cells, 5)
    for c, h in zip(cells, hidden, strict=True):
        if dc.is_small(c, 5):
            assert h
    # with the total shown, a single hidden cell could be subtracted back out
    assert sum(hidden) != 1


def test_masked_height_and_grid():
    assert dc.masked_height(3, 5) == 5.0
    assert dc.masked_height(7, 5) == 10.0
    assert dc.masked_height(0, 5) == 0.0
    days = list(range(0, 1096, 15))
    grid = dc.coarse_grid(days)
    # hand computation: 1095 / 90 + 1 > 13, so the step is 180 days: 0, 180, ..., 1080
    assert grid == [0.0, 180.0, 360.0, 540.0, 720.0, 900.0, 1080.0]
    assert dc.coarse_grid([0, 10, 20, 30]) == [0.0, 30.0]
    assert dc.coarse_grid(days, max_points=14)[:3] == [0.0, 90.0, 180.0]  # 13 times, 90 apart


def test_rule_text_names_min_cell():
    text = dc.rule_text(10)
    assert "1 to 9" in text and "<10" in text and "next smallest" in text


def test_count_changes_never_gives_a_small_change():
    """Then and now: a change below min_cell is shown as such and the previous count withheld;
    a suppressed count on either side hides the change (common practice, no single source)."""
    rows = dc.count_changes(["229", "224", "<5", "220", "100"], ["229", "222", "12", "—", "90"], 5)
    assert rows[0] == {"previous": "229", "current": "229", "change": "none"}
    assert rows[1] == {"previous": "—", "current": "222", "change": "fewer than 5 fewer"}
    assert rows[2]["change"] == "—" and rows[3]["change"] == "—"
    assert rows[4] == {"previous": "100", "current": "90", "change": "-10"}


def test_months_and_paths(tmp_path):
    assert dc.month("1950-12-12") == "1950-12" and dc.month(None) == ""
    assert dc.month_range("2010-01-05", "2023-12-31") == "2010-01 to 2023-12"
    f = tmp_path / "data" / "latest" / "persons.csv"
    assert dc.shown_path(f, project=tmp_path) == "data/latest/persons.csv"
    assert dc.shown_path(f, project=tmp_path / "elsewhere", extract=f.parent) == "latest/persons.csv"
    assert dc.shown_path(f, project=tmp_path / "elsewhere") == "persons.csv"
