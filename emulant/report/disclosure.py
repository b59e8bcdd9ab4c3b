"""Disclosure control for every count the report prints or draws.

The one rule (stated in the report, :data:`RULE`):

* **primary suppression**: a count from 1 to ``min_cell - 1`` is shown as ``<min_cell``
  (e.g. ``<5``) and its percentage is not shown;
* **secondary suppression**: where shown cells add up to a shown total, so that one suppressed
  cell could be recovered by subtraction, a second cell is suppressed too (the next smallest);
* a statistic computed from a suppressed count alone (the unweighted proportion of a category,
  its unweighted SMD, a crude risk in an arm with few events) is not shown either;
* risk curves and numbers at risk follow :mod:`emulant.report.curve_steps` (a drawn step pools
  at least ``min_cell`` events; a curve stops where fewer than ``min_cell`` remain at risk).

Primary and secondary cell suppression is common practice in registry research and official
statistics (no single source; e.g. the cell-suppression chapters of statistical-agency
disclosure handbooks describe both). All functions here are pure.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

SECONDARY = "—"  # how a secondarily suppressed cell is printed


def rule_text(min_cell: int) -> str:
    """The disclosure rule in words, with this run's ``min_cell``."""
    return (
        f"Every count from 1 to {min_cell - 1} (persons, events, numbers at risk, rows of an input "
        f"table, attrition, categories) is shown as \u201c<{min_cell}\u201d and its percentage is "
        f"not shown. Where the cells of a row or a column add up to a shown total, so that a "
        f"suppressed cell could be recovered by subtraction, the next smallest cell is suppressed "
        f"too and shown as \u201c{SECONDARY}\u201d. A statistic computed from a suppressed count "
        f"(a crude proportion, its unweighted SMD, a crude risk in an arm with fewer than "
        f"{min_cell} events) is not shown. In figures, suppressed counts are drawn hatched at the "
        f"next multiple of {min_cell}. The same rule applies to every table and figure label."
    )


def is_small(n: float | None, min_cell: int) -> bool:
    """True when ``n`` is a count in ``1 .. min_cell - 1`` (zero and missing are not small)."""
    if n is None or (isinstance(n, float) and math.isnan(n)):
        return False
    return 0 < n < min_cell


def show_count(n: float | None, min_cell: int, suppressed: bool = False) -> str:
    """Format one count under the rule.

    ``suppressed`` marks a secondarily suppressed cell (printed as :data:`SECONDARY`).
    """
    if n is None or (isinstance(n, float) and math.isnan(n)):
        return ""
    if is_small(n, min_cell):
        return f"<{min_cell}"
    if suppressed:
        return SECONDARY
    return f"{int(round(n)):,}"


def show_percent(n: float | None, total: float | None, min_cell: int, suppressed: bool = False,
                 digits: int = 1) -> str:
    """Percentage ``100 n / total``, or empty when the count or the total is suppressed."""
    if n is None or total is None or not total or suppressed:
        return ""
    if is_small(n, min_cell) or is_small(total, min_cell):
        return ""
    return f"{100.0 * n / total:.{digits}f}%"


def suppress_cells(counts: Sequence[float], min_cell: int, total_shown: bool = True) -> list[bool]:
    """Which cells of a set summing to a total must be hidden (primary and secondary).

    Parameters
    ----------
    counts : the cells (e.g. the levels of a categorical covariate in one arm).
    min_cell : the protocol's ``report.min_cell``.
    total_shown : whether the cells' sum is printed elsewhere (the arm's ``n``). When it is, a
        single hidden cell equals the total minus the shown cells, so a second one is hidden.

    Returns
    -------
    list of bool, True where the cell must not be printed exactly.

    Notes
    -----
    Primary: :math:`1 \\le n_i < m`. Secondary: if exactly one cell is hidden and the total is
    shown, the smallest remaining positive cell is hidden too (a zero cell only when no positive
    cell remains). Common practice in registry research, no single source.
    """
    hidden = [is_small(c, min_cell) for c in counts]
    if total_shown and sum(hidden) == 1 and len(counts) > 1:
        rest = [(c, i) for i, c in enumerate(counts) if not hidden[i]]
        positive = [(c, i) for c, i in rest if c > 0]
        pick = min(positive or rest)
        hidden[pick[1]] = True
    return hidden


def suppress_binary(count: float, total: float, min_cell: int) -> bool:
    """Whether a count shown beside its total must be hidden: when it or its complement is small.

    A 0/1 covariate (or the events of an arm) is printed as one count of a total; the complement
    ``total - count`` is then known, so it is protected too (the two-cell case of
    :func:`suppress_cells`).
    """
    return is_small(count, min_cell) or is_small(total - count, min_cell)


def suppress_attrition(remaining: Sequence[float], excluded: Sequence[float],
                       min_cell: int) -> tuple[list[bool], list[bool]]:
    """Hidden cells of an attrition table, where ``remaining[i-1] = remaining[i] + excluded[i]``.

    A small ``excluded[i]`` could be recovered from two consecutive ``remaining`` counts, so a
    second cell of that relation is hidden: ``remaining[i]`` (then, in the next relation, the
    hidden ``remaining[i]`` is protected by hiding ``excluded[i+1]``). At the last step the chain
    is cut backwards instead (``remaining[i-1]``, then ``excluded[i-1]``), because the final
    cohort size is printed elsewhere. A hidden ``remaining`` is protected by hiding the same
    row's ``excluded``. Repeated until every relation has zero or at least two hidden cells.

    Returns
    -------
    (hide_remaining, hide_excluded) : two lists of bool.
    """
    n = len(remaining)
    hr = [is_small(r, min_cell) for r in remaining]
    hx = [is_small(x, min_cell) for x in excluded]
    changed = True
    while changed:
        changed = False
        for i in range(1, n):
            if hr[i - 1] + hr[i] + hx[i] != 1:
                continue
            changed = True
            if hr[i - 1] or hr[i]:
                hx[i] = True
            elif i < n - 1:
                hr[i] = True
            else:
                hr[i - 1] = True
    return hr, hx


def masked_height(count: float, min_cell: int) -> float:
    """Height at which a hidden count is drawn: the next multiple of ``min_cell``.

    .. math:: h = m \\lceil n / m \\rceil
    """
    return float(min_cell * math.ceil(count / min_cell)) if count > 0 else 0.0


def coarse_grid(days: Sequence[float], max_points: int = 13) -> list[float]:
    """A coarse subset of curve days: about ``max_points`` evenly spaced, on days that exist.

    The step is the smallest of 30, 60, 90, 180, 365 days (or a multiple of 365) that keeps the
    number of grid times at most ``max_points``; each grid time is the last curve day at or before
    it, so the drawn curve only uses values the results file holds.
    """
    d = np.unique(np.asarray(list(days), dtype=float))
    if d.size == 0:
        return []
    top = float(d.max())
    step = 30.0
    for s in (30, 60, 90, 180, 365, 730, 1095):
        step = float(s)
        if top / s + 1 <= max_points:
            break
    out = []
    for g in np.arange(0.0, top + step / 2, step):
        at = d[d <= g + 1e-9]
        if at.size:
            out.append(float(at.max()))
    return sorted(set(out))

