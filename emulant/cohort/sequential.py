"""Design ``sequential``: a trial every ``trial_every_days`` days, start against do not start
(CONTRACTS §5c).

Trial ``j`` starts on ``t_j = entry.start + j * trial_every_days`` for every ``t_j <= entry.end``
and has time zero ``t_j``. Every person is a candidate of every trial; the candidates are counted
in person-trials through the steps ``alive`` (no death before ``t_j``), ``age``,
``coverage_before``, ``washout`` (no record of the initiating concept in ``[-washout_days, -1]``),
``require:*``, ``exclude:*``, ``covariate:*`` (and ``outcome_measured``), each exactly as §3a with
time zero ``t_j``. A candidate is in the initiating arm when the concept has a record in days
``0 .. trial_every_days - 1`` and in the ``none`` arm otherwise.

Everything runs in DuckDB SQL with the eligibility module's pieces, keyed by person and trial
instead of person:

``_s_trials``
    the trials and their start dates;
``_s_init``
    every person at every trial: death before the start, washout hit, the first day of the
    initiating concept in ``0 .. trial_every_days - 1``;
``_s_cov``
    the merged coverage period holding each trial's start;
``_c_agg_<n>``, ``_c_all``
    the per-source aggregates and the candidates side by side with ``first_fail``, as for the
    initiators design, one row per person-trial.

Non-initiators may be sampled (``noninitiator_sample``): a person-trial of the ``none`` arm is
kept when a uniform draw from ``numpy.random.default_rng([seed, trial])`` (one stream per trial,
drawn in person order) falls below the share; kept rows carry ``sample_weight = 1/share``,
initiators 1. The draw depends only on the seed, the trial and the trial's candidates, so a rerun
keeps the same person-trials.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import numpy as np
import pandas as pd

from emulant.cohort.covariates import (
    CohortError,
    Planner,
    concept_condition,
    duckdb_failures,
    lit,
    make_aggregates,
    merged_coverage_sql,
    q,
)
from emulant.cohort.eligibility import CohortResult, _check_not_empty, _cohort_frame, _plan_steps
from emulant.cohort.eligibility import _select_all as select_all
from emulant.extract import Extract
from emulant.progress import Progress
from emulant.protocol import Protocol

TRIAL = "trial"
SAMPLE_WEIGHT = "sample_weight"
KEYS = ("person_id", TRIAL)


@dataclass(frozen=True)
class TrialPlan:
    """The sequential design's settings: the arm that starts (its concept initiates) and the
    arm that does not, the days between trial starts, the share of non-initiators kept and
    the seed of that sampling (the bootstrap seed)."""

    start_arm: str
    none_arm: str
    every_days: int
    sample_share: float = 1.0
    seed: int = 0


def plan_of(protocol: Protocol) -> TrialPlan:
    """The :class:`TrialPlan` a protocol of design sequential states (the sampling seed is the
    bootstrap's)."""
    st = protocol.strategies
    start = next(a.name for a in st.arms if a.starts)
    none = next(a.name for a in st.arms if not a.starts)
    return TrialPlan(start, none, st.trial_every_days, st.noninitiator_sample,
                     protocol.analysis.bootstrap.seed)


def trial_starts(start: dt.date, end: dt.date, every_days: int) -> list[dt.date]:
    """``t_j = start + j * every_days`` for every ``t_j <= end`` (j = 0, 1, ...)."""
    if every_days < 1:
        raise CohortError(f"strategies.trial_every_days: expected at least 1, got {every_days}")
    n = (end - start).days // every_days + 1 if end >= start else 0
    return [start + dt.timedelta(days=j * every_days) for j in range(n)]


def _make_init(con, ex: Extract, p: Protocol, plan: TrialPlan, n_trials: int) -> None:
    e = p.eligibility
    arm = next(a for a in p.strategies.arms if a.name == plan.start_arm)
    c = p.concept(arm.initiate)
    if not ex.has(c.source):
        raise CohortError(f"strategies.arms.{arm.name}: concept '{c.name}' reads table "
                          f"'{c.source}', which the extract {ex.path} does not have")
    cond = concept_condition(c, "s", ex.columns[c.source], c.source)
    k, w = plan.every_days, p.strategies.washout_days
    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE _s_trials AS
        SELECT range AS {TRIAL}, CAST(DATE {lit(e.entry_start)} + CAST(range * {k} AS INTEGER)
               AS DATE) AS time_zero FROM range(0, {n_trials})""")
    deaths = ("SELECT person_id, min(date) AS death_date FROM deaths GROUP BY person_id"
              if ex.has("deaths") else
              "SELECT NULL::BIGINT AS person_id, NULL::DATE AS death_date WHERE FALSE")
    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE _s_init AS
        WITH r AS (SELECT DISTINCT s.person_id, s.date FROM {q(c.source)} s WHERE {cond}),
        h AS (
            SELECT r.person_id, t.{TRIAL}, bool_or(r.date < t.time_zero) AS washout_hit,
                   min(date_diff('day', t.time_zero, r.date))
                       FILTER (WHERE r.date >= t.time_zero) AS start_day
            FROM r JOIN _s_trials t
              ON r.date BETWEEN t.time_zero - {w} AND t.time_zero + {k - 1}
            GROUP BY ALL),
        d AS ({deaths})
        SELECT p.person_id, t.{TRIAL}, t.time_zero,
               coalesce(d.death_date < t.time_zero, FALSE) AS died_before,
               coalesce(h.washout_hit, FALSE) AS washout_hit, h.start_day
        FROM (SELECT DISTINCT person_id FROM persons) p CROSS JOIN _s_trials t
        LEFT JOIN d ON d.person_id = p.person_id
        LEFT JOIN h ON h.person_id = p.person_id AND h.{TRIAL} = t.{TRIAL}""")
    con.execute(f"""
        CREATE OR REPLACE TEMP TABLE _s_cov AS
        WITH m AS ({merged_coverage_sql('persons')})
        SELECT i.person_id, i.{TRIAL}, date_diff('day', i.time_zero, m.s) AS cov_start_day,
               date_diff('day', i.time_zero, m.e) AS coverage_end_day
        FROM m JOIN _s_init i ON i.person_id = m.person_id
        WHERE m.s <= i.time_zero AND m.e >= i.time_zero""")


def _steps(pl: Planner, p: Protocol, plan: TrialPlan, steps_only: bool):
    """``alive``, then the initiators design's steps from ``age`` on (its ``same_day`` has no
    meaning here), the washout naming the one initiating concept."""
    steps = _plan_steps(pl, p, steps_only)[1:]
    concept = next(a.initiate for a in p.strategies.arms if a.name == plan.start_arm)
    w = p.strategies.washout_days
    steps = [(n, f"no record of {concept} in days -{w} to -1 before the trial's start"
              if w > 0 else "no washout (washout_days 0)", sql) if n == "washout" else (n, d, sql)
             for n, d, sql in steps]
    return [("alive", "no death before the trial's start", "died_before"), *steps]


def _select_all(con, p: Protocol, plan: TrialPlan, pl: Planner, tables: list[str], steps) -> None:
    names = p.strategies.arm_names
    si, ni = names.index(plan.start_arm), names.index(plan.none_arm)
    select_all(con, p, pl, tables, steps, f"CASE WHEN i.start_day IS NOT NULL THEN {si} ELSE {ni} END",
               init="_s_init", cov="_s_cov", keys=(TRIAL,))


def _attrition(con, p: Protocol, plan: TrialPlan, steps, starts: list[dt.date]):
    """Attrition in person-trials, the distinct persons beside each count; per step, the
    person-trials remaining in each arm."""
    arms = p.strategies.arm_names
    counts = con.execute("SELECT first_fail, arm_idx, count(*) FROM _c_all "
                         "GROUP BY ALL").fetchall()
    left = ", ".join(f"count(DISTINCT person_id) FILTER (WHERE first_fail IS NULL OR first_fail "
                     f"> {k})" for k in range(len(steps)))
    persons = con.execute(f"SELECT count(DISTINCT person_id), {left} FROM _c_all").fetchone()
    total = sum(n for _, _, n in counts)
    rows = [("person_trials", f"every person at the start of each of {len(starts)} trials "
             f"({starts[0]} to {starts[-1]}, every {plan.every_days} days)", total, 0, persons[0])]
    by_arm = [dict.fromkeys(arms, total)]
    for k, (name, desc, _) in enumerate(steps):
        kept = {a: sum(n for f, i, n in counts if i == ai and (f is None or f > k))
                for ai, a in enumerate(arms)}
        n = sum(kept.values())
        rows.append((name, desc, n, rows[-1][2] - n, persons[k + 1]))
        by_arm.append(kept)
    df = pd.DataFrame(rows, columns=["step", "description", "remaining", "excluded", "persons"])
    return df.astype({"remaining": "int64", "excluded": "int64", "persons": "int64"}), by_arm


def sample_noninitiators(cohort: pd.DataFrame, none_arm: str, share: float,
                         seed: int) -> pd.DataFrame:
    """Keep every initiator and a share of each trial's non-initiators, ``sample_weight``
    1/share on the kept ones (1 on initiators); one stream ``default_rng([seed, trial])`` per
    trial, drawn over its non-initiators in person order."""
    if not 0 < share <= 1:
        raise CohortError(f"strategies.noninitiator_sample: expected a share in (0, 1], got {share}")
    out = cohort.sort_values(list(KEYS), kind="stable").reset_index(drop=True)
    none = (out["arm"] == none_arm).to_numpy()
    keep = np.ones(len(out), dtype=bool)
    if share < 1:
        trials = out[TRIAL].to_numpy()
        for t in np.unique(trials[none]):  # one stream per trial, vectorised within it
            rows = np.flatnonzero(none & (trials == t))
            keep[rows] = np.random.default_rng([int(seed), int(t)]).random(len(rows)) < share
    out[SAMPLE_WEIGHT] = np.where(none, 1.0 / share, 1.0)
    return out[keep].reset_index(drop=True)


def build_sequential(extract: Extract, protocol: Protocol, plan: TrialPlan,
                     steps_only: bool = False) -> CohortResult:
    """The person-trials of the sequential design (CONTRACTS §5c) and their attrition.

    ``cohort`` has one row per kept person-trial (``person_id, trial``, arm, ``time_zero`` =
    the trial's start, covariates, follow-up and outcomes as §3a, ``sample_weight``);
    ``attrition`` counts person-trials with the distinct persons in ``persons``, and ends with
    ``noninitiator_sample`` when the share is below 1.

    Raises
    ------
    CohortError
        When the cohort or an arm ends empty, or the protocol reads a table the extract lacks.

    Notes
    -----
    The sequence of trials follows Hernán, Alonso, Logan et al., "Observational studies
    analyzed like randomized experiments", Epidemiology 2008;19:766-779, and Danaei, García
    Rodríguez, Cantero et al., Stat Methods Med Res 2013;22:70-96.
    """
    con, p, e = extract.con, protocol, protocol.eligibility
    if p.per_protocol:
        raise CohortError("contrasts: design sequential estimates intention_to_treat in this "
                          "version; its per_protocol contrast (person-time of person-trials) is "
                          "not built yet: use contrasts: [intention_to_treat]")
    starts = trial_starts(e.entry_start, e.entry_end, plan.every_days)
    if not starts:
        raise CohortError(f"eligibility.entry: no trial starts from {e.entry_start} to "
                          f"{e.entry_end}", step="person_trials")
    done = Progress("sequential trials (starts, coverage, code windows, eligibility, table)", 5)
    with duckdb_failures(extract, "building the sequential trials"):
        _make_init(con, extract, p, plan, len(starts))
        done.step()
        pl = Planner(extract, p)
        steps = _steps(pl, p, plan, steps_only)
        tables = make_aggregates(con, extract, pl.plans, init="_s_init", keys=(TRIAL,))
        done.step()
        _select_all(con, p, plan, pl, tables, steps)
        done.step()
        att, by_arm = _attrition(con, p, plan, steps, starts)
        _check_not_empty(att, by_arm, p.strategies.arm_names)
        done.step()
        cohort = None
        if not steps_only:
            cohort = sample_noninitiators(_cohort_frame(con, p, KEYS), plan.none_arm,
                                          plan.sample_share, plan.seed)
            if plan.sample_share < 1:
                kept = len(cohort)
                att.loc[len(att)] = ("noninitiator_sample", f"non-initiators kept at share "
                                     f"{plan.sample_share:g} (weight {1 / plan.sample_share:g})",
                                     kept, int(att.remaining.iloc[-1]) - kept,
                                     int(cohort.person_id.nunique()))
        done.step()
        done.close()
        return CohortResult(att, cohort)
