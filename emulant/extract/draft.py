"""A first protocol draft written from the user's own extract (``emulant draft``).

The extract is checked first (the same checks as a run); the draft then lists, as comments, the
tables and columns found, their date ranges and, for each event source, its most frequent code
prefixes among those held by at least ``min_cell`` persons (fewer are never printed). The keys are
the two-arm initiators design with a placeholder for every required key and its meaning taken
from the protocol's key table; the concepts' ``codes: []`` are left for the user to fill, and the
parser says so until they are.
"""

from __future__ import annotations

import datetime as dt
import re
from pathlib import Path
from typing import Any

from emulant.disclosure import month, show_count, shown_path
from emulant.extract.check import check_extract
from emulant.extract.tables import REQUIRED_TABLES, open_extract, q
from emulant.protocol.keys import BY_PATH


def code_prefixes(con, table: str, length: int, min_cell: int, top: int) -> list[tuple[str, int, int]]:
    """``(prefix, persons, records)`` of the ``top`` most frequent code prefixes of ``length``
    characters held by at least ``min_cell`` persons, most persons first."""
    rows = con.execute(
        f"SELECT left(CAST(code AS VARCHAR), {int(length)}) AS prefix, count(DISTINCT person_id) AS persons, "
        f"count(*) AS records FROM {q(table)} WHERE code IS NOT NULL GROUP BY 1 "
        f"HAVING count(DISTINCT person_id) >= {int(min_cell)} ORDER BY persons DESC, prefix LIMIT {int(top)}"
    ).fetchall()
    return [(str(p), int(n), int(r)) for p, n, r in rows]


def summarise(path: str | Path, min_cell: int = 5, prefix_length: int = 3, top: int = 10,
              settings: dict[str, Any] | None = None) -> dict[str, Any]:
    """What the draft says about the extract: tables, columns, date ranges, code prefixes."""
    check = check_extract(path, None, settings)
    ex = open_extract(path, None, settings)
    try:
        sources = {}
        for table, info in check["tables"].items():
            if table not in REQUIRED_TABLES and "code" in info["columns"] and "date" in info["columns"]:
                sources[table] = code_prefixes(ex.con, table, prefix_length, min_cell, top)
        persons = ex.con.execute("SELECT count(*) FROM persons").fetchone()[0]
        attrs = [c for c in check["tables"]["persons"]["columns"] if c not in ("person_id", "birth_date", "sex")]
        levels = {c: ex.con.execute(f"SELECT count(DISTINCT {q(c)}) FROM persons").fetchone()[0] for c in attrs}
    finally:
        ex.con.close()
    return {"check": check, "sources": sources, "persons": int(persons), "attributes": levels,
            "min_cell": min_cell, "prefix_length": prefix_length}


def _id(path: Path) -> str:
    s = re.sub(r"[^a-z0-9-]+", "-", path.resolve().name.lower()).strip("-")
    return s or "my-study"


def _meaning(path: str) -> str:
    return BY_PATH[path].meaning


def _shift(day: str | None, years: int) -> str | None:
    if not day:
        return None
    d = dt.date.fromisoformat(day)
    try:
        return d.replace(year=d.year + years).isoformat()
    except ValueError:  # 29 February
        return (d.replace(day=28, year=d.year + years)).isoformat()


def draft_text(summary: dict[str, Any], extract: str | Path) -> str:
    """The commented protocol draft (YAML text)."""
    check, sources, m = summary["check"], summary["sources"], summary["min_cell"]
    tables = check["tables"]
    drugs = "dispensings" if "dispensings" in sources else next(iter(sources), "dispensings")
    events = "diagnoses" if "diagnoses" in sources else next(iter(sources), "diagnoses")
    starts = [tables[t]["date_min"] for t in sources if tables[t]["date_min"]]
    ends = [tables[t]["date_max"] for t in sources if tables[t]["date_max"]]
    first, last = (max(starts) if starts else None), (min(ends) if ends else None)
    # by month: no date of a single person (emulant.disclosure)
    entry_start = f"{month(_shift(first, 1))}-01" if first else "YYYY-MM-DD"
    entry_end = f"{month(_shift(last, -1))}-01" if last else "YYYY-MM-DD"
    L: list[str] = [
        "# yaml-language-server: $schema=protocol.schema.json",
        f"# A first protocol draft for the extract {shown_path(extract)}, written by `emulant draft`.",
        "# Fill in every `codes: []` (and check every value), then run",
        f"#   emulant check --extract {shown_path(extract)} --protocol THIS_FILE",
        "# `emulant schema > protocol.schema.json` beside this file lets an editor complete keys;",
        "# every key is described in the project's docs/protocol.md.",
        "#",
        f"# The extract: {show_count(summary['persons'], m)} persons; person_id read as {check['person_id_type']}.",
        "#   table          rows        first month  last month  columns",
    ]
    for t, v in tables.items():
        L.append(f"#   {t:<14} {show_count(v['rows'], m):>10}  {month(v['date_min']):<11}  "
                 f"{month(v['date_max']):<10}  {', '.join(v['columns'])}")
    L.append("#")
    L.append(f"# Most frequent code prefixes ({summary['prefix_length']} characters) of each event source, "
             f"with the persons holding them (only prefixes held by at least {m} persons):")
    for t, rows in sources.items():
        shown = ", ".join(f"{p} ({n:,})" for p, n, _ in rows) or f"none held by {m} or more persons"
        L.append(f"#   {t}: {shown}")
    L += [
        "",
        "study:",
        f"  id: {_id(Path(extract))}   # {_meaning('study.id')}, [a-z0-9-]+",
        "  title: ''                 # " + _meaning("study.title"),
        "  question: ''              # " + _meaning("study.question"),
        "  target_trial: {}          # " + _meaning("study.target_trial"),
        "",
        "# " + _meaning("concepts") + ".",
        "# codes: a list, or a CSV file with a `code` column; match: prefix (default) or exact.",
        "concepts:",
        f"  treatment_a: {{source: {drugs}, codes: []}}   # the first arm's starting records",
        f"  treatment_b: {{source: {drugs}, codes: []}}   # the second arm's starting records",
        f"  condition:   {{source: {events}, codes: []}}   # the condition that makes a person eligible",
        f"  outcome:     {{source: {events}, codes: []}}   # the outcome",
        "",
        "eligibility:",
        f"  entry: {{start: {entry_start}, end: {entry_end}}}   # {_meaning('eligibility.entry')}",
        "  age: {min: 18, max: null}   # " + _meaning("eligibility.age"),
        "  coverage_before_days: 365   # " + _meaning("eligibility.coverage_before_days"),
        "  require: [{concept: condition, window: [-1825, 0]}]   # " + _meaning("eligibility.require"),
        "  exclude: [{concept: outcome, window: [-1825, 0]}]     # " + _meaning("eligibility.exclude"),
        "",
        "# The design: two arms of initiators (new users, active comparator); time zero is the first",
        "# record of either arm's concept inside the entry window.",
        "strategies:",
        "  arms:",
        "    treatment_a: {initiate: treatment_a}",
        "    treatment_b: {initiate: treatment_b}",
        "    # staying on a strategy, for contrasts [intention_to_treat, per_protocol]:",
        "    # treatment_a: {initiate: treatment_a, sustain: {gap_days: 60}}",
        "  treated: treatment_a        # " + _meaning("strategies.treated"),
        "  washout_days: 365           # " + _meaning("strategies.washout_days"),
        "  same_day: exclude           # " + _meaning("strategies.same_day"),
        "",
        "follow_up:",
        "  max_days: 1095",
        f"  administrative_end: {last or 'null'}   # the last day every event source covers",
        "",
        "outcomes:",
        "  primary: outcome            # " + _meaning("outcomes.primary"),
        "  competing: [death]          # " + _meaning("outcomes.competing") if tables.get("deaths", {}).get("rows") else
        "  competing: []               # " + _meaning("outcomes.competing"),
        "  # a measured outcome instead: primary: {measure: CONCEPT, at_day: 365, tolerance_days: 30}",
        "",
        "covariates:                   # " + _meaning("covariates"),
        "  - {name: age, builtin: age}",
        "  - {name: sex, builtin: sex}",
        "  - {name: entry_year, builtin: calendar_year}",
        "  - {name: n_drugs, source: " + drugs + ", window: [-365, -1], summary: distinct_codes}",
    ]
    for col, n in summary["attributes"].items():
        L.append(f"  # - {{name: {col}, attribute: {col}, kind: categorical}}   # persons column, {n} distinct values")
    L += [
        "",
        "estimands: [ATE, ATT]",
        "contrasts: [intention_to_treat]",
        "",
        "analysis:",
        "  horizons_days: [365, 730, 1095]",
        "  methods: [ipw, standardization, doubly_robust]",
        "  bootstrap: {replicates: 200, seed: 20261201}",
        "",
        "report:",
        f"  min_cell: {m}",
        "",
    ]
    return "\n".join(L)


def write_draft(extract: str | Path, out: str | Path, min_cell: int = 5, prefix_length: int = 3,
                settings: dict[str, Any] | None = None) -> dict[str, Any]:
    """Check the extract, write the draft to ``out`` (never over an existing file); returns the summary."""
    o = Path(out)
    summary = summarise(extract, min_cell, prefix_length, settings=settings)
    o.parent.mkdir(parents=True, exist_ok=True)
    tmp = o.with_name(o.name + ".tmp")
    tmp.write_text(draft_text(summary, extract), encoding="utf-8")
    tmp.replace(o)
    return summary

