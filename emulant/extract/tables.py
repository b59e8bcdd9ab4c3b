"""The extract: registry-style tables opened in place as DuckDB views (CONTRACTS §2).

`open_extract(path, protocol)` finds each table's file (``NAME.parquet``, ``NAME.csv`` or
``NAME.csv.gz``), applies the protocol's column renames and registers one view per table under
its contract name with contract column names and types (dates as DATE, ``person_id`` as one type
in every table). Event views (every table with a ``date`` column other than ``deaths``) exclude
rows dated before the person's birth or after their death, and ``deaths`` excludes deaths dated
before birth; the extract check (:func:`emulant.extract.check.check_extract`)
counts those rows, so none is kept or dropped silently.

``raw_<table>`` views hold every row with contract names and types, before that exclusion.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb

from emulant.errors import EmulantError
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
INTEGER_COLUMNS = ("days_supply",)
NUMBER_COLUMNS = ("value", "quantity")
DEFAULT_DAYS_SUPPLY = 30
# a text person_id is read as an integer only when every value is written like one (no leading
# zeros, so "007" and "7" stay two persons)
INTEGER_TEXT = r"-?(0|[1-9][0-9]*)"
_INTEGER_TYPES = ("TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT", "USMALLINT",
                  "UINTEGER", "UBIGINT", "UHUGEINT")

DEFAULT_DUCKDB = {"threads": 2, "memory_limit": "4GB", "temp_directory": None}


class ExtractError(EmulantError):
    """Raised with every problem found in an extract; ``problems`` is a list of one-line messages."""

    def __init__(self, problems: list[str], path: str | Path | None = None):
        self.problems = list(problems)
        self.path = str(path) if path is not None else None
        head = f"extract {self.path}: " if self.path else "extract: "
        super().__init__(head + f"{len(self.problems)} problem(s):\n  - "
                         + "\n  - ".join(self.problems))


@dataclass
class Extract:
    """An opened extract: a DuckDB connection holding one view per table."""

    path: Path
    con: duckdb.DuckDBPyConnection
    files: dict[str, Path] = field(default_factory=dict)  # table -> file
    columns: dict[str, list[str]] = field(default_factory=dict)  # table -> contract column names
    person_id_type: str = "VARCHAR"  # BIGINT or VARCHAR, the same in every view

    def has(self, table: str) -> bool:
        return table in self.files


@dataclass
class TableLayout:
    """How one file maps to its contract table: contract column -> file column, file types."""

    name: str
    file: Path
    file_columns: list[str]
    types: dict[str, str]  # file column -> DuckDB type as stored (VARCHAR for every CSV column)
    colmap: dict[str, str]  # contract column -> file column
    empty_file: bool = False  # a zero-byte file: no header at all

    @property
    def is_csv(self) -> bool:
        return not self.file.name.endswith(".parquet")

    def col(self, contract: str) -> str | None:
        return self.colmap.get(contract)


def find_tables(path: str | Path) -> dict[str, Path]:
    """Table name -> file, for every NAME.parquet / NAME.csv / NAME.csv.gz in the folder."""
    return {name: fs[0] for name, fs in find_table_files(path).items()}


def find_table_files(path: str | Path) -> dict[str, list[Path]]:
    """Table name -> every file that could hold it (more than one is an error of the check)."""
    p = Path(path)
    out: dict[str, list[Path]] = {}
    for f in sorted(p.iterdir()) if p.is_dir() else []:
        for suf in SUFFIXES:
            if f.name.endswith(suf) and f.is_file():
                out.setdefault(f.name[: -len(suf)], []).append(f)
                break
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
    con.execute("SET enable_progress_bar = false")
    return con


def q(name: str) -> str:
    """A quoted SQL identifier."""
    return '"' + name.replace('"', '""') + '"'


_q = q


def lit(value: str) -> str:
    """A quoted SQL string literal."""
    return "'" + str(value).replace("'", "''") + "'"


def scan(f: Path) -> str:
    if f.name.endswith(".parquet"):
        return f"read_parquet({lit(f.as_posix())})"
    return f"read_csv({lit(f.as_posix())}, header = true, all_varchar = true)"


def raw_relation(con: duckdb.DuckDBPyConnection, f: Path) -> str:
    """SQL text scanning the file as stored."""
    return scan(f)


def table_layout(con: duckdb.DuckDBPyConnection, name: str, f: Path,
                 renames: dict[str, str] | None = None) -> TableLayout:
    """Describe one file and map its columns to contract names (``renames``: contract -> file).

    A file column shadowed by a rename (the file has both ``code`` and ``atc`` while the protocol
    maps ``code: atc``) is left out. Raises ``duckdb.Error`` when the file cannot be read.
    """
    ren = dict(renames or {})
    if f.stat().st_size == 0:
        return TableLayout(name, f, [], {}, {}, empty_file=True)
    desc = con.execute(f"DESCRIBE SELECT * FROM {scan(f)}").fetchall()
    types = {r[0]: str(r[1]) for r in desc}
    back = {v: k for k, v in ren.items()}  # file column -> contract column
    colmap: dict[str, str] = {}
    for col in types:
        contract = back.get(col, col)
        if contract in ren and ren[contract] != col:
            continue  # shadowed by a rename
        colmap.setdefault(contract, col)
    return TableLayout(name, f, list(types), types, colmap)


def person_id_class(layout: TableLayout) -> str | None:
    """'integer' or 'string' for a Parquet person_id, None for CSV (text: decided by its values)."""
    col = layout.col("person_id")
    if col is None or layout.is_csv:
        return None
    t = layout.types[col].upper()
    if t in _INTEGER_TYPES:
        return "integer"
    if t == "VARCHAR":
        return "string"
    return t.lower()


def decide_person_id_type(con: duckdb.DuckDBPyConnection, layouts: dict[str, TableLayout]) -> str:
    """The one SQL type of ``person_id`` in every view: BIGINT or VARCHAR.

    The type stored in the Parquet files wins (persons' first); with CSV alone, BIGINT when every
    ``persons.person_id`` is written as an integer, else VARCHAR.
    """
    declared = [person_id_class(lay) for lay in layouts.values()]
    order = ([person_id_class(layouts["persons"])] if "persons" in layouts else []) + declared
    for c in order:
        if c == "integer":
            return "BIGINT"
        if c == "string":
            return "VARCHAR"
    per = layouts.get("persons")
    col = per.col("person_id") if per else None
    if col is None or per.empty_file:
        return "VARCHAR"
    n_text = con.execute(
        f"SELECT count(*) FILTER (WHERE NOT regexp_full_match({q(col)}, {lit(INTEGER_TEXT)})) "
        f"FROM {scan(per.file)}"
    ).fetchone()[0]
    return "BIGINT" if n_text == 0 else "VARCHAR"


def _select_list(layout: TableLayout, pid_type: str) -> tuple[list[str], list[str]]:
    sel, names = [], []
    for name, col in layout.colmap.items():
        expr = q(col)
        if name == "person_id":
            expr = f"CAST({expr} AS {pid_type})"
        elif name in DATE_COLUMNS.get(layout.name, ()) or name == "date":
            expr = f"CAST({expr} AS DATE)"
        elif name in INTEGER_COLUMNS:
            expr = f"CAST(COALESCE(CAST({expr} AS DOUBLE), {DEFAULT_DAYS_SUPPLY}) AS INTEGER)"
        elif name in NUMBER_COLUMNS:
            expr = f"CAST({expr} AS DOUBLE)"
        elif name == "code":
            expr = f"CAST({expr} AS VARCHAR)"
        sel.append(f"{expr} AS {q(name)}")
        names.append(name)
    if layout.name == "dispensings" and "days_supply" not in names:
        sel.append(f"{DEFAULT_DAYS_SUPPLY} AS days_supply")
        names.append("days_supply")
    return sel, names


def _empty_select(layout: TableLayout, pid_type: str) -> tuple[list[str], list[str]]:
    """Columns of a zero-byte file: the table's required columns, no rows."""
    names = list(REQUIRED_COLUMNS.get(layout.name, EVENT_REQUIRED))
    types = {"person_id": pid_type, "code": "VARCHAR", "value": "DOUBLE", "sex": "VARCHAR"}
    return [f"CAST(NULL AS {types.get(n, 'DATE')}) AS {q(n)}" for n in names], names


def is_event_table(table: str, columns: list[str]) -> bool:
    """Tables whose rows are dated events (everything with ``date`` but persons/coverage/deaths)."""
    return table not in REQUIRED_TABLES and "date" in columns


def open_extract(path: str | Path, protocol: Protocol | None = None,
                 settings: dict[str, Any] | None = None,
                 con: duckdb.DuckDBPyConnection | None = None) -> Extract:
    """Register one view per table with contract names and types; see the module docstring."""
    p = Path(path)
    con = con or connect(settings)
    files = find_tables(p)
    renames = dict(protocol.extract_columns) if protocol else {}
    layouts = {t: table_layout(con, t, f, renames.get(t)) for t, f in files.items()}
    pid_type = decide_person_id_type(con, layouts)
    ex = Extract(p, con, files, person_id_type=pid_type)
    for table, lay in layouts.items():
        if lay.empty_file:
            sel, names = _empty_select(lay, pid_type)
            src = "(SELECT 1) WHERE false"
        else:
            sel, names = _select_list(lay, pid_type)
            src = scan(lay.file)
        ex.columns[table] = names
        con.execute(f"CREATE OR REPLACE VIEW {q('raw_' + table)} AS SELECT {', '.join(sel)} FROM {src}")
    has_persons = "persons" in files and "birth_date" in ex.columns.get("persons", [])
    has_deaths = "deaths" in files and "date" in ex.columns.get("deaths", [])
    if has_deaths and has_persons:
        con.execute(
            "CREATE OR REPLACE VIEW deaths AS SELECT d.* FROM raw_deaths d "
            "JOIN (SELECT person_id, min(birth_date) AS birth_date FROM raw_persons GROUP BY 1) p "
            "ON p.person_id = d.person_id WHERE d.date >= p.birth_date"
        )
    for table in files:
        cols = ex.columns[table]
        if is_event_table(table, cols) and has_persons:
            death = ("LEFT JOIN (SELECT person_id, min(date) AS death_date FROM deaths GROUP BY 1) d "
                     "ON d.person_id = t.person_id" if has_deaths else "")
            dcond = "AND (d.death_date IS NULL OR t.date <= d.death_date)" if has_deaths else ""
            con.execute(
                f"CREATE OR REPLACE VIEW {q(table)} AS SELECT t.* FROM {q('raw_' + table)} t "
                f"JOIN (SELECT person_id, min(birth_date) AS birth_date FROM raw_persons GROUP BY 1) p "
                f"ON p.person_id = t.person_id {death} WHERE t.date >= p.birth_date {dcond}"
            )
        elif not (table == "deaths" and has_deaths and has_persons):
            con.execute(f"CREATE OR REPLACE VIEW {q(table)} AS SELECT * FROM {q('raw_' + table)}")
    return ex

