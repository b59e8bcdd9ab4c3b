"""The one disclosure rule for everything that leaves the run folder.

The report, the design report, the files archived under ``reports/``, the ledger, the comparison
with the previous run, the rule logs and the command line's output all pass their counts, dates,
paths and person-level detail through this module; nothing else decides what may be shown.
Files under ``results/<study>/person_level/`` (:data:`PERSON_LEVEL_DIR`) are the only ones that
hold person identifiers with their dates; they stay in the results folder.

The rule (stated in the report and the README, :func:`rule_text`, :func:`sharing_text`):

* **primary suppression**: a count from 1 to ``min_cell - 1`` is shown as ``<min_cell``
  (e.g. ``<5``) and its percentage is not shown;
* **secondary suppression**: where shown cells add up to a shown total, so that one suppressed
  cell could be recovered by subtraction, a second cell is suppressed too (the next smallest);
* a statistic computed from a suppressed count alone (the unweighted proportion of a category,
  its unweighted SMD, a crude risk in an arm with few events) is not shown either;
* risk curves and numbers at risk follow :mod:`emulant.report.curve_steps` (a drawn step pools
  at least ``min_cell`` events; a curve stops where fewer than ``min_cell`` remain at risk);
* the comparison with the previous run shows a step's count then and now only where both were
  shown and their difference is zero or at least ``min_cell`` (:func:`count_changes`);
* no date of a single person: date ranges are rounded to the month (:func:`month`);
* no individual weight: weights are summarised by quantiles;
* no person identifier outside :data:`PERSON_LEVEL_DIR`; paths are shown relative to the project
  or to the extract's own folder (:func:`shown_path`).

Primary and secondary cell suppression is common practice in registry research and official
statistics (no single source; e.g. the cell-suppression chapters of statistical-agency
disclosure handbooks describe both). All functions here are pure.
"""

from __future__ import annotations

import datetime as dt
import math
import re
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

SECONDARY = "—"  # how a secondarily suppressed cell is printed
PERSON_LEVEL_DIR = "person_level"  # results/<study>/person_level/: the only person-level files
PERSON_LEVEL_NOTE = ("person-level: identifiers with their dates; keep in the results folder, "
                     "never share, archive or log")


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
        f"next multiple of {min_cell}. The comparison with the previous run gives a step's count "
        f"then and now only where both were shown and they differ by zero or at least {min_cell}; "
        f"a smaller change is shown as \u201cfewer than {min_cell}\u201d. " + sharing_text()
    )


def sharing_text() -> str:
    """The part of the rule about dates, weights, identifiers and paths."""
    return ("No date of a single person is shown: date ranges are rounded to the month. No "
            "individual weight is shown: weights are summarised by quantiles. Person identifiers "
            f"and their dates are kept only in the results folder's {PERSON_LEVEL_DIR}/ files, "
            "never in the report, the archive, the ledger, the logs or the terminal; paths are "
            "shown relative to the project or to the extract's own folder. The same rule applies "
            "to every table, figure label, archived file, log line and terminal line.")


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


# ----------------------------------------------------------------------------- dates, paths


def month(value: Any) -> str:
    """A date (``datetime.date`` or ISO text) rounded to its month, ``YYYY-MM``; "" when missing."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    if isinstance(value, dt.date):
        return value.strftime("%Y-%m")
    text = str(value).strip()
    return text[:7] if len(text) >= 7 and text[4] == "-" else ""


def month_range(first: Any, last: Any) -> str:
    """``YYYY-MM to YYYY-MM`` (or one month, or "")."""
    a, b = month(first), month(last)
    return f"{a} to {b}" if a and b and a != b else a or b


def shown_path(path: Any, project: str | Path | None = None, extract: str | Path | None = None) -> str:
    """``path`` relative to the project folder (default: the current folder) when inside it, else
    relative to the parent of the extract's folder (``latest/persons.parquet``), else its name."""
    if path is None or str(path) == "":
        return ""
    p = Path(str(path))
    base = Path(project) if project is not None else Path.cwd()
    tries = [base] + ([Path(extract).parent] if extract is not None else [])
    for root in tries:
        try:
            return str(p.resolve().relative_to(root.resolve()))
        except ValueError:
            continue
    return p.name


_EXAMPLES = re.compile(r"[;,] e\.g\. [^\n]*")


def without_person_examples(text: str, project: str | Path | None = None) -> str:
    """A message as it may reach a log or the terminal: its examples naming a ``person_id``
    ("; e.g. person_id 17: ...") left out, and the project folder's absolute path left off."""
    out = _EXAMPLES.sub(lambda m: "" if "person_id" in m.group(0) else m.group(0), str(text))
    base = str(Path(project) if project is not None else Path.cwd()).rstrip("/") + "/"
    return out.replace(base, "")


# ----------------------------------------------------------------------------- shared files


def shared_count(n: Any, min_cell: int) -> Any:
    """A count in a shared machine-readable file: the whole number, or the text ``<min_cell``."""
    if isinstance(n, str) or n is None or (isinstance(n, float) and math.isnan(n)):
        return n
    return f"<{min_cell}" if is_small(n, min_cell) else int(round(n))


def shown_attrition(remaining: Sequence[float], excluded: Sequence[float],
                    min_cell: int) -> list[tuple[str, str]]:
    """(remaining, excluded) of each attrition step as text under the chain-aware suppression of
    :func:`suppress_attrition`; the first step's ``excluded`` is ""."""
    hr, hx = suppress_attrition(remaining, excluded, min_cell)
    return [(show_count(r, min_cell, hr[i]).replace(",", ""),
             "" if i == 0 else show_count(excluded[i], min_cell, hx[i]).replace(",", ""))
            for i, r in enumerate(remaining)]


def parse_shown(text: Any) -> int | None:
    """The exact count behind a shown cell, or None when the cell is suppressed or empty."""
    if text is None or (isinstance(text, float) and math.isnan(text)):
        return None
    if isinstance(text, int | float | np.integer | np.floating):
        return int(text)
    t = str(text).replace(",", "").strip()
    return int(float(t)) if t and t.lstrip("-").replace(".", "", 1).isdigit() else None


def count_changes(previous: Sequence[Any], current: Sequence[Any], min_cell: int) -> list[dict[str, str]]:
    """Then-and-now rows of the same counts in two runs, each given as shown in its own run.

    A pair is printed with its change only when both counts were shown exactly and differ by zero
    or at least ``min_cell``. A smaller change is printed as "fewer than m more/fewer" and the
    previous count is withheld, so that the current table and this one do not give the change
    by subtraction; where either count was suppressed, the change is not shown.
    """
    out = []
    for p, c in zip(previous, current, strict=True):
        pv, cv = parse_shown(p), parse_shown(c)
        prev_txt = "" if p is None else str(p)
        cur_txt = "" if c is None else str(c)
        if pv is None or cv is None:
            change = "" if (p is None or c is None) else SECONDARY
        elif cv == pv:
            change = "none"
        elif abs(cv - pv) >= min_cell:
            change = f"{cv - pv:+,}"
        else:
            change = f"fewer than {min_cell} {'more' if cv > pv else 'fewer'}"
            prev_txt = SECONDARY
        out.append({"previous": prev_txt, "current": cur_txt, "change": change})
    return out
