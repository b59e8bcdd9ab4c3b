"""The emulated cohort: eligibility steps, time zero, arms, follow-up, outcomes (CONTRACTS §3a).

Everything runs in DuckDB SQL over the extract's views, in a fixed chain of temporary tables so
each piece is computed once:

``_c_arm_rec``
    records of every arm's initiating concept (person, date, arm index);
``_c_init``
    time zero (the first such record inside the entry window), which arms start on day 0, and
    whether any arm's concept appears in the washout window;
``_c_cov``
    the merged coverage period holding day 0 (periods that overlap or touch are merged);
``_c_agg_<n>``
    one pass per extract source: every criterion, covariate summary and outcome day of that
    source, aggregated per person over its window;
``_c_all``
    all of it side by side, with ``first_fail``: the first eligibility step the person fails.

The attrition table counts ``first_fail``; the cohort is the persons who fail no step.
"""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from emulant import columns as C
from emulant.cohort.covariates import (
    CohortError,
    Planner,
    age_sql,
    concept_condition,
    duckdb_failures,
    finish_covariates,
    lit,
    make_aggregates,
    merged_coverage_sql,
    nearest_sql,
    person_covariate_sql,
    q,
    summary_sql,
    zero_when_none,
)
from emulant.extract import Extract
from emulant.progress import Progress
from emulant.protocol import Protocol
from emulant.protocol.model import DEATH


@dataclass
class CohortResult:
    """``attrition``: one row per eligibility step; ``cohort``: one row per person (or None)."""

    attrition: pd.DataFrame
    cohort: pd.DataFrame | None = None

    def to_dict(self) -> dict:
        return {"attrition": self.attrition.to_dict(orient="records"),
                "persons": None if self.cohort is None else int(len(self.cohort))}


def _days(a: int, b: int) -> str:
    return f"day {a}" if a == b else f"days {a} to {b}"


def _arm_records(ex: Extract, p: Protocol) -> str:
    parts = []
    for i, arm in enumerate(p.strategies.arms):
        c = p.concept(arm.initiate)
        if not ex.has(c.source):
            raise CohortError(f"strategies.arms.{arm.name}: concept '{c.name}' reads table "
                              f"'{c.source}', which the extract {ex.path} does not have")
        cond = concept_condition(c, "s", ex.columns[c.source], c.source)
        parts.append(f"SELECT s.person_id, s.date, {i} AS arm FROM {q(c.source)} s WHERE {cond}")
    return " UNION ALL ".join(parts)


def _make_init(con, ex: Extract, p: Protocol) -> None:
    e, st = p.eligibility, p.strategies
    con.execute(f"CREATE OR REPLACE TEMP TABLE _c_arm_rec AS {_arm_records(ex, p)}")
    day0 = ", ".join(f"bool_or(r.arm = {i} AND r.date = t.time_zero) AS day0_{i}"
                     for i in range(len(st.arms)))
    w = st.washout_days
    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE _c_init AS
        WITH t AS (
            SELECT person_id, min(date) AS time_zero FROM _c_arm_rec
            WHERE date BETWEEN DATE {lit(e.entry_start)} AND DATE {lit(e.entry_end)}
            GROUP BY person_id)
        SELECT t.person_id, t.time_zero, {day0},
               coalesce(bool_or(r.date BETWEEN t.time_zero - {w} AND t.time_zero - 1), FALSE)
                   AS washout_hit
        FROM t JOIN _c_arm_rec r ON r.person_id = t.person_id
        GROUP BY t.person_id, t.time_zero""")


def _make_coverage(con) -> None:
    """The merged coverage period holding day 0 (:func:`merged_coverage_sql`)."""
    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE _c_cov AS
        WITH m AS ({merged_coverage_sql('_c_init')})
        SELECT m.person_id, date_diff('day', i.time_zero, m.s) AS cov_start_day,
               date_diff('day', i.time_zero, m.e) AS coverage_end_day
        FROM m JOIN _c_init i ON i.person_id = m.person_id
        WHERE m.s <= i.time_zero AND m.e >= i.time_zero""")


# ----------------------------------------------------------------------------- steps and columns


def _describe_arms(p: Protocol) -> str:
    return " or ".join(f"{a.initiate} (arm {a.name})" for a in p.strategies.arms)


def _plan_steps(pl: Planner, p: Protocol, steps_only: bool) -> list[tuple[str, str, str]]:
    """The eligibility steps after ``initiated``: (name, description, SQL true when failed)."""
    e, st = p.eligibility, p.strategies
    n_day0 = " + ".join(f"CAST(day0_{i} AS INTEGER)" for i in range(len(st.arms)))
    if st.same_day == "exclude":
        steps = [("same_day", "both arms' concepts on day 0: excluded", f"({n_day0}) > 1")]
    else:
        steps = [("same_day", f"both arms' concepts on day 0: kept in the arm listed first "
                  f"({st.arms[0].name})", "FALSE")]
    lo, hi = e.age_min, e.age_max
    if lo is not None and hi is not None:
        steps.append(("age", f"age {lo} to {hi} completed years at time zero",
                      f"age_years IS NULL OR age_years < {lo} OR age_years > {hi}"))
    elif lo is not None or hi is not None:
        word, cmp, v = ("at least", "<", lo) if lo is not None else ("at most", ">", hi)
        steps.append(("age", f"age {word} {v} completed years at time zero",
                      f"age_years IS NULL OR age_years {cmp} {v}"))
    else:
        steps.append(("age", "no age limits", "FALSE"))
    cbd = e.coverage_before_days
    steps.append(("coverage_before", f"one continuous coverage period from day -{cbd} to day 0",
                  f"cov_start_day IS NULL OR cov_start_day > -{cbd}"))
    arms = " or ".join(a.initiate for a in st.arms if a.starts)
    w = st.washout_days
    steps.append(("washout", f"no record of {arms} in days -{w} to -1 (new users)"
                  if w > 0 else "no washout (washout_days 0)", "washout_hit"))
    for i, r in enumerate(e.require):
        pl.add(f"req_{i}", r.concept, None, *r.window, lambda c: f"count_if({c}) > 0")
        steps.append((f"require:{r.concept}", f"at least one record of {r.concept} in "
                      f"{_days(*r.window)}", f"NOT coalesce(req_{i}, FALSE)"))
    for i, r in enumerate(e.exclude):
        pl.add(f"exc_{i}", r.concept, None, *r.window, lambda c: f"count_if({c}) > 0")
        steps.append((f"exclude:{r.concept}", f"no record of {r.concept} in "
                      f"{_days(*r.window)}", f"coalesce(exc_{i}, FALSE)"))
    for i, cov in enumerate(p.covariates):
        if cov.missing == "exclude":
            steps.append((f"covariate:{cov.name}", f"covariate {cov.name} is known "
                          "(missing: exclude)", f"cv_{i} IS NULL"))
    cc = [(j, m) for j, m in enumerate(p.outcomes.measured()) if m.missing == "complete_case"]
    if cc:
        what = "; ".join(f"{m.measure} in "
                         f"{_days(m.at_day - m.tolerance_days, m.at_day + m.tolerance_days)}"
                         + (f" and a baseline in {_days(-m.tolerance_days, 0)}"
                            if m.change_from_baseline else "") for _, m in cc)
        steps.append(("outcome_measured", f"measured outcome recorded: {what}",
                      " OR ".join(f"mv_{j} IS NULL" for j, _ in cc)))
    _plan_values(pl, p, steps_only)
    return steps


def _plan_values(pl: Planner, p: Protocol, steps_only: bool) -> None:
    """Covariate summaries, outcome days and measured values (only what the steps need when
    ``steps_only``)."""
    for i, cov in enumerate(p.covariates):
        if cov.summary is None or (steps_only and cov.missing != "exclude"):
            continue
        pl.add(f"cv_{i}", cov.concept, cov.source, *cov.window,
               lambda c, s=cov.summary: summary_sql(s, c))
    for j, m in enumerate(p.outcomes.measured()):
        if steps_only and m.missing != "complete_case":
            continue
        a, b = m.at_day - m.tolerance_days, m.at_day + m.tolerance_days
        pl.add(f"mr_{j}", m.measure, None, a, b, lambda c, d=m.at_day: nearest_sql(c, d))
        pl.add(f"mb_{j}", m.measure, None, -m.tolerance_days, 0,
               lambda c: summary_sql("last", c))
    if steps_only:
        return
    first_day = lambda c: f"min(day) FILTER (WHERE {c})"  # noqa: E731
    for j, m in enumerate(p.outcomes.measured()):  # deaths before at_day: the report counts them
        pl.add(f"md_{j}", DEATH, None, 0, m.at_day - 1, first_day)
    for j, o in enumerate(p.outcomes.time_to_event()):
        # all-cause death as an outcome (for the decision) counts from day 0, as it does when
        # it competes (CONTRACTS §3a)
        start = 0 if p.concept(o).source == "deaths" else 1
        pl.add(f"od_{j}", o, None, start, p.follow_up.max_days, first_day)
    if p.outcomes.competing:
        comp = p.concept(p.outcomes.competing[0])
        pl.add("comp_day", comp.name, None, 0 if comp.source == "deaths" else 1,
               p.follow_up.max_days, first_day)


def _select_all(con, p: Protocol, pl: Planner, tables: list[str],
                steps: list[tuple[str, str, str]], arm_idx: str | None = None,
                init: str = "_c_init", cov: str = "_c_cov", keys: tuple[str, ...] = ()) -> None:
    """``_c_all``: every candidate row of ``init`` (one per person, or per person and each of
    ``keys``) with its arm, coverage, age, covariates, measured values and first failed step."""
    if arm_idx is None:
        arm_idx = "CASE " + " ".join(f"WHEN day0_{i} THEN {i}" for i in range(len(p.strategies.arms))) + " END"
    on = "".join(f" AND {{t}}.{k} = i.{k}" for k in keys)
    sel = ["i.*", f"{arm_idx} AS arm_idx", "cv.cov_start_day", "cv.coverage_end_day",
           f"{age_sql('p.birth_date', 'i.time_zero')} AS age_years"]
    pcols = set(pl.ex.columns.get("persons", []))
    for i, c in enumerate(p.covariates):
        if c.attribute is not None and c.attribute not in pcols:
            raise CohortError(f"covariates ({c.name}): table 'persons' has no column "
                              f"'{c.attribute}' (columns: {', '.join(sorted(pcols))})")
        expr = person_covariate_sql(c, "i.time_zero", "p")
        if expr is not None:
            sel.append(f"{expr} AS cv_{i}")
    joins = []
    zero = {f"cv_{i}" for i, c in enumerate(p.covariates) if zero_when_none(c.summary)}
    for t, plan in zip(tables, [x for x in pl.plans.values() if x.aggs], strict=True):
        joins.append(f"LEFT JOIN {t} ON {t}.person_id = i.person_id" + on.format(t=t))
        for a in plan.aggs:
            sel.append(f"coalesce({t}.{a}, 0) AS {a}" if a in zero else f"{t}.{a}")
    meas = []
    for j, m in enumerate(p.outcomes.measured()):
        if f"mr_{j}" in {a for plan in pl.plans.values() for a in plan.aggs}:
            meas.append(f"mr_{j} - mb_{j} AS mv_{j}" if m.change_from_baseline
                        else f"mr_{j} AS mv_{j}")
    fail = " ".join(f"WHEN {sql} THEN {k}" for k, (_, _, sql) in enumerate(steps))
    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE _c_all AS
        SELECT *, CASE {fail} ELSE NULL END AS first_fail FROM (
            SELECT *{''.join(', ' + x for x in meas)} FROM (
                SELECT {', '.join(sel)}
                FROM {init} i LEFT JOIN persons p ON p.person_id = i.person_id
                LEFT JOIN {cov} cv ON cv.person_id = i.person_id{on.format(t="cv")} {' '.join(joins)}))""")


# ----------------------------------------------------------------------------- attrition


def _attrition(con, p: Protocol, steps) -> tuple[pd.DataFrame, list[dict[str, int]]]:
    """The attrition table and, per step, the persons remaining in each arm."""
    arms = p.strategies.arm_names
    n_persons = con.execute("SELECT count(*) FROM persons").fetchone()[0]
    day0 = ", ".join(f"count_if(day0_{i})" for i in range(len(arms)))
    init = con.execute(f"SELECT count(*), {day0} FROM _c_init").fetchone()
    counts = con.execute("SELECT first_fail, arm_idx, count(*) FROM _c_all GROUP BY ALL").fetchall()
    rows = [("persons", "every person in the extract", n_persons, 0)]
    e = p.eligibility
    rows.append(("initiated", f"first record of {_describe_arms(p)} from {e.entry_start} to "
                 f"{e.entry_end} (time zero)", init[0], n_persons - init[0]))
    by_arm = [dict.fromkeys(arms, n_persons), dict(zip(arms, init[1:], strict=True))]
    for k, (name, desc, _) in enumerate(steps):
        left = {a: sum(n for f, i, n in counts if i == ai and (f is None or f > k))
                for ai, a in enumerate(arms)}
        total = sum(n for f, _, n in counts if f is None or f > k)
        rows.append((name, desc, total, rows[-1][2] - total))
        by_arm.append(left)
    df = pd.DataFrame(rows, columns=["step", "description", "remaining", "excluded"])
    return df.astype({"remaining": "int64", "excluded": "int64"}), by_arm


def _check_not_empty(att: pd.DataFrame, by_arm: list[dict[str, int]], arms) -> None:
    """Raise :class:`CohortError` naming the step that removed the last person of the cohort or
    of an arm."""
    rem = att["remaining"].tolist()
    if rem[-1] == 0:
        k = rem.index(0)
        raise CohortError(
            f"the cohort is empty: step '{att.step[k]}' ({att.description[k]}) removed its last "
            f"{rem[k - 1] if k else 0} person(s)", step=att.step[k], attrition=att)
    for a in arms:
        seq = [d[a] for d in by_arm]
        if seq[-1] == 0:
            k = seq.index(0)
            raise CohortError(
                f"arm '{a}' has no one: step '{att.step[k]}' ({att.description[k]}) removed its "
                f"last {seq[k - 1] if k else 0} person(s)", step=att.step[k], arm=a,
                attrition=att)


# ----------------------------------------------------------------------------- the cohort


def _end_sql(p: Protocol, od: str, has_comp: bool) -> tuple[str, str]:
    """``end_day`` and ``end_reason`` of one time-to-event outcome: the first of outcome,
    competing event, administrative end, max_days and coverage end, ties in that order
    (coverage that ends on the planned end of follow-up is not censoring, CONTRACTS §3a)."""
    f = p.follow_up
    parts = [("outcome", od)]
    if has_comp:
        parts.append(("competing", "comp_day"))
    if f.administrative_end is not None:
        parts.append(("administrative_end",
                      f"date_diff('day', time_zero, DATE {lit(f.administrative_end)})"))
    parts.append(("max_follow_up", str(f.max_days)))
    parts.append(("coverage_end", "coverage_end_day"))
    end = f"least({', '.join(x for _, x in parts)})"
    reason = "CASE " + " ".join(f"WHEN {x} = {end} THEN '{r}'" for r, x in parts[:-1])
    return end, reason + " ELSE 'coverage_end' END"


def _cohort_frame(con, p: Protocol, keys: tuple[str, ...] = ("person_id",)) -> pd.DataFrame:
    """The cohort table from ``_c_all`` (one row per ``keys``: person, or person and trial)."""
    st = p.strategies
    arm = "CASE arm_idx " + " ".join(f"WHEN {i} THEN {lit(a)}" for i, a in
                                     enumerate(st.arm_names)) + " END"
    sel = [*keys, f"{arm} AS arm", f"CAST(arm_idx = {st.arm_names.index(st.treated)} "
           "AS INTEGER) AS treated", "time_zero"]
    sel += [f"cv_{i} AS {q(c.name)}" for i, c in enumerate(p.covariates)]
    has_comp = bool(p.outcomes.competing)
    tte = p.outcomes.time_to_event()
    for j, o in enumerate(tte):
        end, reason = _end_sql(p, f"od_{j}", has_comp and o not in p.outcomes.competing)
        if o == p.outcomes.primary:
            sel += [f"{end} AS end_day", f"{reason} AS end_reason"]
        sel += [f"{end} AS {q(C.end_day(o))}", f"{reason} AS {q(C.end_reason(o))}"]
    for j, m in enumerate(p.outcomes.measured()):
        sel += [f"mv_{j} AS {q(C.value(m.measure))}",
                f"CAST(mv_{j} IS NOT NULL AS INTEGER) AS {q(C.measured(m.measure))}",
                f"mb_{j} AS {q(C.baseline(m.measure))}",
                f"CAST(md_{j} IS NOT NULL AS INTEGER) AS {q(C.died_before(m.measure))}"]
    sel.append("coverage_end_day")
    df = con.execute(f"SELECT {', '.join(sel)} FROM _c_all WHERE first_fail IS NULL "
                     f"ORDER BY {', '.join(keys)}").df()
    df = finish_covariates(df, p)
    order = [*keys, "arm", "treated", "time_zero"]
    for c in p.covariates:
        order.append(c.name)
        if c.may_be_missing:
            order.append(C.missing_flag(c.name))
    order += [c for c in df.columns if c not in order]
    return df[order].reset_index(drop=True)


def build_cohort(extract: Extract, protocol: Protocol, steps_only: bool = False) -> CohortResult:
    """Apply the eligibility steps of CONTRACTS §3a and build the cohort table.

    Parameters
    ----------
    extract : the opened extract (:func:`emulant.extract.open_extract`).
    protocol : the parsed protocol.
    steps_only : compute the attrition only (what ``emulant check`` prints); ``cohort`` is None.

    Raises
    ------
    CohortError
        When the cohort or an arm ends empty (naming the step that removed its last person), or
        the protocol reads a table or column the extract lacks.

    Notes
    -----
    Time zero, arms, washout, windows and follow-up follow the target-trial emulation framework
    of Hernán & Robins, "Using big data to emulate a target trial when a randomized trial is
    not available", Am J Epidemiol 2016;183:758-764, with the exact day rules of §3a.
    """
    con, p = extract.con, protocol
    if p.strategies.design != "initiators":
        raise CohortError(f"strategies.design: design {p.strategies.design} is read by the protocol "
                          "but its cohort is not built yet in this version; use design initiators")
    done = Progress("cohort (time zero, coverage, code windows, eligibility, attrition, table)", 6)
    with duckdb_failures(extract, "building the cohort"):
        _make_init(con, extract, p)
        done.step()
        _make_coverage(con)
        done.step()
        pl = Planner(extract, p)
        steps = _plan_steps(pl, p, steps_only)
        tables = make_aggregates(con, extract, pl.plans)
        done.step()
        _select_all(con, p, pl, tables, steps)
        done.step()
        att, by_arm = _attrition(con, p, steps)
        _check_not_empty(att, by_arm, p.strategies.arm_names)
        done.step()
        result = CohortResult(att, None if steps_only else _cohort_frame(con, p))
        done.step()
        done.close()
        return result
