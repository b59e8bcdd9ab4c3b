"""The extract: registry-style tables opened in place as DuckDB views (CONTRACTS §2).

`open_extract(path, protocol)` finds each table's file (``NAME.parquet``, ``NAME.csv`` or
``NAME.csv.gz``), applies the protocol's column renames and registers one view per table under
its contract name with contract column names and types (dates as DATE). Event views
(every table with a ``date`` column other than ``deaths``) exclude rows dated before the person's
birth or after their death; those rows are counted by the extract check, never kept silently.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb

from emulant.protocol import Protocol

SUFFIXES = (".parquet", ".csv", ".csv.gz")
REQUIRED_TABLES = ("persons", "coverage", "deaths")
REQUIRED_COLUMNS = {
    "persons": ("person_id", "birth_date", "sex"),
    "coverage": ("person_id", "start_date", "end_date"),
    "dispensings": ("person_id", "date", "code"),
    "diagnoses": ("person_id", "date", "code"),
    "measurements": ("person_id", "date", "code", "value"),
    "deaths": ("person_id", "date"),
}
EVENT_REQUIRED = ("person_id", "date", "code")
DATE_COLUMNS = {"persons": ("birth_date",), "coverage": ("start_date", "end_date")}

DEFAULT_DUCKDB = {"threads": 2, "memory_limit": "4GB", "temp_directory": None}


@dataclass
class Extract:
    """An opened extract: a DuckDB connection holding one view per table."""

    path: Path
    con: duckdb.DuckDBPyConnection
    files: dict[str, Path] = field(default_factory=dict)  # table -> file
    columns: dict[str, list[str]] = field(default_factory=dict)  # table -> contract column names

    def has(self, table: str) -> bool:
        return table in self.files


def find_tables(path: str | Path) -> dict[str, Path]:
    """Table name -> file, for every NAME.parquet / NAME.csv / NAME.csv.gz in the folder."""
    p = Path(path)
    out: dict[str, Path] = {}
    for f in sorted(p.iterdir()) if p.is_dir() else []:
        for suf in SUFFIXES:
            if f.name.endswith(suf) and f.is_file():
                out.setdefault(f.name[: -len(suf)], f)
    return out


def connect(settings: dict[str, Any] | None = None) -> duckdb.DuckDBPyConnection:
    """A DuckDB connection with threads, memory_limit and temp_directory set explicitly."""
    s = {**DEFAULT_DUCKDB, **(settings or {})}
    con = duckdb.connect(":memory:")
    con.execute(f"SET threads = {int(s['threads'])}")
    con.execute(f"SET memory_limit = '{s['memory_limit']}'")
    if s.get("temp_directory"):
        Path(s["temp_directory"]).mkdir(parents=True, exist_ok=True)
        con.execute(f"SET temp_directory = '{Path(s['temp_directory']).as_posix()}'")
    con.execute("SET preserve_insertion_order = false")
    return con


def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _scan(f: Path) -> str:
    lit = "'" + f.as_posix().replace("'", "''") + "'"
    if f.name.endswith(".parquet"):
        return f"read_parquet({lit})"
    return f"read_csv({lit}, header = true, all_varchar = true)"


def raw_relation(con: duckdb.DuckDBPyConnection, f: Path) -> str:
    """SQL text scanning the file as stored."""
    return _scan(f)


def open_extract(path: str | Path, protocol: Protocol | None = None,
                 settings: dict[str, Any] | None = None,
                 con: duckdb.DuckDBPyConnection | None = None) -> Extract:
    """Register one view per table with contract names and types; see the module docstring."""
    p = Path(path)
    con = con or connect(settings)
    files = find_tables(p)
    renames = dict(protocol.extract_columns) if protocol else {}
    ex = Extract(p, con, files)
    for table, f in files.items():
        src_cols = [r[0] for r in con.execute(f"DESCRIBE SELECT * FROM {_scan(f)}").fetchall()]
        ren = renames.get(table, {})
        back = {v: k for k, v in ren.items()}  # file column -> contract column
        sel, names = [], []
        for col in src_cols:
            name = back.get(col, col)
            expr = _q(col)
            if name in DATE_COLUMNS.get(table, ()) or name == "date":
                expr = f"CAST({expr} AS DATE)"
            elif name in ("days_supply",):
                expr = f"CAST({expr} AS INTEGER)"
            elif name in ("value", "quantity"):
                expr = f"CAST({expr} AS DOUBLE)"
            elif name == "code":
                expr = f"CAST({expr} AS VARCHAR)"
            sel.append(f"{expr} AS {_q(name)}")
            names.append(name)
        ex.columns[table] = names
        con.execute(f"CREATE OR REPLACE VIEW {_q('raw_' + table)} AS SELECT {', '.join(sel)} FROM {_scan(f)}")
    for table in files:
        cols = ex.columns[table]
        if table not in ("persons", "coverage", "deaths") and "date" in cols and "persons" in files:
            death = ("LEFT JOIN raw_deaths d ON d.person_id = t.person_id" if "deaths" in files else "")
            dcond = "AND (d.date IS NULL OR t.date <= d.date)" if "deaths" in files else ""
            con.execute(
                f"CREATE OR REPLACE VIEW {_q(table)} AS SELECT t.* FROM {_q('raw_' + table)} t "
                f"JOIN raw_persons p ON p.person_id = t.person_id {death} "
                f"WHERE t.date >= p.birth_date {dcond}"
            )
        else:
            con.execute(f"CREATE OR REPLACE VIEW {_q(table)} AS SELECT * FROM {_q('raw_' + table)}")
    return ex
