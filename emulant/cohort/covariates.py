"""Baseline covariates: code matching, window summaries in SQL, missing values, kinds (§3a).

The cohort builder (:mod:`emulant.cohort`) asks this module for SQL pieces: the condition that a
record belongs to a concept (:func:`concept_condition`), the completed-years age
(:func:`age_sql`) and the aggregate that summarises a concept over a window
(:func:`summary_sql`). After the cohort is selected, :func:`finish_covariates` adds the
``<name>_missing`` flags and fills the missing values, and :func:`covariate_kinds` resolves each
covariate's kind from the data where the protocol left it open.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field

import duckdb
import numpy as np
import pandas as pd

from emulant.columns import missing_flag
from emulant.extract import Extract
from emulant.protocol import Concept, Covariate, Protocol

MISSING_LEVEL = "missing"


class CohortError(Exception):
    """The cohort cannot be built: an empty cohort or arm (``step`` names the step that removed
    the last person), or a protocol that does not fit the extract."""

    def __init__(self, message: str, step: str | None = None, arm: str | None = None,
                 attrition: pd.DataFrame | None = None):
        super().__init__(message)
        self.step, self.arm, self.attrition = step, arm, attrition


@contextmanager
def duckdb_failures(ex: Extract, what: str) -> Iterator[None]:
    """A DuckDB failure while ``what`` (e.g. "building the cohort") becomes a CohortError naming the
    extract; out of memory also names the config keys that help."""
    try:
        yield
    except duckdb.OutOfMemoryException as exc:
        limit = ex.con.execute("SELECT current_setting('memory_limit')").fetchone()[0]
        raise CohortError(f"DuckDB ran out of memory {what} of {ex.path} (memory_limit {limit}): "
                          "raise duckdb.memory_limit or lower duckdb.threads in the config "
                          f"({str(exc).splitlines()[0]})") from None
    except duckdb.Error as exc:
        raise CohortError(f"{what} of {ex.path} failed in DuckDB: "
                          f"{str(exc).splitlines()[0]}") from None


CovariateError = CohortError  # the same class: a covariate the extract cannot give


# ----------------------------------------------------------------------------- SQL pieces


def q(name: str) -> str:
    """A quoted SQL identifier."""
    return '"' + str(name).replace('"', '""') + '"'


def lit(value: object) -> str:
    """A SQL text literal."""
    return "'" + str(value).replace("'", "''") + "'"


def concept_condition(concept: Concept, alias: str, columns: Iterable[str], table: str) -> str:
    """SQL boolean: the record ``alias`` belongs to ``concept``.

    ``match: prefix`` keeps a code equal to a listed code or starting with it; written as
    ``left(code, L) IN (codes of length L)`` for every length ``L`` present, so a long code list
    stays a hash lookup. ``match: exact`` keeps listed codes only. Every ``where:`` entry adds
    ``CAST(column AS VARCHAR) IN (values)``. The built-in ``death`` concept (table ``deaths``)
    holds every row.
    """
    cols = set(columns)
    if concept.source == "deaths":
        parts = ["TRUE"]
    else:
        code = f"{alias}.code"
        if concept.match == "exact":
            parts = [f"{code} IN ({', '.join(lit(c) for c in sorted(set(concept.codes)))})"]
        else:
            by_len: dict[int, set[str]] = {}
            for c in concept.codes:
                by_len.setdefault(len(c), set()).add(c)
            ors = [f"left({code}, {n}) IN ({', '.join(lit(c) for c in sorted(v))})"
                   for n, v in sorted(by_len.items())]
            parts = ["(" + " OR ".join(ors) + ")"] if ors else ["FALSE"]
    for col, values in concept.where:
        if col not in cols:
            raise CovariateError(
                f"concepts.{concept.name}.where: table '{table}' has no column '{col}' "
                f"(columns: {', '.join(sorted(cols))})")
        parts.append(f"CAST({alias}.{q(col)} AS VARCHAR) IN ({', '.join(lit(v) for v in values)})")
    return " AND ".join(parts)


def age_sql(birth: str, time_zero: str) -> str:
    """Completed years at ``time_zero`` (the birthday rule), as a SQL integer expression.

    .. math:: \\text{age} = (y_0 - y_b) - [\\,(m_0, d_0) < (m_b, d_b)\\,]

    The year difference, less one while this year's birthday has not come; a person born on
    29 February reaches the next year on 1 March in a common year. Common practice, no single
    source (it is how completed age is counted in civil law and in registries).
    """
    return (f"(year({time_zero}) - year({birth}) - CASE WHEN month({time_zero}) * 100 + "
            f"day({time_zero}) < month({birth}) * 100 + day({birth}) THEN 1 ELSE 0 END)")


def summary_sql(summary: str, cond: str) -> str:
    """The aggregate summarising the records where ``cond`` holds (columns ``day, code, value``).

    ``any`` is 1 when a record exists, ``count`` the number of records, ``distinct_codes`` the
    number of distinct codes (these three are 0 without a record, see :func:`zero_when_none`);
    ``last`` is the value on the latest day, the largest value on a tie (a struct compares field
    by field); ``mean``, ``min``, ``max`` of ``value``. Value summaries ignore records with no
    value and are NULL when no record remains.
    """
    if summary == "any":
        return f"CAST(count_if({cond}) > 0 AS INTEGER)"
    if summary == "count":
        return f"count_if({cond})"
    if summary == "distinct_codes":
        return f"count(DISTINCT code) FILTER (WHERE {cond})"
    vcond = f"({cond}) AND value IS NOT NULL"
    if summary == "last":
        return f"arg_max(value, struct_pack(d := day, v := value)) FILTER (WHERE {vcond})"
    if summary in ("mean", "min", "max"):
        fn = {"mean": "avg", "min": "min", "max": "max"}[summary]
        return f"{fn}(value) FILTER (WHERE {vcond})"
    raise CovariateError(f"unknown summary '{summary}'")


def zero_when_none(summary: str | None) -> bool:
    """True for summaries that are 0 (not missing) when no record falls in the window."""
    return summary in ("any", "count", "distinct_codes")


def nearest_sql(cond: str, at_day: int) -> str:
    """The value nearest to ``at_day`` among records where ``cond`` holds; the earlier day on a
    tie of distance, the largest value on a tie of day (as for ``last``)."""
    key = f"struct_pack(a := abs(day - ({at_day})), d := day, v := -value)"
    return f"arg_min(value, {key}) FILTER (WHERE ({cond}) AND value IS NOT NULL)"


def person_covariate_sql(cov: Covariate, time_zero: str, person: str) -> str | None:
    """SQL for a builtin or attribute covariate (``person`` aliases the persons view); None for
    a concept or source summary, which comes from the per-source aggregates."""
    if cov.builtin == "age":
        return age_sql(f"{person}.birth_date", time_zero)
    if cov.builtin == "sex":
        return f"{person}.sex"
    if cov.builtin == "calendar_year":
        return f"CAST(year({time_zero}) AS INTEGER)"
    if cov.attribute is not None:
        return f"{person}.{q(cov.attribute)}"
    return None


def merged_coverage_sql(persons: str) -> str:
    """Coverage periods of the persons in table ``persons`` merged where they overlap or touch
    (next start <= running max end + 1 day), a gaps-and-islands pass: ``person_id, s, e``."""
    return f"""
        WITH c AS (
            SELECT v.person_id, v.start_date AS s, v.end_date AS e
            FROM coverage v WHERE v.person_id IN (SELECT person_id FROM {persons})
              AND v.start_date IS NOT NULL AND v.end_date IS NOT NULL),
        o AS (
            SELECT *, max(e) OVER (PARTITION BY person_id ORDER BY s, e
                ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING) AS prev_end FROM c),
        g AS (
            SELECT *, sum(CASE WHEN prev_end IS NULL OR s > prev_end + 1 THEN 1 ELSE 0 END)
                OVER (PARTITION BY person_id ORDER BY s, e ROWS UNBOUNDED PRECEDING) AS grp FROM o)
        SELECT person_id, grp, min(s) AS s, max(e) AS e FROM g GROUP BY person_id, grp"""


# ----------------------------------------------------------------------------- per-source plans


@dataclass
class SourcePlan:
    """What one pass over one extract source computes (aggregate aliases -> SQL)."""

    source: str
    flags: dict[str, str] = field(default_factory=dict)  # flag alias -> record condition
    aggs: dict[str, str] = field(default_factory=dict)  # output alias -> aggregate over records
    lo: int | None = None
    hi: int | None = None
    whole: bool = False  # a whole-source covariate: every record counts, not only flagged ones

    def span(self, a: int, b: int) -> None:
        self.lo = a if self.lo is None else min(self.lo, a)
        self.hi = b if self.hi is None else max(self.hi, b)


class Planner:
    """Collects, per source, the flags and aggregates the steps and columns need."""

    def __init__(self, extract: Extract, protocol: Protocol):
        self.ex, self.p = extract, protocol
        self.plans: dict[str, SourcePlan] = {}

    def _plan(self, source: str) -> SourcePlan:
        if not self.ex.has(source):
            raise CohortError(f"the protocol reads table '{source}', which the extract "
                              f"{self.ex.path} does not have")
        return self.plans.setdefault(source, SourcePlan(source))

    def flag(self, concept: str) -> tuple[SourcePlan, str]:
        c = self.p.concept(concept)
        plan = self._plan(c.source)
        alias = f"k_{concept}"
        if alias not in plan.flags:
            plan.flags[alias] = concept_condition(c, "s", self.ex.columns[c.source], c.source)
        return plan, alias

    def add(self, alias: str, concept: str | None, source: str | None, a: int, b: int,
            make) -> None:
        """Aggregate ``make(cond)`` over the records of ``concept`` (or all of ``source``) with
        day in [a, b]."""
        if concept is not None:
            plan, flag = self.flag(concept)
            cond = f"{flag} AND day BETWEEN {a} AND {b}"
        else:
            plan = self._plan(source)
            plan.whole = True
            cond = f"day BETWEEN {a} AND {b}"
        plan.span(a, b)
        plan.aggs[alias] = make(cond)
        return None


def make_aggregates(con, ex: Extract, plans: dict[str, SourcePlan], init: str = "_c_init",
                    keys: tuple[str, ...] = ()) -> list[str]:
    """One ``CREATE TEMP TABLE _c_agg_<n>`` per source: a single scan of the source joined to
    time zero (table ``init``), every aggregate of its plan grouped by person and ``keys`` (e.g.
    ``trial`` for person-trials); returns the table names."""
    tables = []
    by = ", ".join(("person_id", *keys))
    ikeys = "".join(f", i.{k}" for k in keys)
    for n, plan in enumerate(plans.values()):
        if not plan.aggs:
            continue
        cols = ex.columns[plan.source]
        extra = [f"s.{c}" for c in ("code", "value") if c in cols]
        flags = [f"({cond}) AS {a}" for a, cond in plan.flags.items()]
        keep = "TRUE" if plan.whole or not plan.flags else " OR ".join(plan.flags)
        aggs = ", ".join(f"{sql} AS {a}" for a, sql in plan.aggs.items())
        name = f"_c_agg_{n}"
        con.execute(f"""
            CREATE OR REPLACE TEMP TABLE {name} AS
            SELECT {by}, {aggs} FROM (
                SELECT s.person_id{ikeys}, date_diff('day', i.time_zero, s.date) AS day,
                       {', '.join(extra + flags) or 'NULL AS nothing'}
                FROM {q(plan.source)} s JOIN {init} i ON i.person_id = s.person_id
                WHERE s.date BETWEEN i.time_zero + ({plan.lo}) AND i.time_zero + ({plan.hi}))
            WHERE {keep}
            GROUP BY {by}""")
        tables.append(name)
    return tables


# ----------------------------------------------------------------------------- after selection


def _numeric_or_text(s: pd.Series, cov: Covariate) -> pd.Series:
    """An attribute as numbers when every known value is a number (CSV gives text), else text."""
    if cov.kind == "categorical":
        return s.astype(str).where(s.notna()).astype(object)
    if pd.api.types.is_numeric_dtype(s):
        return s.astype(float)
    num = pd.to_numeric(s, errors="coerce")
    if num[s.notna()].notna().all():
        return num.astype(float)
    if cov.kind in ("continuous", "binary"):
        bad = s[s.notna() & num.isna()].iloc[0]
        raise CovariateError(f"covariates ({cov.name}): persons column '{cov.attribute}' holds "
                             f"{bad!r}, not a number (the covariate's kind is {cov.kind})")
    return s.astype(object)


def _kind_of(values: pd.Series, cov: Covariate) -> str:
    if cov.kind is not None:
        return cov.kind
    if cov.builtin == "sex" or not pd.api.types.is_numeric_dtype(values):
        return "categorical"
    known = values.dropna()
    if len(known) and known.isin([0, 1]).all():
        return "binary"
    return "continuous"


def finish_covariates(cohort: pd.DataFrame, protocol: Protocol) -> pd.DataFrame:
    """Add ``<name>_missing`` (0/1) for every covariate that may be missing, then fill it.

    A numeric covariate is filled with the cohort median of its known values (0 when none is
    known); a categorical one with the level ``"missing"``. Attributes become numbers when every
    known value is a number, else text; a categorical attribute is always text.
    """
    out = cohort.copy()
    for cov in protocol.covariates:
        if cov.attribute is not None:
            out[cov.name] = _numeric_or_text(out[cov.name], cov)
        if not cov.may_be_missing:
            continue
        miss = out[cov.name].isna()
        kind = _kind_of(out.loc[~miss, cov.name], cov)
        if kind == "categorical":
            col = out[cov.name].astype(str).astype(object)
            out[cov.name] = col.where(~miss, MISSING_LEVEL)
        else:
            col = pd.to_numeric(out[cov.name], errors="coerce").astype(float)
            med = float(np.nanmedian(col)) if (~miss).any() else 0.0
            out[cov.name] = col.fillna(med)
        out[missing_flag(cov.name)] = miss.astype(int)
    return out


TRIAL = "trial"


def adjustment_set(protocol: Protocol, cohort: pd.DataFrame) -> tuple:
    """The covariates of the propensity and outcome models: the protocol's, and in a cohort of
    person-trials (CONTRACTS §5c) the trial's calendar time as ``trial`` (continuous: trial
    ``j`` starts ``j * trial_every_days`` days after the entry window opens)."""
    covs = tuple(protocol.covariates)
    return (*covs, TRIAL) if TRIAL in cohort.columns else covs


def covariate_kinds(protocol: Protocol, cohort: pd.DataFrame,
                    covariates: tuple | None = None) -> dict[str, str]:
    """Each covariate's kind: the protocol's ``kind``, else decided from the cohort (or from
    ``periods.parquet`` for ``covariates=protocol.time_varying``).

    ``sex`` and text columns are categorical, numeric columns whose known values are all 0 or 1
    are binary, other numeric columns continuous. Rows flagged ``<name>_missing`` are ignored,
    so a median fill does not turn a binary covariate continuous.
    """
    kinds = {}
    for cov in protocol.covariates if covariates is None else covariates:
        values = cohort[cov.name]
        flag = missing_flag(cov.name)
        if flag in cohort.columns:
            values = values[cohort[flag] == 0]
        kinds[cov.name] = _kind_of(values, cov)
    if covariates is None and TRIAL in cohort.columns:
        kinds[TRIAL] = "continuous"
    return kinds


def single_value_covariates(protocol: Protocol, cohort: pd.DataFrame) -> list[str]:
    """One message per covariate with a single value in the cohort (e.g. ``sex`` in a
    women-only extract): a constant adjusts for nothing, and the models leave it out."""
    out = []
    for i, cov in enumerate(protocol.covariates):
        if cov.name not in cohort.columns or len(cohort) == 0:
            continue
        values = cohort[cov.name].dropna().unique()
        if len(values) <= 1:
            shown = values[0] if len(values) else "missing"
            out.append(f"covariates[{i}] ({cov.name}): a single value ({shown}) in all "
                       f"{len(cohort)} persons of the cohort; the models leave it out")
    return out
