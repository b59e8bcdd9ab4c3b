"""The clone design: index-event time zero, eligibility, one clone per person and arm, and each
clone's deviation day and reason (CONTRACTS §5d).

Eligibility runs the steps of §3a with ``indexed`` in place of ``initiated``: time zero is the
person's first record of ``strategies.index`` inside the entry window (tested once, at that
record), then ``age``, ``coverage_before``, ``washout`` (no record of ANY arm's initiating concept
in ``[-washout_days, -1]``), ``require:*``, ``exclude:*``, ``covariate:*``; there is no
``same_day`` step (no one is assigned at time zero). The attrition counts persons. Every eligible
person is then cloned into every arm: ``cohort.parquet`` has one row per person and arm, each
with the person's covariates and follow-up (§3a) and its own deviation.

With ``s`` the first day ``>= 0`` with a record of the arm's concept (``initiation_day``; for an
``initiate: none`` arm, of any other arm's concept), within ``follow_up.max_days``, a clone
deviates

* ``start_within: [a, b]``: on day ``s`` when ``s < a`` (``started_early``); on day ``b + 1`` when
  there is no ``s <= b`` (``not_started``); after a start inside the window, an arm with
  ``sustain`` deviates per §5b: it stops on the supply rule's day (the supply counted from its
  dispensings on days ``>= 0``, the first of them on day ``s``) and switches on the first day
  after ``s`` with a record of a switch concept (``switched`` on a tie with ``stopped``);
* ``initiate: none``: on day ``s`` (``started``).

A deviation after the end of follow-up (``end_day`` of the primary outcome) is no deviation: the
day and reason are empty. A deviation on ``end_day`` itself is kept, and the per-protocol
estimators let the intention-to-treat reason win (an outcome on the deviation day counts).

Source: the clone–censor–weight approach of Hernán, "How to estimate the effect of treatment
duration on survival outcomes using observational data", BMJ 2018;360:k182, and Cain et al.,
"When to start treatment? A systematic approach to the comparison of dynamic regimes using
observational data", Int J Biostat 2010;6(2):18; the exact day rules are CONTRACTS §5d.
"""

from __future__ import annotations

import pandas as pd

from emulant import columns as C
from emulant.cohort.covariates import (
    CohortError,
    Planner,
    concept_condition,
    duckdb_failures,
    lit,
    make_aggregates,
    q,
)
from emulant.cohort.eligibility import (
    CohortResult,
    _cohort_frame,
    _make_coverage,
    _plan_steps,
    _select_all,
)
from emulant.cohort.person_time import COHORT_VIEW, _register, _run, _source_of, stop_sql
from emulant.extract import Extract
from emulant.progress import Progress
from emulant.protocol import Protocol


def _records(ex: Extract, p: Protocol, concepts: tuple[str, ...], key: str, select: str) -> str:
    """``SELECT <select> FROM <source> s WHERE <concept>`` for each concept, as one UNION ALL."""
    parts = []
    for name in concepts:
        src = _source_of(ex, p, name, key)
        cond = concept_condition(p.concept(name), "s", ex.columns[src], src)
        parts.append(f"SELECT {select.format(concept=lit(name))} FROM {q(src)} s WHERE {cond}")
    return " UNION ALL ".join(parts)


def _make_init(con, ex: Extract, p: Protocol) -> None:
    """``_c_init``: time zero (the first index record inside the entry window), the washout, and
    ``day0_<i>`` columns all false (no arm is assigned at time zero)."""
    e, st = p.eligibility, p.strategies
    index = _records(ex, p, (st.index,), "strategies.index.concept", "s.person_id, s.date")
    arms = _records(ex, p, st.initiating_concepts, "strategies.arms", "s.person_id, s.date")
    day0 = ", ".join(f"FALSE AS day0_{i}" for i in range(len(st.arms)))
    w = st.washout_days
    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE _c_init AS
        WITH t AS (
            SELECT person_id, min(date) AS time_zero FROM ({index}) x
            WHERE date BETWEEN DATE {lit(e.entry_start)} AND DATE {lit(e.entry_end)}
            GROUP BY person_id),
        h AS (
            SELECT DISTINCT t.person_id FROM t JOIN ({arms}) r ON r.person_id = t.person_id
            WHERE r.date BETWEEN t.time_zero - {w} AND t.time_zero - 1)
        SELECT t.person_id, t.time_zero, {day0}, h.person_id IS NOT NULL AS washout_hit
        FROM t LEFT JOIN h ON h.person_id = t.person_id""")


def _attrition(con, p: Protocol, steps) -> pd.DataFrame:
    """Persons through ``indexed`` and the steps after it (the clones come after eligibility)."""
    n_persons = con.execute("SELECT count(*) FROM persons").fetchone()[0]
    n_index = con.execute("SELECT count(*) FROM _c_init").fetchone()[0]
    counts = dict(con.execute("SELECT first_fail, count(*) FROM _c_all GROUP BY ALL").fetchall())
    e = p.eligibility
    rows = [("persons", "every person in the extract", n_persons, 0),
            ("indexed", f"first record of {p.strategies.index} from {e.entry_start} to {e.entry_end} "
             "(time zero)", n_index, n_persons - n_index)]
    for k, (name, desc, _) in enumerate(steps):
        left = sum(n for f, n in counts.items() if f is None or f > k)
        rows.append((name, desc, left, rows[-1][2] - left))
    df = pd.DataFrame(rows, columns=["step", "description", "remaining", "excluded"])
    df = df.astype({"remaining": "int64", "excluded": "int64"})
    if df["remaining"].iloc[-1] == 0:
        k = int(df["remaining"].tolist().index(0))
        raise CohortError(f"the cohort is empty: step '{df.step[k]}' ({df.description[k]}) removed its "
                          f"last {df.remaining[k - 1] if k else 0} person(s)", step=df.step[k], attrition=df)
    return df


def _clone_frame(con, p: Protocol) -> pd.DataFrame:
    """One row per eligible person and arm, in person order then the protocol's arm order."""
    n = len(p.strategies.arms)
    con.execute(f"""CREATE OR REPLACE TEMP TABLE _c_all AS
        SELECT _c_all.* REPLACE (k.i AS arm_idx) FROM _c_all CROSS JOIN range({n}) k(i)
        WHERE first_fail IS NULL""")
    df = _cohort_frame(con, p)
    order = df["arm"].map({a: i for i, a in enumerate(p.strategies.arm_names)})
    return df.assign(_o=order).sort_values(["person_id", "_o"], kind="stable").drop(columns="_o") \
        .reset_index(drop=True)


def clone_deviation_sql(ex: Extract, p: Protocol) -> str:
    """Per clone (person and arm of ``_pt_cohort``): ``initiation_day, stop_day, switch_day,
    deviation_day, deviation_reason`` (CONTRACTS §5d; see the module's rules)."""
    st, mx = p.strategies, p.follow_up.max_days
    within = f"s.date BETWEEN c.time_zero AND c.time_zero + {mx}"
    starts = []
    for arm in st.arms:
        own = (arm.initiate,) if arm.starts else tuple(x for x in st.initiating_concepts)
        rec = _records(ex, p, own, f"strategies.arms.{arm.name}.initiate", "s.person_id, s.date")
        starts.append(f"""SELECT c.person_id, c.arm, min(date_diff('day', c.time_zero, s.date)) AS init
            FROM ({rec}) s JOIN {COHORT_VIEW} c ON c.person_id = s.person_id
            WHERE c.arm = {lit(arm.name)} AND {within} GROUP BY c.person_id, c.arm""")
    switches = []
    for arm in st.arms:
        if arm.sustain is None or not arm.sustain.switch:
            continue
        rec = _records(ex, p, arm.sustain.switch, f"strategies.arms.{arm.name}.sustain.switch",
                       "s.person_id, s.date")
        switches.append(f"""SELECT c.person_id, c.arm, date_diff('day', c.time_zero, s.date) AS day
            FROM ({rec}) s JOIN {COHORT_VIEW} c ON c.person_id = s.person_id
            WHERE c.arm = {lit(arm.name)} AND s.date BETWEEN c.time_zero + 1 AND c.time_zero + {mx}""")
    sw = " UNION ALL ".join(switches) or \
        f"SELECT person_id, arm, CAST(NULL AS BIGINT) AS day FROM {COHORT_VIEW} WHERE FALSE"
    sustained = [a for a in st.arms if a.sustain is not None]
    stop = stop_sql(ex, p) if sustained else \
        f"SELECT person_id, arm, CAST(NULL AS BIGINT) AS stop_day FROM {COHORT_VIEW} WHERE FALSE"
    wa = "CASE c.arm " + " ".join(f"WHEN {lit(a.name)} THEN {a.start_within[0]}" for a in st.arms
                                  if a.start_within) + " END"
    wb = "CASE c.arm " + " ".join(f"WHEN {lit(a.name)} THEN {a.start_within[1]}" for a in st.arms
                                  if a.start_within) + " END"
    none = "c.arm IN (" + ", ".join(lit(a.name) for a in st.arms if not a.starts) + ")" \
        if any(not a.starts for a in st.arms) else "FALSE"
    sustain = "c.arm IN (" + ", ".join(lit(a.name) for a in sustained) + ")" if sustained else "FALSE"
    return f"""
        WITH i AS ({' UNION ALL '.join(starts)}),
        x AS (
            SELECT c.person_id, c.arm, c.end_day, i.init, {wa} AS wa, {wb} AS wb, {none} AS is_none,
                   {sustain} AS sustained
            FROM {COHORT_VIEW} c LEFT JOIN i ON i.person_id = c.person_id AND i.arm = c.arm),
        sw AS (
            SELECT x.person_id, x.arm, min(w.day) AS day FROM x JOIN ({sw}) w
                ON w.person_id = x.person_id AND w.arm = x.arm AND w.day > x.init
            GROUP BY x.person_id, x.arm),
        y AS (
            SELECT x.*,
                   CASE WHEN NOT is_none AND init BETWEEN wa AND wb AND sustained THEN st.stop_day END AS stop_d,
                   CASE WHEN NOT is_none AND init BETWEEN wa AND wb AND sustained THEN sw.day END AS switch_d
            FROM x LEFT JOIN ({stop}) st ON st.person_id = x.person_id AND st.arm = x.arm
                   LEFT JOIN sw ON sw.person_id = x.person_id AND sw.arm = x.arm),
        z AS (
            SELECT *,
                   CASE WHEN is_none AND init IS NOT NULL THEN 'started'
                        WHEN is_none THEN NULL
                        WHEN init < wa THEN 'started_early'
                        WHEN init IS NULL OR init > wb THEN 'not_started'
                        WHEN switch_d <= coalesce(stop_d, switch_d) THEN 'switched'
                        WHEN stop_d IS NOT NULL THEN 'stopped' END AS reason
            FROM y),
        d AS (
            SELECT *, CASE reason WHEN 'started' THEN init WHEN 'started_early' THEN init
                                  WHEN 'not_started' THEN wb + 1 WHEN 'switched' THEN switch_d
                                  WHEN 'stopped' THEN stop_d END AS dev
            FROM z)
        SELECT person_id, arm, init AS {C.INITIATION_DAY}, stop_d AS {C.STOP_DAY},
               switch_d AS {C.SWITCH_DAY},
               CASE WHEN dev <= end_day THEN dev END AS {C.DEVIATION_DAY},
               CASE WHEN dev <= end_day THEN reason END AS {C.DEVIATION_REASON}
        FROM d"""


def add_clone_deviations(extract: Extract, protocol: Protocol, cohort: pd.DataFrame) -> pd.DataFrame:
    """The clone cohort with ``initiation_day, stop_day, switch_day, deviation_day,
    deviation_reason`` appended (CONTRACTS §5d); rows keep the cohort's order."""
    if "end_day" not in cohort.columns:
        raise CohortError("design clone: deviations are counted within the follow-up of the primary "
                          "time-to-event outcome (end_day); the primary outcome is measured")
    con = extract.con

    def go():
        _register(con, cohort)
        return con.execute(clone_deviation_sql(extract, protocol)).df()

    dev = _run(extract, "finding the clones' deviation days", go)
    out = cohort.merge(dev, on=["person_id", "arm"], how="left", validate="one_to_one")
    for col in (C.INITIATION_DAY, C.STOP_DAY, C.SWITCH_DAY, C.DEVIATION_DAY):
        out[col] = out[col].astype("Int64")
    out[C.DEVIATION_REASON] = out[C.DEVIATION_REASON].astype(object).where(
        out[C.DEVIATION_REASON].notna(), None)
    return out


def build_clone_cohort(extract: Extract, protocol: Protocol, steps_only: bool = False) -> CohortResult:
    """Eligibility (CONTRACTS §5d) and, unless ``steps_only``, the clones with their deviations.

    Raises
    ------
    CohortError
        When the cohort ends empty (naming the step that removed its last person), or the
        protocol reads a table or column the extract lacks.
    """
    con, p = extract.con, protocol
    done = Progress("clone cohort (time zero, coverage, code windows, eligibility, clones, deviations)", 6)
    with duckdb_failures(extract, "building the clone cohort"):
        _make_init(con, extract, p)
        done.step()
        _make_coverage(con)
        done.step()
        pl = Planner(extract, p)
        steps = [s for s in _plan_steps(pl, p, steps_only) if s[0] != "same_day"]
        tables = make_aggregates(con, extract, pl.plans)
        done.step()
        _select_all(con, p, pl, tables, steps)
        att = _attrition(con, p, steps)
        done.step()
        if steps_only:
            done.close()
            return CohortResult(att, None)
        clones = _clone_frame(con, p)
        done.step()
        clones = add_clone_deviations(extract, p, clones)
        done.step()
        done.close()
        return CohortResult(att, clones)
