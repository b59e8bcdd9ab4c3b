"""In-memory extract tables of the invented registry, and their conversion to and from files.

Dates are held as whole days since 1970-01-01 (``int64``), persons as row indices ``0..n-1`` of
the persons table, codes and other text as indices into a small vocabulary. The files follow
CONTRACTS §2: ``person_id`` is text (``P0000001`` …), dates are ISO dates.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

NONE = np.int64(2**40)  # "no such day" (later than any date)
SETTINGS = ("inpatient", "outpatient")
SEXES = ("F", "M")


@dataclass
class Table:
    """One event table: ``cols`` maps a column to an array; text columns index ``levels``."""

    cols: dict[str, np.ndarray]
    levels: dict[str, np.ndarray] = field(default_factory=dict)  # text column -> vocabulary

    def __len__(self) -> int:
        return len(self.cols["person_id"])

    def take(self, idx: np.ndarray) -> Table:
        return Table({k: v[idx] for k, v in self.cols.items()}, self.levels)

    def text(self, col: str) -> np.ndarray:
        """The column as strings."""
        return self.levels[col][self.cols[col]] if col in self.levels else self.cols[col]


@dataclass
class Tables:
    """The extract: persons (birth, sex, attributes), deaths, coverage and event tables."""

    birth: np.ndarray
    sex: np.ndarray  # index into SEXES
    attributes: dict[str, tuple[np.ndarray, tuple[str, ...]]]  # name -> (index, levels)
    death: np.ndarray  # day of death, NONE when alive
    coverage: Table
    events: dict[str, Table]

    @property
    def n(self) -> int:
        return len(self.birth)


class Rows:
    """Collects rows of one event table in parts and concatenates them once."""

    def __init__(self, columns: dict[str, type]):
        self.columns = columns  # column -> numpy dtype
        self.parts: list[dict[str, np.ndarray]] = []

    def add(self, person: np.ndarray, date: np.ndarray, **cols) -> None:
        person = np.asarray(person, dtype=np.int64)
        part = {"person_id": person, "date": np.broadcast_to(np.asarray(date, np.int64),
                                                              person.shape).copy()}
        for name, dtype in self.columns.items():
            part[name] = np.broadcast_to(np.asarray(cols[name], dtype), person.shape).copy()
        if len(person):
            self.parts.append(part)

    def arrays(self) -> dict[str, np.ndarray]:
        """The rows in the order they were added."""
        names = ["person_id", "date", *self.columns]
        if not self.parts:
            return {k: np.zeros(0, np.int64) for k in names}
        return {k: np.concatenate([p[k] for p in self.parts]) for k in names}

    def table(self, levels: dict[str, np.ndarray], sort: bool = True) -> Table:
        """The rows, sorted by person, date and code (stable) unless ``sort`` is false."""
        cols = self.arrays()
        if not sort:
            return Table(cols, levels)
        # one int64 key: person (< 2**38) | date + 2**16 (< 2**17) | code (< 2**8)
        key = (cols["person_id"] << 25) | ((cols["date"] + 2**16) << 8) | cols["code"]
        order = np.argsort(key, kind="stable")
        return Table({k: v[order] for k, v in cols.items()}, levels)


def person_ids(n: int) -> pa.Array:
    """Text identifiers ``P0000001`` … (seven digits or more)."""
    width = max(7, len(str(n)))
    return pa.array([f"P{i + 1:0{width}d}" for i in range(n)], pa.string())


def _dates(days: np.ndarray) -> pa.Array:
    return pa.array(np.asarray(days, np.int32), pa.int32()).cast(pa.date32())


def _text(index: np.ndarray, levels) -> pa.Array:
    return pc.take(pa.array(list(levels), pa.string()), pa.array(np.asarray(index, np.int64)))


def to_arrow(t: Tables, ids: pa.Array) -> dict[str, pa.Table]:
    """The extract tables as Arrow tables with contract column names and types."""
    persons = {"person_id": ids, "birth_date": _dates(t.birth), "sex": _text(t.sex, SEXES)}
    for name, (idx, levels) in t.attributes.items():
        persons[name] = _text(idx, levels)
    out = {"persons": pa.table(persons)}
    cov = t.coverage.cols
    out["coverage"] = pa.table({"person_id": pc.take(ids, pa.array(cov["person_id"])),
                                "start_date": _dates(cov["start_date"]),
                                "end_date": _dates(cov["end_date"])})
    dead = np.flatnonzero(t.death < NONE)
    out["deaths"] = pa.table({"person_id": pc.take(ids, pa.array(dead)),
                              "date": _dates(t.death[dead])})
    for name, tab in t.events.items():
        cols = {"person_id": pc.take(ids, pa.array(tab.cols["person_id"])),
                "date": _dates(tab.cols["date"])}
        for col, arr in tab.cols.items():
            if col in ("person_id", "date"):
                continue
            if col in tab.levels:
                cols[col] = _text(arr, tab.levels[col])
            elif arr.dtype.kind == "f":
                cols[col] = pa.array(arr, pa.float64())
            else:
                cols[col] = pa.array(arr, pa.int32())
        out[name] = pa.table(cols)
    return out


def _days(col) -> np.ndarray:
    import pandas as pd

    return (pd.to_datetime(col).to_numpy().astype("datetime64[D]").astype(np.int64))


def read_tables(folder: str | Path, attributes: tuple[str, ...] = ("region",)) -> Tables:
    """Read an extract folder (Parquet or CSV files) back into :class:`Tables`.

    Used to check that the written files give the same cohort as the arrays they came from.
    """
    import pandas as pd

    folder = Path(folder)

    def load(name: str) -> pd.DataFrame:
        for suffix in (".parquet", ".csv", ".csv.gz"):
            f = folder / f"{name}{suffix}"
            if f.is_file():
                if suffix == ".parquet":
                    return pd.read_parquet(f)
                return pd.read_csv(f, dtype={"person_id": str, "code": str, "setting": str})
        raise FileNotFoundError(f"{folder}: no table {name}")

    persons = load("persons")
    index = pd.Series(np.arange(len(persons)), index=persons["person_id"].astype(str))

    def pid(df: pd.DataFrame) -> np.ndarray:
        return index.loc[df["person_id"].astype(str)].to_numpy()

    def factor(values) -> tuple[np.ndarray, np.ndarray]:
        codes, uniques = pd.factorize(pd.Series(values).astype(str))
        return codes.astype(np.int64), np.asarray(uniques, dtype=object)

    attrs = {}
    for a in attributes:
        codes, levels = factor(persons[a])
        attrs[a] = (codes, tuple(levels))
    death = np.full(len(persons), NONE, np.int64)
    deaths = load("deaths")
    if len(deaths):
        death[pid(deaths)] = _days(deaths["date"])
    cov = load("coverage")
    coverage = Table({"person_id": pid(cov), "start_date": _days(cov["start_date"]),
                      "end_date": _days(cov["end_date"])})
    events = {}
    for name in ("dispensings", "diagnoses", "measurements"):
        df = load(name)
        cols = {"person_id": pid(df), "date": _days(df["date"])}
        levels = {}
        for col in df.columns:
            if col in ("person_id", "date"):
                continue
            if col in ("code", "setting", "unit"):
                cols[col], levels[col] = factor(df[col])
            else:
                cols[col] = df[col].to_numpy()
        events[name] = Table(cols, levels)
    sex = np.asarray(pd.Series(persons["sex"].astype(str)).map({s: i for i, s in
                                                                 enumerate(SEXES)}), np.int64)
    return Tables(_days(persons["birth_date"]), sex, attrs, death, coverage, events)
