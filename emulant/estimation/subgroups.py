"""Subgroup analyses (CONTRACTS §5f): the whole analysis rerun within each level of a covariate.

Levels: each value of a categorical or binary covariate (``sex=F``), or the intervals that the
``cut`` points make of a continuous one (``age<75``, ``75<=age<85``, ``age>=85``). Within a level
the propensity design (spline knots, reference levels) is learned again on the level's persons and
every model is refitted there, so a subgroup's estimates are those of a study restricted to it
(the covariate that defines a level without cut points drops out of it). The bootstrap resamples the whole
cohort once per replicate and each level is analysed with its persons' weights, so differences
between levels have replicates of their own.

A level is not estimable when an arm has fewer than ``report.min_cell`` persons in it, or its
design or point estimate cannot be computed; it is listed with the reason, never a crash. A
replicate in which a level cannot be analysed leaves that level's values missing in that
replicate only (the level's intervals use the replicates that completed it).

Difference between levels: for each absolute effect (``risk_difference``, ``mean_difference``)
of every level after the first, the level's effect minus the first level's, with the
replicates' differences as its bootstrap distribution; the ``subgroup`` column reads
``sex=M minus sex=F``. Effect modification on the additive scale is the scale that matters for
decisions (Rothman, Greenland & Lash, *Modern Epidemiology*, 3rd ed., 2008, ch. 15).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from emulant.cohort.covariates import adjustment_set
from emulant.models.design import DesignError, build_design
from emulant.protocol import Protocol

ABSOLUTE_EFFECTS = ("risk_difference", "mean_difference")


@dataclass(frozen=True)
class Level:
    label: str  # sex=F, age<75, 75<=age<85, age>=85
    subgroup: int  # position in protocol.subgroups
    rows: np.ndarray  # positions of the level's persons in the cohort


@dataclass(frozen=True)
class LevelAnalysis:
    level: Level
    cohort: pd.DataFrame  # the level's persons
    design: Any  # learned on them
    X: np.ndarray


def _text(v: Any) -> str:
    if isinstance(v, float | np.floating) and float(v).is_integer():
        return str(int(v))
    return str(v)


def levels_of(cohort: pd.DataFrame, protocol: Protocol) -> list[Level]:
    """Every level of every subgroup of the protocol, in order (values sorted)."""
    out: list[Level] = []
    for k, s in enumerate(protocol.subgroups):
        if s.covariate not in cohort.columns:
            continue  # a covariate the cohort lacks is reported by the caller
        x = cohort[s.covariate]
        if s.cut:
            v = pd.to_numeric(x, errors="coerce").to_numpy(dtype=float)
            edges = [-np.inf, *s.cut, np.inf]
            for lo, hi in zip(edges[:-1], edges[1:], strict=True):
                if lo == -np.inf:
                    label = f"{s.covariate}<{_text(hi)}"
                elif hi == np.inf:
                    label = f"{s.covariate}>={_text(lo)}"
                else:
                    label = f"{_text(lo)}<={s.covariate}<{_text(hi)}"
                out.append(Level(label, k, np.flatnonzero((v >= lo) & (v < hi))))
        else:
            for value in sorted(x.dropna().unique(), key=_text):
                out.append(Level(f"{s.covariate}={_text(value)}", k,
                                 np.flatnonzero((x == value).to_numpy())))
    return out


def prepare_levels(cohort: pd.DataFrame, protocol: Protocol, kinds: dict[str, str],
                   treated: np.ndarray) -> tuple[list[LevelAnalysis], list[dict]]:
    """The analysable levels and, for every level, ``{subgroup, covariate, estimable, reason}``."""
    min_cell = protocol.report.min_cell
    ready: list[LevelAnalysis] = []
    account: list[dict] = []
    for lv in levels_of(cohort, protocol):
        cov = protocol.subgroups[lv.subgroup].covariate
        a = treated[lv.rows]
        small = [arm for arm, k in ((protocol.strategies.treated, 1), (protocol.strategies.comparator, 0))
                 if int(np.sum(a == k)) < min_cell]
        if small:
            account.append({"subgroup": lv.label, "covariate": cov, "estimable": False,
                            "reason": f"fewer than {min_cell} persons in arm(s) {', '.join(small)}"})
            continue
        sub = cohort.iloc[lv.rows].reset_index(drop=True)
        spec = protocol.subgroups[lv.subgroup]
        # the covariate that defines a level is constant in it, unless it was cut
        covs = [c for c in adjustment_set(protocol, sub)
                if spec.cut or getattr(c, "name", c) != spec.covariate]
        try:
            design = build_design(sub, covs, kinds, protocol.analysis.propensity.continuous)
        except DesignError as exc:
            account.append({"subgroup": lv.label, "covariate": cov, "estimable": False,
                            "reason": str(exc)})
            continue
        ready.append(LevelAnalysis(lv, sub, design, np.asarray(design.transform(sub), dtype=float)))
        account.append({"subgroup": lv.label, "covariate": cov, "estimable": True, "reason": None})
    return ready, account


def level_differences(rows: list[dict], reps: np.ndarray,
                      account: list[dict]) -> tuple[list[dict], np.ndarray]:
    """Rows (and replicate columns) of each absolute effect's difference between levels.

    ``rows``/``reps`` are the estimate rows and their replicates (replicates x rows); the first
    estimable level of each subgroup is the reference.
    """
    by_key: dict[tuple, int] = {}
    for i, r in enumerate(rows):
        if r.get("subgroup") and r.get("measure") in ABSOLUTE_EFFECTS:
            by_key[(r["subgroup"], r.get("outcome"), r.get("contrast"), r.get("estimand"),
                    r.get("method"), r["measure"], r.get("horizon_day"), r.get("arm"),
                    r.get("comparator"))] = i
    groups: dict[str, list[str]] = {}
    for a in account:
        if a["estimable"]:
            groups.setdefault(a["covariate"], []).append(a["subgroup"])
    new_rows: list[dict] = []
    cols: list[np.ndarray] = []
    for labels in groups.values():
        ref = labels[0]
        for other in labels[1:]:
            for key, i in by_key.items():
                if key[0] != other:
                    continue
                j = by_key.get((ref, *key[1:]))
                if j is None:
                    continue
                r = rows[i]
                est = (r["estimate"] - rows[j]["estimate"]
                       if r.get("estimate") is not None and rows[j].get("estimate") is not None
                       else None)
                new_rows.append({**{k: v for k, v in r.items() if k not in ("n", "events")},
                                 "subgroup": f"{other} minus {ref}", "estimate": est,
                                 "n": None, "events": None})
                cols.append(reps[:, i] - reps[:, j])
    extra = np.column_stack(cols) if cols else np.empty((reps.shape[0], 0))
    return new_rows, extra
