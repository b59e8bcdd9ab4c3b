"""The shared form of each results file that leaves the run folder (the archive under ``reports/``).

Each function applies :mod:`emulant.disclosure` to one file's content and nothing else: counts
below ``min_cell`` (and the cells that would give them back by subtraction) become text, dates
are rounded to the month, paths are shown relative, person-level examples are left out. The
person-level part of the extract check goes to ``results/<study>/person_level/`` instead
(:func:`person_level_check`). All functions are pure and idempotent.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import pandas as pd

from emulant import disclosure as dc

ESTIMATE_COLUMNS = ("estimate", "ci_low", "ci_high", "se")


def shareable_check(check: Mapping[str, Any], min_cell: int | None = None,
                    project: str | Path | None = None) -> dict[str, Any]:
    """``extract_check.json`` as it may leave the results folder: paths relative, date ranges
    rounded to the month, no person-level examples; with ``min_cell``, counts below it as text."""
    extract = check.get("extract")
    out = {k: v for k, v in check.items() if k not in ("tables", "implausible")}
    out["extract"] = dc.shown_path(extract, project) if extract else extract
    tables = {}
    for name, t in (check.get("tables") or {}).items():
        t = dict(t)
        t["file"] = dc.shown_path(t.get("file"), project, extract)
        t["date_min"] = dc.month(t.get("date_min")) or None
        t["date_max"] = dc.month(t.get("date_max")) or None
        if min_cell is not None:
            t["rows"] = dc.shared_count(t.get("rows"), min_cell)
        tables[name] = t
    out["tables"] = tables
    imp = {}
    for name, v in (check.get("implausible") or {}).items():
        v = {k: x for k, x in v.items() if k != "examples"}
        if min_cell is not None:
            v = {k: dc.shared_count(x, min_cell) if k in ("before_birth", "after_death") else x
                 for k, x in v.items()}
        imp[name] = v
    out["implausible"] = imp
    return out


def person_level_check(check: Mapping[str, Any]) -> dict[str, Any]:
    """The person-level part of an extract check (examples of implausible rows), marked as such."""
    return {"note": dc.PERSON_LEVEL_NOTE,
            "implausible_examples": {name: list(v.get("examples") or [])
                                     for name, v in (check.get("implausible") or {}).items()}}


def shareable_attrition(df: pd.DataFrame, min_cell: int) -> pd.DataFrame:
    """``attrition.csv`` with ``remaining`` and ``excluded`` as the report's flow table shows them."""
    rem = pd.to_numeric(df["remaining"], errors="coerce")
    if df.empty or rem.isna().any():
        return df.copy()  # already in shared form (a suppressed cell is text)
    rem = [float(x) for x in rem]
    exc = [0.0 if pd.isna(x) else float(x) for x in pd.to_numeric(df["excluded"], errors="coerce")]
    shown = dc.shown_attrition(rem, exc, min_cell)
    out = df.copy()
    out["remaining"] = [r for r, _ in shown]
    out["excluded"] = [x for _, x in shown]
    if "persons" in df.columns:  # design sequential: the distinct persons are a chain of their own
        per = [float(x) for x in pd.to_numeric(df["persons"], errors="coerce")]
        left = [0.0] + [a - b for a, b in zip(per[:-1], per[1:], strict=True)]
        out["persons"] = [r for r, _ in dc.shown_attrition(per, left, min_cell)]
    return out


def _num(x: Any) -> float:
    v = pd.to_numeric(x, errors="coerce")
    return float(v) if pd.notna(v) else math.nan


def shareable_estimates(df: pd.DataFrame, min_cell: int) -> pd.DataFrame:
    """``estimates.csv`` with ``n`` and ``events`` under the rule; a crude (unadjusted) row whose
    events or non-events are suppressed loses its estimate too, as in the report."""
    out = df.copy().astype({c: object for c in ("n", "events") if c in df.columns})
    for i, r in df.iterrows():
        n, ev = _num(r.get("n")), _num(r.get("events"))
        hidden = not math.isnan(n) and not math.isnan(ev) and dc.suppress_binary(ev, n, min_cell)
        if "n" in df.columns and not math.isnan(n):
            out.at[i, "n"] = dc.shared_count(n, min_cell)
        if "events" in df.columns and not math.isnan(ev):
            out.at[i, "events"] = (dc.shared_count(ev, min_cell) if not hidden or dc.is_small(ev, min_cell)
                                   else dc.SECONDARY)
        if hidden and str(r.get("method")) == "unadjusted":
            for c in ESTIMATE_COLUMNS:
                if c in df.columns:
                    out.at[i, c] = None
    return out


def shareable_positivity(pos: Mapping[str, Any], min_cell: int) -> dict[str, Any]:
    """``positivity.json`` with the overlap histogram's counts, the arms' sizes and the count of
    extreme scores under the rule (hidden bins as text)."""
    out = dict(pos)
    out["n"] = {a: dc.shared_count(v, min_cell) for a, v in (pos.get("n") or {}).items()}
    bins = dict(pos.get("propensity_bins") or {})
    counts = {}
    for arm, cells in (bins.get("counts") or {}).items():
        if any(isinstance(c, str) for c in cells):
            counts[arm] = list(cells)
            continue
        hidden = dc.suppress_cells([float(c) for c in cells], min_cell, True)
        counts[arm] = [dc.show_count(c, min_cell, h) if h else int(c)
                       for c, h in zip(cells, hidden, strict=True)]
    bins["counts"] = counts
    out["propensity_bins"] = bins
    ext = dict(pos.get("extreme") or {})
    if "n" in ext:
        small = not isinstance(ext["n"], str) and dc.is_small(ext["n"], min_cell)
        ext["n"] = dc.shared_count(ext["n"], min_cell)
        if small:
            ext["share"] = None
    out["extreme"] = ext
    return out


def shareable_deviations(df: pd.DataFrame, min_cell: int) -> pd.DataFrame:
    """Deviation counts per arm (``persons`` = the reasons' counts + ``on_protocol_throughout``) under
    the rule: each row's cells with the row total shown, and the arms' persons, which add up to the
    shown cohort size."""
    parts = [c for c in df.columns if c not in ("arm", "persons")]  # reasons, then on protocol
    out = df.copy().astype({c: object for c in (*parts, "persons")})
    persons = [float(x) for x in df["persons"]]
    hidden_n = dc.suppress_cells(persons, min_cell, True)
    for i in range(len(df)):
        out.iat[i, df.columns.get_loc("persons")] = dc.show_count(persons[i], min_cell, hidden_n[i])
        cells = [float(df[c].iloc[i]) for c in parts]
        hidden = dc.suppress_cells(cells, min_cell, True)
        for c, v, h in zip(parts, cells, hidden, strict=True):
            out.iat[i, df.columns.get_loc(c)] = dc.show_count(v, min_cell, h)
    return out
