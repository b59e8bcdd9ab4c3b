"""Person-time: supply, stop and switch days, deviations, and person-periods (CONTRACTS §5a, §5b).

Everything runs in DuckDB SQL over the extract's views and the cohort, with no loop over persons,
so a national extract builds its person-periods out of core (DuckDB spills to its temporary
directory; the periods go straight from SQL to ``periods.parquet``).

Supply (§5b). Take the dispensings of the arm's initiating concept on days ``d_1 <= d_2 <= ...``
(``d >= 0``) with supplies ``s_j`` (the ``days_supply`` column, 30 when absent). The supply covers
days through

.. math:: c_1 = d_1 + s_1 - 1, \\qquad c_j = \\max(c_{j-1},\\ d_j - 1) + s_j ,

a refill before the supply runs out being carried over. Unrolled, with :math:`S_j = s_1 + \\dots
+ s_j`,

.. math:: c_j = S_j + \\max_{i \\le j}\\,(d_i - 1 - S_{i-1}),

a running sum and a running maximum, i.e. two window functions. The person **stops** on day
``c + gap_days + 1`` where ``c`` is the covered-through day before the first dispensing dated later
than ``c + gap_days`` (or after the last dispensing); as ``c_j`` never decreases, that is the
smallest ``c_{j-1} + gap + 1`` over such dispensings. The person **switches** on the first day
``>= 1`` with a record of a ``switch`` concept. ``deviation_day`` is the earlier of the two
(``switched`` on a tie), empty when it falls after ``end_day`` (the end of follow-up, §3a).

Dispensings and switch records are read up to ``follow_up.max_days``: a dispensing after that day
can only move a stop that is later than it, so ``stop_day`` and ``switch_day`` are exact whenever
they are at most ``max_days`` and are left empty otherwise.

Periods (§5a). Period ``k`` holds days ``k*P .. (k+1)*P - 1`` (``P = analysis.period_days``).
``periods.parquet`` has one row per person and period from period 0 to the period holding the
earlier of ``end_day`` and ``deviation_day``; ``deviated`` is 1 in the period holding the
deviation day. Each time-varying covariate is measured on the period's first day ``t = k*P`` over
the records with ``t + a <= day <= t + b``: a record on day ``x`` falls in the windows of the
periods ``ceil((x - b)/P) .. floor((x - a)/P)``, so records are expanded to their periods and
summarised per person and period (a hash aggregate, never a join of every period with every
record). Missing values are handled as for baseline covariates (§3a): ``<name>_missing`` is 1 and
the value is the median of the known values over all person-periods.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from emulant import columns as C
from emulant.cohort.covariates import (
    CohortError,
    concept_condition,
    duckdb_failures,
    lit,
    q,
    summary_sql,
    zero_when_none,
)
from emulant.extract import Extract
from emulant.protocol import Covariate, Protocol

DEFAULT_SUPPLY = 30
COHORT_VIEW = "_pt_cohort"


def _source_of(ex: Extract, p: Protocol, concept: str, key: str) -> str:
    c = p.concept(concept)
    if not ex.has(c.source):
        raise CohortError(f"{key}: concept '{concept}' reads table '{c.source}', which the extract "
                          f"{ex.path} does not have")
    return c.source


def supply_sql(ex: Extract, p: Protocol) -> str:
    """Per person and arm: the dispensings of the arm's concept in days 0..max_days, with the
    covered-through day ``cov`` after each and ``prev_cov`` before it (§5b carry-over rule).
    Arms without a concept (``initiate: none``) supply nothing."""
    parts = []
    for arm in p.strategies.starting_arms:
        src = _source_of(ex, p, arm.initiate, f"strategies.arms.{arm.name}.initiate")
        cols = ex.columns[src]
        cond = concept_condition(p.concept(arm.initiate), "s", cols, src)
        supply = f"coalesce(s.days_supply, {DEFAULT_SUPPLY})" if "days_supply" in cols \
            else str(DEFAULT_SUPPLY)
        gap = arm.sustain.gap_days if arm.sustain else 0
        parts.append(f"""
            SELECT c.person_id, c.arm, date_diff('day', c.time_zero, s.date) AS day,
                   CAST({supply} AS BIGINT) AS supply, {gap} AS gap
            FROM {q(src)} s JOIN {COHORT_VIEW} c ON c.person_id = s.person_id
            WHERE c.arm = {lit(arm.name)} AND {cond}
              AND s.date BETWEEN c.time_zero AND c.time_zero + {p.follow_up.max_days}""")
    w = "PARTITION BY person_id, arm ORDER BY day, supply ROWS UNBOUNDED PRECEDING"
    return f"""
        WITH r AS ({' UNION ALL '.join(parts)}),
        o AS (SELECT *, sum(supply) OVER ({w}) AS cum FROM r),
        c AS (SELECT *, cum + max(day - 1 - (cum - supply)) OVER ({w}) AS cov FROM o)
        SELECT *, lag(cov) OVER (PARTITION BY person_id, arm ORDER BY day, supply) AS prev_cov FROM c"""


def stop_sql(ex: Extract, p: Protocol) -> str:
    """Per person and arm: ``stop_day`` (§5b), empty when later than ``max_days``."""
    stop = ("coalesce(min(prev_cov + gap + 1) FILTER (WHERE day > prev_cov + gap), "
            "max(cov + gap) + 1)")
    return f"""
        SELECT person_id, arm, CASE WHEN {stop} <= {p.follow_up.max_days} THEN {stop} END AS stop_day
        FROM ({supply_sql(ex, p)}) GROUP BY person_id, arm"""


def switch_sql(ex: Extract, p: Protocol) -> str:
    """Per person: ``switch_day``, the first day in 1..max_days with a record of a switch
    concept of the person's arm (empty when none)."""
    parts = []
    for arm in p.strategies.arms:
        for concept in (arm.sustain.switch if arm.sustain else ()):
            src = _source_of(ex, p, concept, f"strategies.arms.{arm.name}.sustain.switch")
            cond = concept_condition(p.concept(concept), "s", ex.columns[src], src)
            parts.append(f"""
                SELECT c.person_id, date_diff('day', c.time_zero, s.date) AS day
                FROM {q(src)} s JOIN {COHORT_VIEW} c ON c.person_id = s.person_id
                WHERE c.arm = {lit(arm.name)} AND {cond}
                  AND s.date BETWEEN c.time_zero + 1 AND c.time_zero + {p.follow_up.max_days}""")
    if not parts:
        return f"SELECT person_id, CAST(NULL AS BIGINT) AS switch_day FROM {COHORT_VIEW} WHERE FALSE"
    return f"SELECT person_id, min(day) AS switch_day FROM ({' UNION ALL '.join(parts)}) GROUP BY person_id"


def deviation_sql(ex: Extract, p: Protocol) -> str:
    """Per cohort person: ``stop_day, switch_day, deviation_day, deviation_reason`` (§5b)."""
    dev = "least(st.stop_day, sw.switch_day)"
    return f"""
        SELECT c.person_id, st.stop_day, sw.switch_day,
               CASE WHEN {dev} <= c.end_day THEN {dev} END AS deviation_day,
               CASE WHEN {dev} > c.end_day OR {dev} IS NULL THEN NULL
                    WHEN sw.switch_day <= coalesce(st.stop_day, sw.switch_day) THEN 'switched'
                    ELSE 'stopped' END AS deviation_reason
        FROM {COHORT_VIEW} c
        LEFT JOIN ({stop_sql(ex, p)}) st ON st.person_id = c.person_id AND st.arm = c.arm
        LEFT JOIN ({switch_sql(ex, p)}) sw ON sw.person_id = c.person_id"""


def _need_person_time(p: Protocol) -> None:
    """Every starting arm needs sustain, except in design clone (where starting is the strategy)."""
    st = p.strategies
    missing = [a.name for a in st.starting_arms if a.sustain is None] if st.design != "clone" else []
    if missing:
        raise CohortError(f"strategies.arms.{missing[0]}: person-time needs sustain on every arm")


def _register(con, cohort: pd.DataFrame | str | Path) -> None:
    """The cohort as the view ``_pt_cohort``: a DataFrame, or a parquet file read by DuckDB."""
    if isinstance(cohort, pd.DataFrame):
        cols = ["person_id", "arm", "time_zero", "end_day"]
        cols += [x for x in (C.DEVIATION_DAY,) if x in cohort.columns]
        con.register("_pt_cohort_df", cohort[cols])
        con.execute(f"CREATE OR REPLACE TEMP VIEW {COHORT_VIEW} AS "
                    "SELECT * REPLACE (CAST(time_zero AS DATE) AS time_zero) FROM _pt_cohort_df")
    else:
        con.execute(f"CREATE OR REPLACE TEMP VIEW {COHORT_VIEW} AS SELECT * REPLACE "
                    f"(CAST(time_zero AS DATE) AS time_zero) FROM read_parquet({lit(cohort)})")


def _run(ex: Extract, what: str, fn):
    with duckdb_failures(ex, what):
        return fn()


def add_deviations(extract: Extract, protocol: Protocol, cohort: pd.DataFrame) -> pd.DataFrame:
    """The cohort with ``stop_day, switch_day, deviation_day, deviation_reason`` appended (§5b).

    Days are whole days from time zero (nullable integers); ``deviation_reason`` is
    ``stopped``, ``switched`` or empty. Rows keep the cohort's order.
    """
    _need_person_time(protocol)
    if protocol.strategies.design == "clone":  # the clone cohort carries its own (§5d)
        if C.DEVIATION_DAY not in cohort.columns:
            raise CohortError("design clone: the deviations come with the clone cohort "
                              "(emulant.cohort.build_cohort); this cohort has none")
        return cohort
    if "end_day" not in cohort.columns:
        raise CohortError("per_protocol: deviations are counted within the follow-up of the "
                          "primary time-to-event outcome (end_day); the primary outcome is measured")
    con = extract.con

    def go():
        _register(con, cohort)
        return con.execute(deviation_sql(extract, protocol)).df()

    dev = _run(extract, "finding stop and switch days", go)
    out = cohort.merge(dev, on="person_id", how="left", validate="one_to_one")
    for col in (C.STOP_DAY, C.SWITCH_DAY, C.DEVIATION_DAY):
        out[col] = out[col].astype("Int64")
    out[C.DEVIATION_REASON] = out[C.DEVIATION_REASON].astype(object).where(
        out[C.DEVIATION_REASON].notna(), None)
    return out


def deviation_counts(cohort: pd.DataFrame, protocol: Protocol) -> pd.DataFrame:
    """Per arm: persons (clones, in design clone), how many left within follow-up for each
    reason (§5b: stopped, switched; §5d adds started_early, not_started, started), and how many
    stayed on protocol throughout."""
    reasons = C.CLONE_REASONS if protocol.strategies.design == "clone" else C.DEVIATION_REASONS
    rows = []
    for arm in protocol.strategies.arm_names:
        r = cohort.loc[cohort["arm"] == arm, C.DEVIATION_REASON]
        row = {"arm": arm, "persons": int(len(r))}
        row.update({x: int((r == x).sum()) for x in reasons})
        row["on_protocol_throughout"] = int(len(r)) - sum(row[x] for x in reasons)
        rows.append(row)
    return pd.DataFrame(rows)


# ----------------------------------------------------------------------------- periods


def _tv_sql(ex: Extract, p: Protocol, cov: Covariate, P: int) -> str:
    """One time-varying covariate per person and period: its records expanded to the periods
    whose window holds them, summarised per (person, period)."""
    a, b = cov.window
    if cov.concept is not None:
        src = _source_of(ex, p, cov.concept, f"time_varying ({cov.name}).concept")
        cond = concept_condition(p.concept(cov.concept), "s", ex.columns[src], src)
    else:
        src = cov.source
        if not ex.has(src):
            raise CohortError(f"time_varying ({cov.name}).source: table '{src}' is not in the "
                              f"extract {ex.path}")
        cond = "TRUE"
    cols = ex.columns[src]
    if cov.summary in ("last", "mean", "min", "max") and "value" not in cols:
        raise CohortError(f"time_varying ({cov.name}): table '{src}' has no column 'value'")
    extra = "".join(f", s.{c}" for c in ("code", "value") if c in cols)
    first = f"CAST(ceil((day - ({b})) / {P}.0) AS BIGINT)"
    last = f"CAST(floor((day - ({a})) / {P}.0) AS BIGINT)"
    return f"""
        SELECT person_id, period, {summary_sql(cov.summary, 'TRUE')} AS v FROM (
            SELECT person_id, day{extra.replace('s.', '')},
                   unnest(range(greatest({first}, 0), least({last}, last_period) + 1)) AS period
            FROM (
                SELECT s.person_id, date_diff('day', c.time_zero, s.date) AS day{extra},
                       c.last_period
                FROM {q(src)} s JOIN _pt_person c ON c.person_id = s.person_id
                WHERE {cond} AND s.date BETWEEN c.time_zero + ({a})
                                          AND c.time_zero + CAST(c.last_period * {P} + ({b}) AS INTEGER)))
        GROUP BY person_id, period"""


def build_periods(extract: Extract, protocol: Protocol, cohort: pd.DataFrame | str | Path,
                  out: str | Path) -> int:
    """Write ``periods.parquet`` (CONTRACTS §5g) to ``out``; returns its number of rows.

    ``cohort`` is ``cohort.parquet`` (a path, read by DuckDB) or the frame with ``end_day`` and
    ``deviation_day``. Columns: ``person_id, arm, period, start_day, deviated``, then each
    time-varying covariate (and ``<name>_missing`` where its value may be missing), in the
    protocol's order; rows ordered by person and period.
    """
    _need_person_time(protocol)
    con, p, P = extract.con, protocol, protocol.analysis.period_days

    def go() -> int:
        _register(con, cohort)
        names = {r[0] for r in con.execute(f"DESCRIBE {COHORT_VIEW}").fetchall()}
        if C.DEVIATION_DAY not in names or "end_day" not in names:
            raise CohortError("the cohort has no end_day or deviation_day column: build it with "
                              "a protocol asking for per_protocol")
        con.execute(f"""
            CREATE OR REPLACE TEMP TABLE _pt_span AS
            SELECT person_id, arm, time_zero, {C.DEVIATION_DAY} AS dev,
                   CAST(floor(least(end_day, coalesce({C.DEVIATION_DAY}, end_day)) / {P}) AS BIGINT)
                       AS last_period
            FROM {COHORT_VIEW}""")
        # one row per person (a clone design has several rows per person: the covariates are
        # the person's, measured over the longest of their clones' follow-up)
        con.execute("""
            CREATE OR REPLACE TEMP TABLE _pt_person AS
            SELECT person_id, any_value(time_zero) AS time_zero, max(last_period) AS last_period
            FROM _pt_span GROUP BY person_id""")
        sel = ["g.person_id", "g.arm", "g.period", f"g.period * {P} AS start_day",
               f"CAST(coalesce(g.dev BETWEEN g.period * {P} AND g.period * {P} + {P - 1}, FALSE) "
               "AS INTEGER) AS deviated"]
        joins = []
        for i, cov in enumerate(p.time_varying):
            con.execute(f"CREATE OR REPLACE TEMP TABLE _pt_tv_{i} AS {_tv_sql(extract, p, cov, P)}")
            joins.append(f"LEFT JOIN _pt_tv_{i} t{i} ON t{i}.person_id = g.person_id "
                         f"AND t{i}.period = g.period")
            if zero_when_none(cov.summary):
                sel.append(f"coalesce(t{i}.v, 0) AS {q(cov.name)}")
                continue
            med = con.execute(f"SELECT median(v) FROM _pt_tv_{i} t JOIN _pt_person s "
                              "ON s.person_id = t.person_id AND t.period <= s.last_period"
                              ).fetchone()[0]
            sel.append(f"coalesce(CAST(t{i}.v AS DOUBLE), {float(med) if med is not None else 0.0})"
                       f" AS {q(cov.name)}")
            sel.append(f"CAST(t{i}.v IS NULL AS INTEGER) AS {q(C.missing_flag(cov.name))}")
        grid = ("SELECT person_id, arm, dev, unnest(range(0, last_period + 1)) AS period "
                "FROM _pt_span")
        target = Path(out)
        con.execute(f"""
            COPY (SELECT {', '.join(sel)} FROM ({grid}) g {' '.join(joins)}
                  ORDER BY g.person_id, g.arm, g.period)
            TO {lit(str(target))} (FORMAT parquet)""")
        return int(con.execute(f"SELECT count(*) FROM read_parquet({lit(str(target))})")
                   .fetchone()[0])

    return _run(extract, "building the person-periods", go)
