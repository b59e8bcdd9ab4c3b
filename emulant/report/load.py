"""Read the results files the report is built from (CONTRACTS §4); a missing file is ``None``."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pandas as pd

from emulant import columns as col
from emulant.errors import EmulantError
from emulant.protocol import Protocol

DESIGN_FILES = ("extract_check.json", "attrition.csv", "cohort.parquet", "weights.parquet",
                "balance.csv", "positivity.json")
OUTCOME_FILES = ("estimates.csv", "curves.csv", "bootstrap.json", "decision.csv")


class ReportError(EmulantError):
    """A results file the report needs is unreadable or lacks a column; the message names it."""


def _json(path: Path) -> Any:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise ReportError(f"{path}: not readable as JSON ({exc})") from None


def _csv(path: Path, need: tuple[str, ...]) -> pd.DataFrame:
    try:
        df = pd.read_csv(path, keep_default_na=True, dtype={"level": str, "comparator": str,
                                                             "estimand": str, "arm": str})
    except (OSError, ValueError) as exc:
        raise ReportError(f"{path}: not readable as CSV ({exc})") from None
    absent = [c for c in need if c not in df.columns]
    if absent:
        raise ReportError(f"{path}: missing column(s) {', '.join(absent)} "
                          f"(columns: {', '.join(map(str, df.columns))})")
    return df


def design_columns(protocol: Protocol) -> list[str]:
    """The cohort columns the outcome-blind design report may read: arm and covariates."""
    cols = ["person_id", "arm", "trial", "time_zero", "sample_weight"]  # trial: §5c person-trials
    for c in protocol.covariates:
        cols.append(c.name)
        if c.may_be_missing:
            cols.append(col.missing_flag(c.name))
    return cols


def outcome_columns(protocol: Protocol) -> list[str]:
    """The cohort's outcome columns: follow-up of every time-to-event outcome (primary
    included), whether each measured outcome was measured and who died before its day."""
    out = ["end_day", "end_reason"]
    for o in protocol.outcomes.time_to_event():
        out += [col.end_day(o), col.end_reason(o)]
    for m in protocol.outcomes.measured():
        out += [col.measured(m.measure), col.died_before(m.measure)]
    return out + ["deviation_day", "deviation_reason"]


def read_cohort(path: Path, protocol: Protocol, design: bool) -> pd.DataFrame:
    """Read ``cohort.parquet``; in a design report only the arm and covariate columns."""
    import pyarrow.parquet as pq

    try:
        names = pq.read_schema(path).names
    except (OSError, ValueError) as exc:
        raise ReportError(f"{path}: not readable as Parquet ({exc})") from None
    if "arm" not in names:
        raise ReportError(f"{path}: missing column arm")
    wanted = design_columns(protocol) + ([] if design else outcome_columns(protocol))
    return pd.read_parquet(path, columns=[c for c in wanted if c in names])


def read_results(results_dir: str | Path, protocol: Protocol, design: bool) -> dict[str, Any]:
    """Every results file as a DataFrame or dict, ``None`` where the file does not exist.

    With ``design=True`` the outcome files are not opened at all, and only the arm and covariate
    columns of the cohort are read, so no outcome-derived value can reach the design report.
    """
    d = Path(results_dir)
    out: dict[str, Any] = {}
    p = d / "extract_check.json"
    out["extract_check"] = _json(p) if p.is_file() else None
    p = d / "attrition.csv"
    out["attrition"] = (_csv(p, ("step", "description", "remaining", "excluded"))
                        if p.is_file() else None)
    p = d / "cohort.parquet"
    out["cohort"] = read_cohort(p, protocol, design) if p.is_file() else None
    p = d / "weights.parquet"
    out["weights"] = pd.read_parquet(p) if p.is_file() else None
    p = d / "balance.csv"
    out["balance"] = (_csv(p, ("covariate", "level", "estimand", "smd_unweighted",
                               "smd_weighted")) if p.is_file() else None)
    p = d / "positivity.json"
    out["positivity"] = _json(p) if p.is_file() else None
    if design:
        out["estimates"] = out["curves"] = out["bootstrap"] = None
        out["subgroup_estimates"] = out["decision"] = None
        return out
    p = d / "estimates.csv"
    est = (_csv(p, ("outcome", "estimand", "method", "measure", "horizon_day", "arm",
                    "comparator", "estimate", "ci_low", "ci_high", "n", "events"))
           if p.is_file() else None)
    out["subgroup_estimates"] = None
    if est is not None and "subgroup" in est.columns:  # whole-cohort rows have it empty (§5f)
        sub = est["subgroup"].notna()
        out["subgroup_estimates"] = est[sub].reset_index(drop=True) if sub.any() else None
        est = est[~sub].drop(columns="subgroup").reset_index(drop=True)
    out["estimates"] = est
    p = d / "decision.csv"
    out["decision"] = (_csv(p, ("contrast", "estimand", "method", "measure", "arm", "comparator",
                                "outcome", "estimate", "ci_low", "ci_high"))
                       if p.is_file() else None)
    p = d / "curves.csv"
    out["curves"] = (_csv(p, ("estimand", "method", "arm", "day", "risk", "ci_low", "ci_high",
                              "at_risk")) if p.is_file() else None)
    p = d / "bootstrap.json"
    out["bootstrap"] = _json(p) if p.is_file() else None
    p = d / "adherence.csv"
    out["adherence"] = (_csv(p, ("estimand", "arm", "period", "start_day", "persons",
                                 "on_protocol", "deviating", "weight_mean", "weight_p01",
                                 "weight_p99", "weight_max")) if p.is_file() else None)
    return out
