"""The report's decision summary and subgroup sections (CONTRACTS §5f), read from
``decision.csv``, the subgroup rows of ``estimates.csv`` and ``bootstrap.json``; nothing is
recomputed here. Neither shows a count of persons."""

from __future__ import annotations

import math
from typing import Any

import pandas as pd
from matplotlib.figure import Figure

from emulant.protocol import Protocol
from emulant.report import fmt
from emulant.report.figures import OKABE_ITO, to_svg

METHOD_LABEL = {"unadjusted": "unadjusted", "ipw": "inverse probability weighting",
                "standardization": "standardization", "doubly_robust": "doubly robust",
                "gformula": "parametric g-formula"}


def _combo(r: Any) -> str:
    est = "" if fmt.missing(r.estimand) else f"{r.estimand}, "
    return est + METHOD_LABEL.get(r.method, str(r.method))


def interval_figure(items: list[dict], xlabel: str, prefix: str, null: float | None = None) -> str:
    """Dots with 95% interval bars, one row per item (``label``, ``estimate``, ``lo``, ``hi``,
    ``group`` picks the colour), top to bottom in the given order; a line at ``null``."""
    n = len(items)
    fig = Figure(figsize=(6.4, 0.32 * n + 0.9))
    ax = fig.add_subplot()
    groups = list(dict.fromkeys(it.get("group", "") for it in items))
    for i, it in enumerate(items):
        y = n - 1 - i
        colour = OKABE_ITO[groups.index(it.get("group", "")) % len(OKABE_ITO)]
        if not (fmt.missing(it["lo"]) or fmt.missing(it["hi"])):
            ax.plot([it["lo"], it["hi"]], [y, y], color=colour, linewidth=1.6)
        ax.plot([it["estimate"]], [y], marker="D" if it.get("bold") else "o", color=colour,
                markersize=6 if it.get("bold") else 4.5)
    if null is not None:
        ax.axvline(null, color="#666666", linewidth=0.8, linestyle=(0, (1, 2)))
    ax.set_yticks(range(n), [it["label"] for it in reversed(items)])
    ax.set_ylim(-0.7, n - 0.3)
    ax.set_xlabel(xlabel)
    fig.subplots_adjust(left=0.42, right=0.97, top=0.97, bottom=0.6 / (0.32 * n + 0.9) + 0.05)
    return to_svg(fig, prefix)


def _nnt(est: float, lo: float, hi: float) -> tuple[str, str]:
    """An NNT and its interval in words (Altman 1998), from decision.csv's signed values,
    rounded up to whole persons (common practice)."""
    def one(x: float) -> str:
        if fmt.missing(x) or math.isinf(x):
            return "∞"
        whole = fmt.integer(math.ceil(abs(x) - 1e-9))
        return f"NNTB {whole}" if x > 0 else f"NNTH {whole}"

    if fmt.missing(lo) or fmt.missing(hi):
        return one(est), ""
    if lo > hi:  # the interval runs through infinity
        return one(est), f"{one(lo)} to ∞ to {one(hi)}"
    return one(est), f"{one(lo)} to {one(hi)}"


def decision_context(dec: pd.DataFrame | None, protocol: Protocol) -> dict | None:
    """Expected loss per strategy, the probability each has the lowest, NNTs, and the figure."""
    d = protocol.decision
    if d is None or dec is None or dec.empty:
        return None
    arms = list(protocol.strategies.arm_names)
    rows, nnts, items = [], [], []
    for _, g in dec.groupby(["estimand", "method"], dropna=False, sort=False):
        first = g.iloc[0]
        el = {r.arm: r for r in g[g.measure == "expected_loss"].itertuples()}
        pl = {r.arm: r.estimate for r in g[g.measure == "probability_lowest_loss"].itertuples()}
        diff = g[g.measure == "expected_loss_difference"]
        row = {"combo": _combo(first), "arms": [], "difference": "", "difference_ci": ""}
        for a in arms:
            if a in el:
                r = el[a]
                row["arms"].append({"loss": fmt.sig(r.estimate), "ci": fmt.ci(r.ci_low, r.ci_high),
                                    "p_lowest": fmt.num(100 * pl[a], 0) + "%" if a in pl else ""})
                items.append({"label": f"{a} — {_combo(first)}", "estimate": r.estimate,
                              "lo": r.ci_low, "hi": r.ci_high, "group": a})
        if len(diff):
            r = diff.iloc[0]
            row["difference"] = fmt.sig(r.estimate)
            row["difference_ci"] = fmt.ci(r.ci_low, r.ci_high)
        rows.append(row)
        for r in g[g.measure == "number_needed_to_treat"].itertuples():
            value, interval = _nnt(r.estimate, r.ci_low, r.ci_high)
            nnts.append({"combo": _combo(first), "outcome": r.outcome, "nnt": value,
                         "ci": interval})
    return {
        "horizon": fmt.integer(d.horizon_day),
        "loss": [{"outcome": o, "loss": fmt.sig(v)} for o, v in d.loss],
        "strategy_loss": [{"arm": a, "loss": fmt.sig(v)} for a, v in d.strategy_loss],
        "arms": arms, "treated": protocol.strategies.treated,
        "comparator": protocol.strategies.comparator,
        "rows": rows, "nnts": nnts,
        "svg": interval_figure(items, f"expected loss at day {d.horizon_day}", "fig-decision")
        if items else None,
        "kind": protocol.analysis.bootstrap.kind,
    }


def subgroup_context(sub: pd.DataFrame | None, overall: pd.DataFrame | None,
                     account: list[dict] | None, protocol: Protocol) -> dict | None:
    """The primary outcome's absolute effect by subgroup level, at the last horizon, beside the
    whole cohort's, for each estimand of the first adjusted method; differences between levels;
    the levels that could not be analysed and why."""
    if not protocol.subgroups:
        return None
    o = protocol.outcomes.primary
    name = o if isinstance(o, str) else o.measure
    measure = "risk_difference" if isinstance(o, str) else "mean_difference"
    method = protocol.analysis.methods[0] if protocol.analysis.methods else "unadjusted"
    horizon = max(protocol.analysis.horizons_days) if isinstance(o, str) else None
    def pick(df: pd.DataFrame | None, estimand: str | None) -> pd.DataFrame:
        if df is None:
            return pd.DataFrame()
        m = (df.outcome == name) & (df.measure == measure) & (df.method == method)
        m &= df.estimand == estimand if estimand else df.estimand.isna()
        if horizon is not None:
            m &= df.horizon_day == horizon
        return df[m]

    panels = []
    for estimand in (protocol.estimands if method != "unadjusted" else (None,)):
        items, rows = [], []
        for r in pick(overall, estimand).itertuples():
            items.append({"label": "whole cohort", "estimate": r.estimate, "lo": r.ci_low,
                          "hi": r.ci_high, "group": "whole", "bold": True})
        for r in pick(sub, estimand).itertuples():
            between = " minus " in str(r.subgroup)
            rows.append({"subgroup": r.subgroup, "estimate": fmt.sig(r.estimate),
                         "ci": fmt.ci(r.ci_low, r.ci_high), "between": between})
            if not between:
                items.append({"label": str(r.subgroup), "estimate": r.estimate, "lo": r.ci_low,
                              "hi": r.ci_high, "group": "level"})
        if rows:
            panels.append({"estimand": estimand or "", "rows": rows,
                           "svg": interval_figure(items, measure.replace("_", " "),
                                                  f"fig-subgroups-{estimand or 'crude'}", null=0.0)})
    not_estimable = [{"subgroup": a["subgroup"], "reason": a.get("reason") or ""}
                     for a in account or [] if not a.get("estimable", True)]
    return {"outcome": name, "measure": measure.replace("_", " "),
            "method": METHOD_LABEL.get(method, method),
            "horizon": fmt.integer(horizon) if horizon else "", "panels": panels,
            "not_estimable": not_estimable}
