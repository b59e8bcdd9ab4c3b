"""Effect estimates for each outcome, estimand and method, with bootstrap intervals.

The orchestration of the estimation stage: one analysis sample (:mod:`.sample`) per point
estimate or bootstrap replicate; measured outcomes by :mod:`.measured`, time-to-event outcomes
by :mod:`.tte` (their curve rows get an ``outcome`` column, the first column of ``curves``); the
bootstrap (:mod:`.bootstrap`) refits all of it through :func:`replicate_estimates`; E-values
(:mod:`.evalue`) come last.
"""

from __future__ import annotations

import logging
import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from functools import partial
from typing import Any

import numpy as np
import pandas as pd

from emulant import columns
from emulant.cohort.covariates import adjustment_set, covariate_kinds
from emulant.errors import EmulantError, NonConvergenceWarning, ReplicateFailure
from emulant.estimation.bootstrap import (
    ROW_KEY,
    BootstrapRun,
    resampling_units,
    row_key,
    run_bootstrap,
)
from emulant.estimation.chunks import PointEstimate, combine_runs
from emulant.estimation.decision import DECISION_COLUMNS, decision_table
from emulant.estimation.evalue import e_value_rows
from emulant.estimation.gformula import gformula_estimates
from emulant.estimation.influence_rows import (
    attach_influence,
    bootstrap_needed,
    influence_account,
    influence_intervals,
)
from emulant.estimation.intervals import attach_intervals, no_replicates, non_estimable_replicates
from emulant.estimation.measured import EstimationError, measured_outcome_rows
from emulant.estimation.per_protocol import (
    adherence_summary,
    per_protocol_estimates,
    sample_adherence,
    weighted_periods,
)
from emulant.estimation.sample import (
    TREATED,
    AnalysisSample,
    SampleError,
    build_sample,
    treatment_indicator,
)
from emulant.estimation.subgroups import LevelAnalysis, level_differences, prepare_levels
from emulant.estimation.tte import time_to_event_estimates
from emulant.models.design import DesignError, build_design
from emulant.models.treatment_process import (
    AdherenceWeights,
    PersonPeriods,
    TreatmentProcessError,
    person_periods,
)
from emulant.models.weights import WeightsError
from emulant.progress import Progress
from emulant.protocol import MeasuredOutcome, Protocol

log = logging.getLogger(__name__)

ESTIMATE_COLUMNS = ("outcome", "contrast", "estimand", "method", "measure", "horizon_day", "arm",
                    "comparator", "estimate", "ci_low", "ci_high", "se", "n", "events", "note",
                    "subgroup")  # subgroup: last, empty for the whole cohort (CONTRACTS §5f)
CURVE_COLUMNS = ("contrast", "estimand", "method", "arm", "day", "risk", "ci_low", "ci_high",
                 "at_risk")
ADHERENCE_COLUMNS = ("estimand", "arm", "period", "start_day", "persons", "on_protocol",
                     "deviating", "weight_mean", "weight_p01", "weight_p99", "weight_max")
EffectsError = EstimationError  # the same class under the module's name


def estimate_sample(sample: AnalysisSample, progress: Progress | None = None,
                    person_time: PersonPeriods | None = None, problems: list | None = None,
                    adherence: AdherenceWeights | None = None) -> tuple[list[dict], list[dict]]:
    """Every outcome of the protocol for one sample (the point estimate or one replicate).

    Returns ``(rows, curve_rows)``: estimates.csv rows without ``se, ci_low, ci_high`` and
    curves.csv rows without ``ci_low, ci_high``. ``progress`` is stepped once per outcome.
    With ``person_time`` (the per-protocol contrast) the weights over time are refitted with the
    sample's frequency weights and every time-to-event outcome gets its per-protocol rows too;
    models that did not converge are appended to ``problems``; ``adherence`` passes weights
    over time already fitted on this sample.
    """
    rows: list[dict] = []
    curves: list[dict] = []
    outcomes = sample.protocol.outcomes
    if adherence is None and person_time is not None:
        # the weights over time serve ipw and standardization only
        weighted = {"ipw", "standardization"} & set(sample.protocol.analysis.methods)
        adherence = (sample_adherence(sample, person_time) if weighted
                     else AdherenceWeights({}, {}, ()))
    itt = "intention_to_treat" in sample.protocol.contrasts  # design clone: per protocol only
    for outcome in outcomes.all():  # primary, secondary, negative controls
        if isinstance(outcome, MeasuredOutcome):
            rows += measured_outcome_rows(sample, outcome) if itt else []
        else:
            r, c = time_to_event_estimates(sample, outcome) if itt else ([], [])
            if adherence is not None:
                r2, c2, fit_problems = per_protocol_estimates(sample, person_time, adherence, outcome)
                if "gformula" in sample.protocol.analysis.methods:
                    r3, c3 = gformula_estimates(sample, person_time, outcome, fit_problems)
                    r2, c2 = r2 + r3, c2 + c3
                r, c = list(r) + r2, list(c) + c2
                if problems is not None:
                    problems += [p for p in fit_problems if p not in problems]
            rows += list(r)
            # curves.csv has no outcome column (CONTRACTS §4); with several time-to-event
            # outcomes their curves need one to be told apart: the outcome's name
            curves += [{"outcome": outcome, **row} for row in c]
        if progress is not None:
            progress.step()
    return rows, curves


def replicate_estimates(cohort: pd.DataFrame, protocol: Protocol, design: Any, X: np.ndarray,
                        freq: np.ndarray, levels: tuple[LevelAnalysis, ...] = (),
                        starts: dict | None = None, person_time: PersonPeriods | None = None
                        ) -> tuple[list[dict], list[dict]]:
    """One bootstrap replicate: the whole analysis refitted with frequency weights ``freq``,
    then within each subgroup level of ``levels``.

    ``starts`` (the point estimate's hazard model coefficients) start the whole sample's Newton
    fits (a subgroup level's start from the crude rate).

    A sample whose models warn (e.g. a propensity model that did not converge) fails the
    replicate with that warning as its reason; a level that fails leaves only its own values
    missing in this replicate.
    """
    sample = build_sample(cohort, protocol, design, X, freq, starts)
    if sample.warnings:
        raise SampleError(sample.warnings[0])
    problems: list[str] = []
    rows, curves = estimate_sample(sample, person_time=person_time, problems=problems)
    if problems:
        raise SampleError(problems[0])
    for lv in levels:
        rows += level_estimates(lv, protocol, freq, point=False)[0]
    return rows, curves


def level_estimates(lv: LevelAnalysis, protocol: Protocol, freq: np.ndarray,
                    point: bool) -> tuple[list[dict], str | None]:
    """One subgroup level's rows (no curves), tagged with its ``subgroup``, or ``([], reason)``.

    For the point estimate only the failures a user's data can cause are caught; in a
    replicate any failure is, as for a whole replicate.
    """
    caught_types = (EmulantError, ReplicateFailure) if point else (Exception,)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            sample = build_sample(lv.cohort, protocol, lv.design, lv.X, freq[lv.level.rows])
            if sample.warnings:
                return [], sample.warnings[0]
            rows, _ = estimate_sample(sample)
        except caught_types as exc:
            return [], getattr(exc, "reason", None) or f"{type(exc).__name__}: {exc}"
    failed = [w for w in caught if issubclass(w.category, NonConvergenceWarning)]
    if failed:
        return [], str(failed[0].message)
    return [{**r, "subgroup": lv.level.label} for r in rows], None


# ----------------------------------------------------------------------------- results


@dataclass
class EffectsResult:
    """Estimates (estimates.csv), curves (curves.csv), the bootstrap's account (bootstrap.json)
    and the decision summary (decision.csv; header only when the protocol states no decision)."""

    estimates: pd.DataFrame
    curves: pd.DataFrame
    bootstrap: dict = field(default_factory=dict)
    decision: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=list(DECISION_COLUMNS)))

    @property
    def summary(self) -> pd.DataFrame:
        return self.estimates

    def to_dict(self) -> dict[str, Any]:
        def records(df: pd.DataFrame) -> list[dict]:
            return [{k: (None if isinstance(v, float) and math.isnan(v) else v) for k, v in r.items()}
                    for r in df.to_dict(orient="records")]

        return {"estimates": records(self.estimates), "curves": records(self.curves),
                "bootstrap": dict(self.bootstrap)}


def _frame(rows: list[dict], contract: tuple[str, ...]) -> pd.DataFrame:
    df = pd.DataFrame(rows)
    for c in contract:
        if c not in df.columns:
            df[c] = np.nan
    for c in ("horizon_day", "day", "n", "events", "at_risk"):
        if c in df.columns:
            df[c] = _whole_numbers(df[c])
    extra = [c for c in df.columns if c not in contract]
    return df[extra + list(contract)] if extra else df[list(contract)]


def _whole_numbers(s: pd.Series) -> pd.Series:
    """A count or day column as nullable integers when every value is whole (CSV shows 365)."""
    v = pd.to_numeric(s, errors="coerce")
    known = v.dropna()
    if len(known) and np.all(np.isclose(known, np.round(known), rtol=0, atol=1e-9)):
        return v.round().astype("Int64")
    return v if len(known) else s


def non_estimable_account(rows: list[dict], run: Any) -> list[dict]:
    """bootstrap.json's ``non_estimable``: each row with non-estimable replicates, and how many."""
    counts = non_estimable_replicates(rows, run)
    return [{**dict(zip(ROW_KEY, row_key(r, ROW_KEY), strict=True)), "replicates": int(c),
             "of": run.completed} for r, c in zip(rows, counts, strict=True) if c > 0]


def check_cohort(cohort: pd.DataFrame, protocol: Protocol) -> None:
    """Raise :class:`EffectsError` naming a column the estimators need that the cohort lacks."""
    need = [TREATED] + [columns.value(m.measure) for m in protocol.outcomes.measured()]
    missing = [c for c in need if c not in cohort.columns]
    if missing:
        raise EstimationError(f"cohort: missing column(s) {', '.join(missing)}")
    if len(cohort) == 0:
        raise EstimationError("cohort: no rows")


def _prepare(cohort: pd.DataFrame, protocol: Protocol
             ) -> tuple[Any, np.ndarray, list[LevelAnalysis], list[dict]]:
    """The design (levels, knots) learned once on the whole cohort, its matrix, and the
    subgroup levels with their account (:mod:`.subgroups`)."""
    check_cohort(cohort, protocol)
    try:
        kinds = covariate_kinds(protocol, cohort)
        design = build_design(cohort, adjustment_set(protocol, cohort), kinds,
                              protocol.analysis.propensity.continuous)
    except DesignError as exc:
        raise EstimationError(f"the point estimate cannot be computed: {exc}") from None
    levels, account = prepare_levels(cohort, protocol, kinds, treatment_indicator(cohort))
    return design, np.asarray(design.transform(cohort), dtype=float), levels, account


def person_time_of(cohort: pd.DataFrame, protocol: Protocol,
                   periods: pd.DataFrame | None) -> PersonPeriods | None:
    """``periods.parquet`` aligned with the cohort when the protocol asks for per protocol."""
    if not protocol.per_protocol:
        return None
    if periods is None:
        raise EstimationError("contrasts: per_protocol needs the person-periods (person_periods.parquet)")
    try:
        kinds = covariate_kinds(protocol, periods, protocol.time_varying)
        return person_periods(cohort, periods, protocol.analysis.period_days,
                              protocol.time_varying, kinds, protocol.analysis.propensity.continuous)
    except (DesignError, TreatmentProcessError, KeyError) as exc:
        raise EstimationError(f"the per-protocol estimate cannot be computed: {exc}") from None


def point_estimate(cohort: pd.DataFrame, protocol: Protocol,
                   periods: pd.DataFrame | None = None) -> PointEstimate:
    """Every outcome, estimand and method with unit frequency weights (no intervals yet), for
    the whole cohort and each subgroup level.

    Per protocol, the result also holds ``adherence`` (adherence.csv) and ``periods``
    (periods.parquet: ``periods`` with the weights over time the estimators used); an
    intention-to-treat protocol gets adherence.csv's header alone and no periods."""
    design, X, levels, account = _prepare(cohort, protocol)
    steps = Progress("point estimate (sample, each outcome, each subgroup level)",
                     1 + len(protocol.outcomes.all()) + len(levels))
    person_time = person_time_of(cohort, protocol, periods)
    problems: list[str] = []
    try:
        point = build_sample(cohort, protocol, design, X, resampling_units(cohort)[1])
        adherence = sample_adherence(point, person_time) if person_time is not None else None
        steps.step()
        rows, curves = estimate_sample(point, steps, person_time, problems, adherence)
        if protocol.analysis.variance == "influence":
            attach_influence(point, rows, curves)
    except (SampleError, WeightsError) as exc:
        raise EstimationError(f"the point estimate cannot be computed: {exc}") from None
    ones = point.freq
    reasons = {}
    for lv in levels:
        level_rows, why = level_estimates(lv, protocol, ones, point=True)
        rows += level_rows
        if why is not None:
            reasons[lv.level.label] = why
            log.warning("subgroup %s is not estimable: %s", lv.level.label, why)
        steps.step()
    steps.close()
    for a in account:
        if a["subgroup"] in reasons:
            a.update(estimable=False, reason=reasons[a["subgroup"]])
    for w in (*point.warnings, *problems):
        log.warning("point estimate: %s", w)
    starts = {o: {k: [float(v) for v in c] for k, c in m.items()} for o, m in point.fitted.items()}
    result = PointEstimate(rows, curves, [*point.warnings, *problems], account, starts,
                           adherence=pd.DataFrame(columns=list(ADHERENCE_COLUMNS)))
    if adherence is not None:
        result.adherence = adherence_summary(point, person_time, adherence)
        result.periods = weighted_periods(periods, person_time, adherence,
                                          protocol.analysis.methods)
    return result


def bootstrap_replicates(cohort: pd.DataFrame, protocol: Protocol, point: PointEstimate,
                         only: range | None = None, workers: int = 2,
                         progress: bool | Callable | None = None,
                         start_method: str | None = None,
                         periods: pd.DataFrame | None = None) -> BootstrapRun:
    """Replicates ``only`` (all when None) of the protocol's bootstrap, aligned to ``point``."""
    design, X, levels, _ = _prepare(cohort, protocol)
    estimable = {a["subgroup"] for a in point.subgroups if a["estimable"]}
    levels = tuple(lv for lv in levels if lv.level.label in estimable)
    starts = {o: {k: np.asarray(c, dtype=float) for k, c in m.items()}
              for o, m in point.starts.items()}
    estimator = partial(replicate_estimates, cohort, protocol, design, X, levels=levels,
                        starts=starts, person_time=person_time_of(cohort, protocol, periods))
    clusters, base = resampling_units(cohort)
    return run_bootstrap(estimator, len(cohort), protocol, point.rows, point.curves,
                         workers=workers, progress=progress, start_method=start_method, only=only,
                         clusters=clusters, base=base)


def gather_effects(point: PointEstimate, runs: list[BootstrapRun], protocol: Protocol) -> EffectsResult:
    """The point estimate with the intervals of its bootstrap chunks, the decision summary, then
    the E-values."""
    if bootstrap_needed(protocol):
        boot = combine_runs(runs, protocol, len(point.rows), len(point.curves))
    else:  # every interval from the influence function: the workflow ran no replicate
        boot = no_replicates(protocol, len(point.rows), len(point.curves))
    extra_rows, extra_reps = level_differences(point.rows, boot.row_reps, point.subgroups)
    boot = replace(boot, row_reps=np.hstack([boot.row_reps, extra_reps]))
    interval = protocol.analysis.bootstrap.interval
    rows, curves = attach_intervals(point.rows + extra_rows, point.curves, boot, interval)
    if protocol.analysis.variance == "influence":
        rows, curves = influence_intervals(point.rows + extra_rows, point.curves, rows, curves,
                                           replicates=boot.requested > 0)
    decision = decision_table(rows, boot.row_reps, protocol, interval)
    account = boot.account()
    account["non_estimable"] = non_estimable_account(rows, boot)
    if protocol.analysis.variance == "influence":
        account.update(influence_account(point.rows, account["non_estimable"]))
    rows = rows + e_value_rows(rows, protocol.outcomes.negative_controls)
    account["point_estimate_warnings"] = list(point.warnings)
    if point.subgroups:
        account["subgroups"] = [{k: a[k] for k in ("subgroup", "estimable", "reason")}
                                for a in point.subgroups]
    return EffectsResult(_frame(rows, ESTIMATE_COLUMNS), _frame(curves, CURVE_COLUMNS), account,
                         decision)


def estimate_effects(cohort: pd.DataFrame, protocol: Protocol, workers: int = 2,
                     progress: bool | Callable | None = None,
                     start_method: str | None = None,
                     periods: pd.DataFrame | None = None) -> EffectsResult:
    """The point estimates of every outcome, estimand and method, with bootstrap intervals.

    The design (levels, knots) is learned once on the whole cohort; the point estimate uses unit
    frequency weights; ``analysis.bootstrap.replicates`` replicates refit everything with
    multinomial frequency weights (:func:`emulant.estimation.bootstrap.run_bootstrap`). The
    workflow runs the same three steps as separate jobs (:mod:`emulant.estimation.chunks`).

    Parameters
    ----------
    cohort : cohort.parquet as a DataFrame.
    protocol : the parsed protocol.
    workers : processes for the bootstrap (1 runs in this process).
    progress : None (a bar on stderr when it is a terminal), True/False, or ``f(done, total)``.
    start_method : the worker pool's start method, 'fork' (default where available) or 'spawn'
        (which re-imports the caller's main module: guard it with ``if __name__ == "__main__"``).
    periods : periods.parquet (CONTRACTS §5g), needed when the protocol asks for per protocol.
    """
    point = point_estimate(cohort, protocol, periods)
    runs = [bootstrap_replicates(cohort, protocol, point, workers=workers, progress=progress,
                                 start_method=start_method, periods=periods)
            ] if bootstrap_needed(protocol) else []
    return gather_effects(point, runs, protocol)
