"""Design-stage sections: provenance, attrition, baseline characteristics, positivity.

Each function takes what was read from a results file and returns plain dicts of strings for the
template; every count passes through :mod:`emulant.report.disclosure`.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from emulant import columns as col
from emulant.cohort.covariates import covariate_kinds
from emulant.protocol import Protocol
from emulant.report import disclosure as dc
from emulant.report import fmt

WEIGHT_QUANTILES = ("1%", "50%", "99%")  # shown of positivity.json's quantiles (no single weight)


def provenance(check: dict, min_cell: int) -> dict:
    """Input tables with hash, rows and date range; implausible rows excluded; warnings."""
    tables = []
    for name, t in (check.get("tables") or {}).items():
        cols = t.get("columns")
        tables.append({
            "name": name, "file": dc.shown_path(t.get("file"), extract=check.get("extract")), "sha256": fmt.text(t.get("sha256")),
            "rows": dc.show_count(t.get("rows"), min_cell),
            "columns": ", ".join(map(str, cols)) if isinstance(cols, list) else fmt.text(cols),
            "dates": dc.month_range(t.get("date_min"), t.get("date_max")),
        })
    implausible = []
    for name, v in (check.get("implausible") or {}).items():
        implausible.append({"table": name,
                            "before_birth": dc.show_count(v.get("before_birth", 0), min_cell),
                            "after_death": dc.show_count(v.get("after_death", 0), min_cell)})
    return {"extract": dc.shown_path(check.get("extract")), "tables": tables,
            "implausible": implausible, "warnings": [str(w) for w in check.get("warnings") or []]}


def attrition(df: pd.DataFrame, min_cell: int) -> list[dict]:
    """Attrition rows with the chain-aware suppression of :func:`disclosure.suppress_attrition`."""
    rem = [float(x) for x in df["remaining"]]
    exc = [0.0 if fmt.missing(x) else float(x) for x in df["excluded"]]
    hr, hx = dc.suppress_attrition(rem, exc, min_cell)
    per = [float(x) for x in df["persons"]] if "persons" in df.columns else None
    if per is not None:  # design sequential: the distinct persons, suppressed as a chain too
        hp, _ = dc.suppress_attrition(per, [0.0] + [a - b for a, b in zip(per[:-1], per[1:],
                                                                           strict=True)], min_cell)
    out = []
    for i, row in enumerate(df.itertuples(index=False)):
        out.append({"step": str(row.step), "description": fmt.text(row.description),
                    "remaining": dc.show_count(rem[i], min_cell, hr[i]),
                    "excluded": "" if i == 0 else dc.show_count(exc[i], min_cell, hx[i]),
                    # person-trials (design sequential): the distinct persons beside the count
                    "persons": dc.show_count(per[i], min_cell, hp[i])
                    if per is not None else None})
    return out


def _kinds(protocol: Protocol, cohort: pd.DataFrame) -> dict[str, str]:
    """Covariate kinds, as :func:`emulant.cohort.covariates.covariate_kinds` decides them."""
    return dict(covariate_kinds(protocol, cohort))


def _smd_lookup(balance: pd.DataFrame | None) -> dict[tuple[str, str], dict]:
    if balance is None:
        return {}
    out: dict[tuple[str, str], dict] = {}
    for r in balance.itertuples(index=False):
        key = (str(r.covariate), "" if fmt.missing(r.level) else str(r.level))
        d = out.setdefault(key, {"before": None, "after": {}})
        if d["before"] is None and not fmt.missing(r.smd_unweighted):
            d["before"] = float(r.smd_unweighted)
        if not fmt.missing(r.smd_weighted):
            d["after"][str(r.estimand)] = float(r.smd_weighted)
    return out


def _row(label, cells, smd, hidden_any, estimands, level=False):
    before = None if (smd is None or hidden_any) else smd["before"]
    after = {e: (smd["after"].get(e) if smd else None) for e in estimands}
    return {"label": label, "level": level, "cells": cells, "head": False,
            "smd_before": "hidden" if (hidden_any and smd) else fmt.num(before, 3),
            "smd_after": [fmt.num(after[e], 3) for e in estimands],
            "dot": {"before": before, "after": after} if smd else None}


def baseline(cohort: pd.DataFrame, protocol: Protocol, balance: pd.DataFrame | None) -> dict:
    """Baseline characteristics by arm: n (%) or mean (SD), SMD before and after weighting."""
    m = protocol.report.min_cell
    arms = [a for a in protocol.strategies.arm_names]
    groups = {a: cohort[cohort["arm"].astype(str) == a] for a in arms}
    ns = {a: len(g) for a, g in groups.items()}
    n_shown = {a: not dc.is_small(ns[a], m) for a in arms}
    estimands = sorted({str(e) for e in balance["estimand"].dropna()}) if balance is not None \
        else list(protocol.estimands)
    smd = _smd_lookup(balance)
    kinds = _kinds(protocol, cohort)
    rows: list[dict] = []
    for cov in protocol.covariates:
        name, kind = cov.name, kinds.get(cov.name, "continuous")
        if name not in cohort:
            continue
        flag = col.missing_flag(name)
        has_flag = flag in cohort
        if kind == "categorical":
            levels = sorted({str(v) for v in cohort[name].dropna()})
            counts = {a: [int((groups[a][name].astype(str) == lv).sum()) for lv in levels]
                      for a in arms}
            hidden = {a: dc.suppress_cells(counts[a], m, n_shown[a]) for a in arms}
            rows.append({"label": name, "level": False, "cells": ["" for _ in arms],
                         "smd_before": "", "smd_after": ["" for _ in estimands], "dot": None,
                         "head": True})
            for j, lv in enumerate(levels):
                cells = [_count_cell(counts[a][j], ns[a], m, hidden[a][j]) for a in arms]
                hid = any(hidden[a][j] for a in arms)
                rows.append(_row(lv, cells, smd.get((name, lv)), hid, estimands, level=True))
            continue
        if has_flag:
            obs = {a: groups[a][groups[a][flag] == 0][name] for a in arms}
        else:
            obs = {a: groups[a][name] for a in arms}
        if kind == "binary":
            cnt = {a: int((obs[a] == 1).sum()) for a in arms}
            tot = {a: int(obs[a].notna().sum()) for a in arms}
            hid = {a: dc.suppress_binary(cnt[a], tot[a], m) for a in arms}
            cells = [_count_cell(cnt[a], tot[a], m, hid[a] and not dc.is_small(cnt[a], m))
                     for a in arms]
            rows.append(_row(f"{name}, n (%)", cells, smd.get((name, "")),
                             any(hid.values()), estimands))
        else:
            cells = [_mean_cell(obs[a], m) for a in arms]
            rows.append(_row(f"{name}, mean (SD)", cells, smd.get((name, "")), False, estimands))
        if has_flag:
            cnt = {a: int((groups[a][flag] == 1).sum()) for a in arms}
            hid = {a: dc.suppress_binary(cnt[a], ns[a], m) for a in arms}
            cells = [_count_cell(cnt[a], ns[a], m, hid[a] and not dc.is_small(cnt[a], m))
                     for a in arms]
            s = smd.get((flag, "")) or smd.get((name, "missing"))
            rows.append(_row("missing, n (%)", cells, s, any(hid.values()), estimands,
                             level=True))
    dots = [{"label": r["label"] if not r["level"] else f"{_parent(rows, r)}: {r['label']}",
             **r["dot"]} for r in rows if r.get("dot")]
    return {"arms": [{"name": a, "n": dc.show_count(ns[a], m),
                      "treated": a == protocol.strategies.treated} for a in arms],
            "estimands": estimands, "rows": rows, "dots": dots,
            "any_hidden": any(r["smd_before"] == "hidden" for r in rows)}


def _parent(rows: list[dict], r: dict) -> str:
    i = rows.index(r)
    for p in reversed(rows[:i]):
        if not p["level"]:
            return p["label"].split(",")[0]
    return ""


def _count_cell(n: int, total: int, m: int, secondary: bool) -> str:
    c = dc.show_count(n, m, secondary)
    p = dc.show_percent(n, total, m, secondary)
    return f"{c} ({p})" if p else c


def _mean_cell(s: pd.Series, m: int) -> str:
    s = pd.to_numeric(s, errors="coerce").dropna()
    if len(s) < m:  # a mean of fewer than min_cell values is not shown
        return "" if len(s) == 0 else f"n <{m}"
    return f"{fmt.num(s.mean(), 1)} ({fmt.num(s.std(ddof=1), 1)})"


def positivity(pos: dict, protocol: Protocol, weights: pd.DataFrame | None) -> dict[str, Any]:
    """Overlap histogram data, c-statistic, extreme scores, weight summaries, ESS by arm."""
    m = protocol.report.min_cell
    arms = list(protocol.strategies.arm_names)
    n = pos.get("n") or {}
    bins = pos.get("propensity_bins") or {}
    hist = []
    for a in arms:
        counts = [float(x) for x in (bins.get("counts") or {}).get(a, [])]
        hidden = dc.suppress_cells(counts, m, True)
        heights = [dc.masked_height(c, m) if h else c for c, h in zip(counts, hidden, strict=True)]
        hist.append({"name": a, "heights": heights, "hidden": hidden})
    prim_est = protocol.analysis.primary.estimand
    weighted = _weighted_bins(weights, bins.get("edges") or [], arms, prim_est, hist, m)
    ext = pos.get("extreme") or {}
    wrows = []
    for est, w in (pos.get("weights") or {}).items():
        ess = w.get("ess") or {}
        mean = w.get("mean") or {}
        wrows.append({
            "estimand": est,
            "mean": [fmt.num(mean.get(a), 3) for a in arms],
            "ess": [fmt.num(ess.get(a), 0) for a in arms],
            "ess_share": [dc.show_percent(ess.get(a), n.get(a), m) for a in arms],
            "quantiles": [fmt.sig((w.get("quantiles") or {}).get(q)) for q in WEIGHT_QUANTILES],
            "top1pct_share": fmt.num(100 * w["top1pct_share"], 1) + "%"
            if not fmt.missing(w.get("top1pct_share")) else "",
            "truncated": fmt.yesno(w.get("truncated")),
        })
    model = pos.get("model") or {}
    return {
        "arms": arms,
        "n": [dc.show_count(n.get(a), m) for a in arms],
        "c_statistic": fmt.num(pos.get("c_statistic"), 3),
        "extreme": {"low": fmt.sig(ext.get("low")), "high": fmt.sig(ext.get("high")),
                    "n": dc.show_count(ext.get("n"), m),
                    "share": dc.show_percent(ext.get("n"), sum(float(v) for v in n.values())
                                             if n else None, m, digits=2)},
        "weights": wrows,
        "model": {"converged": fmt.yesno(model.get("converged")),
                  "penalized": fmt.yesno(model.get("penalized")),
                  "warnings": [str(x) for x in model.get("warnings") or []],
                  "columns": ", ".join(map(str, model.get("columns") or [])),
                  "dropped": [f"{d.get('column')}: {d.get('reason')}" if isinstance(d, dict)
                              else str(d) for d in model.get("dropped") or []]},
        "edges": [float(x) for x in bins.get("edges") or []],
        "hist": hist,
        "weighted": weighted,
        "weighted_title": f"after {prim_est} weighting",
        "weights_file": weights is not None,
    }



def _weighted_bins(weights: pd.DataFrame | None, edges: list, arms: list[str], estimand: str,
                   hist: list[dict], m: int) -> list[dict]:
    """Each arm's sum of ``estimand`` weights per propensity bin (from ``weights.parquet``);
    a bin hidden in the unweighted counts is drawn hatched, rounded up to a multiple of ``m``."""
    wcol = col.weight(estimand)
    if weights is None or len(edges) < 2 or wcol not in weights or "propensity" not in weights:
        return []
    out = []
    for a, h in zip(arms, hist, strict=True):
        g = weights[weights["arm"].astype(str) == a]
        mass, _ = np.histogram(g["propensity"].to_numpy(float), bins=np.asarray(edges, float),
                               weights=g[wcol].to_numpy(float))
        out.append({"name": a, "hidden": h["hidden"],
                    "heights": [dc.masked_height(v, m) if hid else float(v)
                                for v, hid in zip(mass, h["hidden"], strict=True)]})
    return out
