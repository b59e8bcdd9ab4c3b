"""The extract check (CONTRACTS §2 and the warnings of §3a), in DuckDB SQL over the files in place.

:func:`check_extract` collects every problem before raising :class:`~emulant.extract.ExtractError`,
so a user sees them all at once. Each message names the table, its file, the column (with the
file's own column name when the protocol renames it), a few example ``person_id`` values and
what was expected. Parse checks use ``TRY_CAST`` on the file as stored (CSV read as text), so a
bad value is found and reported instead of stopping the scan. Each table is scanned a few times
(one aggregate pass, one join pass, one hash pass), never pulled into Python.
"""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Any

import duckdb

from emulant.disclosure import month
from emulant.extract.tables import (
    DATE_COLUMNS,
    EVENT_REQUIRED,
    INTEGER_COLUMNS,
    INTEGER_TEXT,
    NUMBER_COLUMNS,
    REQUIRED_COLUMNS,
    REQUIRED_TABLES,
    SUFFIXES,
    ExtractError,
    TableLayout,
    connect,
    decide_person_id_type,
    find_table_files,
    is_event_table,
    lit,
    person_id_class,
    q,
    scan,
    table_layout,
)
from emulant.protocol import Protocol, outcome_name

N_EXAMPLES = 3  # examples per problem
N_IMPLAUSIBLE_EXAMPLES = 5  # examples per table of rows dated before birth or after death


def sha256_file(path: str | Path, chunk: int = 1 << 20) -> str:
    """SHA-256 of a file, read in chunks (never the whole file in memory)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            h.update(block)
    return h.hexdigest()


def try_cast(lay: TableLayout, contract: str, sql_type: str) -> str:
    """``TRY_CAST`` of a contract column to ``sql_type``, NULL where the value does not parse.

    A text column is wrapped in ``trim()``: DuckDB 2.0 pushes a bare cast of a CSV column into
    the CSV reader, which then fails on the first bad value instead of yielding NULL (seen here
    with duckdb 2.0.1).
    """
    col = q(lay.col(contract))
    if lay.types.get(lay.col(contract), "").upper() == "VARCHAR":
        col = f"trim({col})"
    return f"TRY_CAST({col} AS {sql_type})"


def _where(lay: TableLayout, contract: str | None = None) -> str:
    head = f"table {lay.name} ({lay.file.name})"
    if contract is None:
        return head
    col = lay.col(contract)
    return head + f", column {contract}" + (f" (file column {col})" if col and col != contract else "")


def _expected_files(table: str) -> str:
    return ", ".join(table + s for s in SUFFIXES)


def _required(table: str) -> tuple[str, ...]:
    return REQUIRED_COLUMNS.get(table, EVENT_REQUIRED)


def _date_columns(lay: TableLayout) -> list[str]:
    names = DATE_COLUMNS.get(lay.name, ("date",))
    return [c for c in names if lay.col(c)]


def _fmt(v: Any) -> str:
    return "(empty)" if v is None else repr(v) if isinstance(v, str) else str(v)


def _pid(v: Any) -> str:
    return "(empty)" if v is None else str(v)


def _examples(con, lay: TableLayout, cond: str, value: str | None) -> str:
    """A few 'person_id X: value' examples of the rows meeting ``cond`` (SQL on the file)."""
    pid = lay.col("person_id")
    pid_sql = q(pid) if pid else "NULL"
    val_sql = value or "NULL"
    rows = con.execute(
        f"SELECT {pid_sql}, {val_sql} FROM {scan(lay.file)} WHERE {cond} "
        f"ORDER BY 1 NULLS FIRST LIMIT {N_EXAMPLES}"
    ).fetchall()
    if value is None:
        return ", ".join(f"person_id {_pid(r[0])}" for r in rows)
    return ", ".join(f"person_id {_pid(r[0])}: {_fmt(r[1])}" for r in rows)


def _layouts(con, path: Path, protocol: Protocol | None, problems: list[str]) -> dict[str, TableLayout]:
    renames = dict(protocol.extract_columns) if protocol else {}
    found = find_table_files(path)
    layouts: dict[str, TableLayout] = {}
    for table, files in found.items():
        if len(files) > 1:
            problems.append(f"table {table}: more than one file ({', '.join(f.name for f in files)}); "
                            "expected exactly one")
        try:
            layouts[table] = table_layout(con, table, files[0], renames.get(table))
        except duckdb.Error as exc:
            msg = str(exc).strip().splitlines()[0]
            problems.append(f"table {table} ({files[0].name}): the file could not be read ({msg})")
    for table in REQUIRED_TABLES:
        if table not in found:
            problems.append(f"table {table} is missing: expected one of {_expected_files(table)} in {path}")
    for table, ren in renames.items():
        if table not in found:
            problems.append(f"extract_columns.{table}: no table {table} in the extract "
                            f"(expected one of {_expected_files(table)})")
            continue
        lay = layouts.get(table)
        for contract, col in ren.items():
            if lay is not None and not lay.empty_file and col not in lay.types:
                problems.append(f"{_where(lay)}: column '{col}' (extract_columns.{table}.{contract}) "
                                f"is not in the file; its columns are {', '.join(lay.file_columns)}")
    return layouts


def _column_problems(layouts: dict[str, TableLayout], problems: list[str]) -> None:
    for table, lay in layouts.items():
        if lay.empty_file:
            if table != "deaths":
                problems.append(f"{_where(lay)}: the file is empty; expected a header row with "
                                f"{', '.join(_required(table))}")
            continue
        for col in _required(table):
            if lay.col(col) is None:
                problems.append(f"{_where(lay)}: required column {col} is missing "
                                f"(columns: {', '.join(lay.file_columns)})")


def _referenced_concepts(protocol: Protocol) -> list[str]:
    names = [a.initiate for a in protocol.strategies.arms] + [protocol.strategies.index or ""]
    names += [c.concept for c in (*protocol.eligibility.require, *protocol.eligibility.exclude)]
    names += [outcome_name(o) for o in protocol.outcomes.all()] + list(protocol.outcomes.competing)
    names += [c.concept for c in protocol.covariates if c.concept]
    return [n for n in dict.fromkeys(names) if n in protocol.concepts]


def _protocol_problems(protocol: Protocol, layouts: dict[str, TableLayout], problems: list[str]) -> None:
    for name, concept in protocol.concepts.items():
        if concept.source == "deaths":
            continue  # the built-in 'death'; a missing deaths table is reported already
        lay = layouts.get(concept.source)
        if lay is None:
            problems.append(f"concepts.{name}.source: table {concept.source} is not in the extract "
                            f"(expected one of {_expected_files(concept.source)})")
            continue
        for col, _values in concept.where:
            if not lay.empty_file and lay.col(col) is None:
                problems.append(f"concepts.{name}.where: column {col} is not in {_where(lay)} "
                                f"(columns: {', '.join(lay.colmap)})")
    persons = layouts.get("persons")
    for cov in protocol.covariates:
        if cov.source and cov.source not in layouts:
            problems.append(f"covariates ({cov.name}).source: table {cov.source} is not in the extract "
                            f"(expected one of {_expected_files(cov.source)})")
        if cov.attribute and persons is not None and persons.col(cov.attribute) is None:
            problems.append(f"covariates ({cov.name}).attribute: column {cov.attribute} is not in "
                            f"{_where(persons)} (columns: {', '.join(persons.colmap)})")


def _person_id_problems(layouts: dict[str, TableLayout], problems: list[str]) -> None:
    """Parquet person_id types that differ between tables (CSV values are checked in the scan)."""
    classes = {t: person_id_class(lay) for t, lay in layouts.items() if lay.col("person_id")}
    declared = {t: c for t, c in classes.items() if c is not None}
    for t, c in declared.items():
        if c not in ("integer", "string"):
            problems.append(f"{_where(layouts[t], 'person_id')}: stored as {c.upper()}; "
                            "expected a string or an integer")
    kinds = {c for c in declared.values() if c in ("integer", "string")}
    if len(kinds) > 1:
        desc = "; ".join(f"{t}: {c}" for t, c in declared.items())
        problems.append(f"person_id is not the same type in every table ({desc}); expected one type")


def _scan_table(con, lay: TableLayout, pid_type: str, problems: list[str]) -> dict[str, Any]:
    """One aggregate pass: rows, date ranges, and the counts of every per-row problem."""
    checks: list[tuple[str, str, str | None, str]] = []  # (condition, column, value sql, message)
    pid = lay.col("person_id")
    if pid:
        checks.append((f"{q(pid)} IS NULL", "person_id", None, "empty value(s); expected a person_id"))
    if pid and lay.is_csv and pid_type == "BIGINT":
        checks.append((f"{q(pid)} IS NOT NULL AND NOT regexp_full_match({q(pid)}, {lit(INTEGER_TEXT)})",
                       "person_id", q(pid), "value(s) are not integers, but person_id is an integer "
                       "in the other tables (the same type in every table)"))
    dates = _date_columns(lay)
    for c in dates:
        col = q(lay.col(c))
        checks.append((f"{col} IS NULL", c, None, "empty date(s); expected YYYY-MM-DD"))
        checks.append((f"{col} IS NOT NULL AND {try_cast(lay, c, 'DATE')} IS NULL", c, col,
                       "value(s) are not dates; expected YYYY-MM-DD"))
    if "code" in _required(lay.name) and lay.col("code"):
        checks.append((f"{q(lay.col('code'))} IS NULL", "code", None, "empty code(s); expected a code"))
    for c in (*INTEGER_COLUMNS, *NUMBER_COLUMNS):
        if not lay.col(c):
            continue
        col = q(lay.col(c))
        num = try_cast(lay, c, "DOUBLE")
        if c in INTEGER_COLUMNS:
            checks.append((f"{col} IS NOT NULL AND ({num} IS NULL OR {num} <> floor({num}))", c, col,
                           "value(s) are not whole numbers; expected an integer > 0"))
            checks.append((f"{num} <= 0", c, col, "value(s) are <= 0; expected an integer > 0"))
        else:
            checks.append((f"{col} IS NOT NULL AND ({num} IS NULL OR NOT isfinite({num}))", c, col,
                           "value(s) are not numbers; expected a number"))
    if lay.name == "coverage" and lay.col("start_date") and lay.col("end_date"):
        s, e = (try_cast(lay, x, "DATE") for x in ("start_date", "end_date"))
        checks.append((f"{e} < {s}", "end_date", f"CAST({q(lay.col('start_date'))} AS VARCHAR) || ' to ' || "
                       f"CAST({q(lay.col('end_date'))} AS VARCHAR)", "period(s) end before they start; expected "
                       "end_date >= start_date"))
    aggs = ["count(*)"] + [f"count(*) FILTER (WHERE {cond})" for cond, *_ in checks]
    for c in dates:
        aggs += [f"min({try_cast(lay, c, 'DATE')})", f"max({try_cast(lay, c, 'DATE')})"]
    row = con.execute(f"SELECT {', '.join(aggs)} FROM {scan(lay.file)}").fetchone()
    for (cond, contract, value, msg), n in zip(checks, row[1:1 + len(checks)], strict=True):
        if n:
            problems.append(f"{_where(lay, contract)}: {n} {msg}; e.g. {_examples(con, lay, cond, value)}")
    ranges = row[1 + len(checks):]
    mins = {c: ranges[2 * i] for i, c in enumerate(dates)}
    maxs = {c: ranges[2 * i + 1] for i, c in enumerate(dates)}
    return {"rows": int(row[0]), "mins": mins, "maxs": maxs}


def _duplicates(con, lay: TableLayout, what: str, problems: list[str]) -> None:
    pid = lay.col("person_id")
    if pid is None or lay.empty_file:
        return
    sql = (f"SELECT {q(pid)}, count(*) AS n FROM {scan(lay.file)} WHERE {q(pid)} IS NOT NULL "
           f"GROUP BY 1 HAVING count(*) > 1")
    n, ex = con.execute(f"SELECT count(*), list(struct_pack(id := {q(pid)}, n := n) ORDER BY {q(pid)}) "
                        f"FROM ({sql})").fetchone()
    if n:
        shown = ", ".join(f"person_id {_pid(d['id'])} ({d['n']} rows)" for d in ex[:N_EXAMPLES])
        problems.append(f"{_where(lay, 'person_id')}: {n} person_id value(s) appear more than once; "
                        f"expected {what}; e.g. {shown}")


def _typed(lay: TableLayout, pid_type: str, with_date: bool) -> str:
    cols = [f"{try_cast(lay, 'person_id', pid_type)} AS person_id",
            f"{q(lay.col('person_id'))} IS NULL AS pid_null"]
    if with_date:
        cols.append(f"{try_cast(lay, 'date', 'DATE')} AS date")
    return f"(SELECT {', '.join(cols)} FROM {scan(lay.file)})"


def _join_checks(con, layouts: dict[str, TableLayout], pid_type: str, problems: list[str]) -> dict:
    """Rows whose person is not in persons (a problem); rows dated before birth or after death."""
    per = layouts.get("persons")
    if per is None or per.empty_file or not per.col("person_id") or not per.col("birth_date"):
        return {}
    con.execute(
        f"CREATE OR REPLACE TEMP TABLE _chk_persons AS SELECT {try_cast(per, 'person_id', pid_type)} "
        f"AS person_id, min({try_cast(per, 'birth_date', 'DATE')}) AS birth_date "
        f"FROM {scan(per.file)} GROUP BY 1")
    dth = layouts.get("deaths")
    has_deaths = dth is not None and not dth.empty_file and bool(dth.col("person_id")) and bool(dth.col("date"))
    if has_deaths:  # as the deaths view: deaths dated before birth do not count
        con.execute(
            f"CREATE OR REPLACE TEMP TABLE _chk_deaths AS SELECT d.person_id, min(d.date) AS death_date "
            f"FROM {_typed(dth, pid_type, True)} d JOIN _chk_persons p ON p.person_id = d.person_id "
            "WHERE d.date >= p.birth_date GROUP BY 1")
    implausible: dict[str, Any] = {}
    for table, lay in layouts.items():
        if table == "persons" or lay.empty_file or not lay.col("person_id"):
            continue
        dated = lay.col("date") is not None and (table == "deaths" or is_event_table(table, list(lay.colmap)))
        after = dated and has_deaths and table != "deaths"
        t = _typed(lay, pid_type, dated)
        src = (f"{t} t LEFT JOIN _chk_persons p ON p.person_id = t.person_id "
               + ("LEFT JOIN _chk_deaths d ON d.person_id = t.person_id " if after else ""))
        bb = "t.date < p.birth_date" if dated else "false"
        ad = "t.date > d.death_date" if after else "false"
        orphan = "NOT t.pid_null AND t.person_id IS NOT NULL AND p.person_id IS NULL"
        reason = f"CASE WHEN {bb} THEN 'before_birth' ELSE 'after_death' END"
        ex_sql = (f"arg_min(struct_pack(person_id := t.person_id, date := t.date, reason := {reason}), "
                  f"struct_pack(a := t.person_id, b := t.date), {N_IMPLAUSIBLE_EXAMPLES}) "
                  f"FILTER (WHERE {bb} OR {ad})" if dated else "NULL")
        n_orphan, n_bb, n_ad, examples = con.execute(  # one pass: counts and examples together
            f"SELECT count(*) FILTER (WHERE {orphan}), count(*) FILTER (WHERE {bb}), "
            f"count(*) FILTER (WHERE {ad}), {ex_sql} FROM {src}").fetchone()
        if n_orphan:
            ids = con.execute(f"SELECT DISTINCT t.person_id FROM {src} WHERE {orphan} ORDER BY 1 "
                              f"LIMIT {N_EXAMPLES}").fetchall()
            problems.append(f"{_where(lay, 'person_id')}: {n_orphan} row(s) whose person_id is not in "
                            f"table persons; e.g. {', '.join('person_id ' + _pid(r[0]) for r in ids)}")
        if dated:
            implausible[table] = {
                "before_birth": int(n_bb), "after_death": int(n_ad),
                "examples": [{"person_id": e["person_id"], "date": e["date"].isoformat(),
                              "reason": e["reason"]} for e in examples or []],
            }
    return implausible


def _coverage_warnings(protocol: Protocol) -> list[str]:
    cbd = protocol.eligibility.coverage_before_days
    out = []
    note = (f"reaches further back than eligibility.coverage_before_days ({cbd}); records there "
            "may be unobserved")
    for key, crits in (("eligibility.require", protocol.eligibility.require),
                       ("eligibility.exclude", protocol.eligibility.exclude)):
        for i, c in enumerate(crits):
            if c.window[0] < -cbd:
                out.append(f"{key}[{i}] ({c.concept}): window [{c.window[0]}, {c.window[1]}] {note}")
    for cov in protocol.covariates:
        if cov.window and cov.window[0] < -cbd:
            out.append(f"covariates ({cov.name}): window [{cov.window[0]}, {cov.window[1]}] {note}")
    if protocol.strategies.washout_days > cbd:
        out.append(f"strategies.washout_days ({protocol.strategies.washout_days}) {note}")
    return out


def _end_warnings(protocol: Protocol, last_dates: dict[str, Any]) -> list[str]:
    end = protocol.follow_up.administrative_end
    if end is None:
        return []
    used = [protocol.concepts[c].source for c in _referenced_concepts(protocol)]
    used += [c.source for c in protocol.covariates if c.source] + ["coverage"]
    out = []
    for table in dict.fromkeys(used):
        last = last_dates.get(table)
        if last is not None and last < end:
            out.append(f"follow_up.administrative_end {end} is later than the last record of table "
                       f"{table} (in {month(last)}); the extract may be incomplete there")
    return out


def check_extract(path: str | Path, protocol: Protocol | None = None,
                  settings: dict[str, Any] | None = None) -> dict[str, Any]:
    """Check an extract against CONTRACTS §2 (and the protocol, when given).

    Returns the ``extract_check.json`` content: ``extract``, ``person_id_type``, ``tables``
    (file, sha256, rows, columns, date_min, date_max per table), ``implausible`` (rows dated
    before birth or after death per dated table: counts and examples; the views of
    :func:`~emulant.extract.open_extract` exclude them) and ``warnings`` (CONTRACTS §3a).
    Raises :class:`~emulant.extract.ExtractError` listing every problem.
    """
    p = Path(path)
    if not p.is_dir():
        raise ExtractError([f"extract folder {p} does not exist or is not a folder"], p)
    problems: list[str] = []
    con = connect(settings)
    try:
        layouts = _layouts(con, p, protocol, problems)
        _column_problems(layouts, problems)
        if protocol is not None:
            _protocol_problems(protocol, layouts, problems)
        pid_type = decide_person_id_type(con, layouts)
        _person_id_problems(layouts, problems)
        tables: dict[str, Any] = {}
        last_dates: dict[str, Any] = {}
        for table, lay in layouts.items():
            stats = (_scan_table(con, lay, pid_type, problems) if not lay.empty_file
                     else {"rows": 0, "mins": {}, "maxs": {}})
            mins = [v for v in stats["mins"].values() if v is not None]
            maxs = [v for v in stats["maxs"].values() if v is not None]
            last = stats["maxs"].get("end_date" if table == "coverage" else "date")
            if last is not None:
                last_dates[table] = last
            tables[table] = {
                "file": str(lay.file), "sha256": sha256_file(lay.file), "rows": stats["rows"],
                "columns": list(lay.colmap),
                "date_min": min(mins).isoformat() if mins else None,
                "date_max": max(maxs).isoformat() if maxs else None,
            }
        if "persons" in layouts:
            _duplicates(con, layouts["persons"], "one row per person", problems)
        if "deaths" in layouts:
            _duplicates(con, layouts["deaths"], "at most one death per person", problems)
        implausible = _join_checks(con, layouts, pid_type, problems)
    finally:
        con.close()
    if problems:
        raise ExtractError(problems, p)
    warnings = _coverage_warnings(protocol) + _end_warnings(protocol, last_dates) if protocol else []
    return {"extract": str(p), "person_id_type": pid_type, "tables": tables,
            "implausible": implausible, "warnings": warnings}
