"""The forest plot of the effect estimates: absolute and relative effects side by side.

Rows come straight from ``estimates.csv`` (point estimate and interval as written there); the
figure only places them. One row per contrast, estimand, method and horizon, grouped by
horizon; the unadjusted comparison is drawn apart at the bottom, in grey; the pre-specified
primary estimate (``analysis.primary``) is marked; null lines at 0 and 1.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import matplotlib
import pandas as pd

from emulant.protocol import MeasuredOutcome, Protocol, outcome_name
from emulant.report import fmt
from emulant.report.figures import OKABE_ITO, RC, _figure, _t, to_svg
from emulant.report.results import METHOD_ORDER, _order, small_event_arms

SHORT_METHOD = {"unadjusted": "unadjusted", "ipw": "IPW", "standardization": "standardization",
                "doubly_robust": "doubly robust",
                "gformula": "parametric g-formula"}
ABSOLUTE = ("risk_difference", "mean_difference")
RELATIVE = ("risk_ratio", "hazard_ratio")
GREY = "#8A8A8A"
PRIMARY = "#D55E00"


def _f(x: Any) -> float:
    return float("nan") if fmt.missing(x) else float(x)


def forest_rows(est: pd.DataFrame, protocol: Protocol, outcomes: Sequence[str]) -> list[dict]:
    """One row per (outcome, contrast, horizon, estimand, method) with its absolute and relative
    estimate and interval, in drawing order; the unadjusted rows last."""
    m = protocol.report.min_cell
    small = {o for o, _ in small_event_arms(est, m)}
    g = est[est["outcome"].astype(str).isin(list(outcomes))
            & est["measure"].isin(ABSOLUTE + RELATIVE)
            & (est["comparator"].fillna("").astype(str) != "")
            & pd.to_numeric(est["estimate"], errors="coerce").notna()].copy()  # not estimable: left out
    if g.empty:
        return []
    g["hday"] = pd.to_numeric(g["horizon_day"], errors="coerce")
    g["estx"] = g["estimand"].fillna("").astype(str)
    g["ctr"] = g["contrast"].fillna("").astype(str) if "contrast" in g else ""
    several = g["ctr"].nunique() > 1
    many = len(outcomes) > 1
    pr = protocol.analysis.primary
    measured = isinstance(protocol.outcomes.primary, MeasuredOutcome)
    est_order = list(protocol.estimands)
    rows: dict[tuple, dict] = {}
    for r in g.itertuples(index=False):
        if r.method == "unadjusted" and str(r.outcome) in small:
            continue  # a crude estimate would give a suppressed count back
        h = r.hday if not math.isnan(r.hday) else None
        key = (str(r.outcome), r.ctr, h, r.estx, str(r.method))
        row = rows.setdefault(key, {
            "outcome": str(r.outcome), "contrast": r.ctr, "horizon": h, "estimand": r.estx,
            "method": str(r.method), "abs": None, "rel": None, "abs_measure": "",
            "rel_measure": ""})
        val = (_f(r.estimate), _f(r.ci_low), _f(r.ci_high))
        if r.measure in ABSOLUTE:
            row["abs"], row["abs_measure"] = val, r.measure
        else:
            row["rel"], row["rel_measure"] = val, r.measure
    out = []
    for row in rows.values():
        crude = row["method"] == "unadjusted"
        when = ("whole follow-up" if row["horizon"] is None and row["rel_measure"] == "hazard_ratio"
                else "" if row["horizon"] is None else f"day {row['horizon']:g}")
        parts = ([row["outcome"]] if many else []) + ([fmt.label(row["contrast"])] if several
                                                      else [])
        parts += [when] if when else []
        parts += [SHORT_METHOD.get(row["method"], row["method"])] if crude else \
            [row["estimand"], SHORT_METHOD.get(row["method"], row["method"])]
        row["label"] = " · ".join(parts)
        row["crude"] = crude
        row["primary"] = (row["outcome"] == outcome_name(protocol.outcomes.primary)
                          and not crude and row["method"] == pr.method
                          and row["estimand"] == pr.estimand
                          and (measured or row["horizon"] == pr.horizon_day)
                          and row["rel_measure"] != "hazard_ratio")
        row["_sort"] = (crude, row["outcome"] if many else "", row["contrast"],
                        row["horizon"] is None, row["horizon"] or 0,
                        est_order.index(row["estimand"]) if row["estimand"] in est_order else 99,
                        _order(METHOD_ORDER, row["method"]))
        out.append(row)
    out.sort(key=lambda r: r["_sort"])
    for r in out:
        del r["_sort"]
    return out


def _scale(measure: str) -> float:
    return 100.0 if measure == "risk_difference" else 1.0


def forest_figure(rows: Sequence[dict], estimands: Sequence[str], prefix: str = "fig-forest") -> str:
    """Absolute effects (risk differences in percentage points, or mean differences) on the left,
    ratios on a log axis on the right; one line per row, grouped, primary marked."""
    n = max(len(rows), 1)
    has_rel = any(r["rel"] for r in rows)
    abs_measure = next((r["abs_measure"] for r in rows if r["abs"]), "risk_difference")
    colour = {e: OKABE_ITO[(i + 2) % 4] if i else OKABE_ITO[0] for i, e in enumerate(estimands)}
    with matplotlib.rc_context(RC):
        fig = _figure(7.2, 0.19 * n + 0.95)
        axes = fig.subplots(1, 2 if has_rel else 1, sharey=True, squeeze=False,
                            gridspec_kw={"width_ratios": [1, 1] if has_rel else [1]})[0]
        ys = list(range(n))[::-1]
        for ax, which in zip(axes, ("abs", "rel"), strict=False):
            # shade alternate horizon groups; a rule above the unadjusted block
            group, shade = None, False
            for y, r in zip(ys, rows, strict=False):
                key = (r["crude"], r["horizon"], r["rel_measure"] == "hazard_ratio")
                if key != group:
                    group, shade = key, not shade
                if shade:
                    ax.axhspan(y - 0.5, y + 0.5, color="#F1F3F6", lw=0, zorder=0)
            crude_ys = [y for y, r in zip(ys, rows, strict=False) if r["crude"]]
            if crude_ys and len(crude_ys) < n:
                ax.axhline(max(crude_ys) + 0.5, color="#444444", lw=0.8, zorder=1)
            for y, r in zip(ys, rows, strict=False):
                v = r[which]
                if not v or math.isnan(v[0]):
                    continue
                k = _scale(r["abs_measure"]) if which == "abs" else 1.0
                c = GREY if r["crude"] else PRIMARY if r["primary"] else colour.get(r["estimand"],
                                                                                   OKABE_ITO[0])
                if not (math.isnan(v[1]) or math.isnan(v[2])):
                    ax.plot([k * v[1], k * v[2]], [y, y], color=c, lw=3.2, alpha=0.35,
                            solid_capstyle="round", zorder=2)
                ax.plot([k * v[0]], [y], marker="D" if r["primary"] else "o", ms=6 if r["primary"]
                        else 4, color=c, mec="white", mew=0.6, zorder=3, ls="none")
            ax.axvline(0.0 if which == "abs" else 1.0, color="#222222", lw=0.8, zorder=1)
            ax.grid(axis="x", color="#E2E2E2", lw=0.5)
            ax.tick_params(axis="y", length=0)
            ax.spines["left"].set_visible(False)
            if which == "abs":
                ax.set_xlabel("risk difference (percentage points)" if abs_measure ==
                              "risk_difference" else "mean difference")
                ax.set_title("difference, " + ("percentage points" if abs_measure ==
                                               "risk_difference" else "mean") + " (null 0)",
                             fontsize=8.5, loc="left")
            else:
                ax.set_xscale("log")
                ax.set_xlabel("risk ratio or hazard ratio (log scale)")
                ax.set_title("ratio, log scale (null 1)", fontsize=8.5, loc="left")
                lo = min((r["rel"][1] for r in rows if r["rel"] and not math.isnan(r["rel"][1])),
                         default=0.5)
                hi = max((r["rel"][2] for r in rows if r["rel"] and not math.isnan(r["rel"][2])),
                         default=2.0)
                ax.set_xlim(min(lo, 0.95) * 0.95, max(hi, 1.05) * 1.05)
                ticks = [t for t in (0.25, 0.5, 0.67, 0.8, 1.0, 1.25, 1.5, 2.0, 4.0)
                         if ax.get_xlim()[0] <= t <= ax.get_xlim()[1]]
                ax.set_xticks(ticks, [f"{t:g}" for t in ticks])
                ax.minorticks_off()
        labels = [_t(r["label"] + ("  (primary)" if r["primary"] else "")) for r in rows]
        axes[0].set_yticks(ys[: len(rows)], labels, fontsize=7.5)
        for lab, r in zip(axes[0].get_yticklabels(), rows, strict=False):
            if r["primary"]:
                lab.set_fontweight("bold")
            if r["crude"]:
                lab.set_color("#666666")
        axes[0].set_ylim(-0.6, n - 0.4)
        return to_svg(fig, prefix)
