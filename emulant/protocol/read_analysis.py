"""Reading ``estimands``, ``contrasts``, ``analysis`` and ``report`` (CONTRACTS §3)."""

from __future__ import annotations

from typing import Any

from emulant.protocol.collector import Collector
from emulant.protocol.keys import known
from emulant.protocol.model import (
    BOOTSTRAP_KINDS,
    CONTRASTS,
    ESTIMANDS,
    METHODS,
    PER_PROTOCOL_ONLY,
    VARIANCES,
    Analysis,
    Bootstrap,
    FollowUp,
    GFormula,
    Primary,
    Propensity,
    ReportSettings,
    Strategies,
    WeightSettings,
)

ADJUSTED = tuple(m for m in METHODS if m != "unadjusted")  # what analysis.primary.method may be


def read_estimands(c: Collector, top: dict, strategies: Strategies | None = None) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """``estimands`` and ``contrasts``, with their defaults; ``per_protocol`` needs ``sustain``
    on every starting arm of designs initiators and sequential (CONTRACTS §5b, §5c); design clone
    allows ``[per_protocol]`` and ``[ATE]`` only (and takes them as its defaults, §5d)."""
    clone = strategies is not None and strategies.design == "clone"
    estimands = tuple(c.choice(x, f"estimands[{i}]", ESTIMANDS, "ATE") for i, x in enumerate(c.listing(top.get("estimands"), "estimands"))) \
        or (("ATE",) if clone else ("ATE", "ATT"))
    contrasts = tuple(c.choice(x, f"contrasts[{i}]", CONTRASTS, "intention_to_treat") for i, x in enumerate(c.listing(top.get("contrasts"), "contrasts"))) \
        or (("per_protocol",) if clone else ("intention_to_treat",))
    if len(set(contrasts)) < len(contrasts):
        c.add("contrasts", f"a contrast is listed twice: {', '.join(contrasts)}")
        contrasts = tuple(dict.fromkeys(contrasts))
    if clone:
        why = "clones have no assignment at time zero (every person follows every arm until deviating)"
        if contrasts != ("per_protocol",):
            c.add("contrasts", f"design clone allows [per_protocol] only, got [{', '.join(contrasts)}]: {why}, "
                               "so there is no intention-to-treat contrast")
        if set(estimands) != {"ATE"}:
            c.add("estimands", f"design clone allows [ATE] only, got [{', '.join(estimands)}]: {why}, "
                               "so there is no treated or overlap population to weight to")
    elif "per_protocol" in contrasts and strategies is not None:
        for a in strategies.arms:
            if a.sustain is None and a.starts:
                c.add(f"strategies.arms.{a.name}", "contrast per_protocol needs sustain: {gap_days: N} "
                      f"on every starting arm; arm '{a.name}' has none (what staying on it means)")
    return estimands, contrasts


def read_analysis(c: Collector, node: Any, follow: FollowUp, estimands: tuple[str, ...] = ("ATE", "ATT"),
                  contrasts: tuple[str, ...] = ("intention_to_treat",)) -> Analysis:
    """``analysis``: propensity, weights, horizons, methods, periods, censoring weights, bootstrap, balance, primary, g-formula, variance."""
    a = c.mapping(node, "analysis", known("analysis"))
    p = c.mapping(a.get("propensity"), "analysis.propensity", known("analysis.propensity"))
    w = c.mapping(a.get("weights"), "analysis.weights", known("analysis.weights"))
    trunc = w.get("truncate")
    if trunc is not None:
        if not (isinstance(trunc, list) and len(trunc) == 2 and all(isinstance(x, int | float) and not isinstance(x, bool) for x in trunc)
                and 0 <= trunc[0] < trunc[1] <= 1):
            c.add("analysis.weights.truncate", f"expected two quantiles [low, high] with 0 <= low < high <= 1, got {trunc!r}")
            trunc = None
        else:
            trunc = (float(trunc[0]), float(trunc[1]))
    horizons = tuple(c.integer(x, f"analysis.horizons_days[{i}]", 1, 1) for i, x in enumerate(c.listing(a.get("horizons_days"), "analysis.horizons_days"))) or (365, 730, 1095)
    for h in horizons:
        if h > follow.max_days:
            c.add("analysis.horizons_days", f"horizon {h} is beyond follow_up.max_days ({follow.max_days})")
    methods = tuple(m for m in (c.choice(x, f"analysis.methods[{i}]", METHODS, None) for i, x in enumerate(c.listing(a.get("methods"), "analysis.methods"))) if m and m != "unadjusted") if a.get("methods") is not None else ("ipw", "standardization", "doubly_robust")
    for m in PER_PROTOCOL_ONLY:
        if m in methods and "per_protocol" not in contrasts:
            c.add("analysis.methods", f"method {m} estimates the per_protocol contrast only: add "
                  "per_protocol to contrasts, or leave the method out")
    b = c.mapping(a.get("bootstrap"), "analysis.bootstrap", known("analysis.bootstrap"))
    gf = c.mapping(a.get("gformula"), "analysis.gformula", known("analysis.gformula"))
    bal = c.mapping(a.get("balance"), "analysis.balance", known("analysis.balance"))
    analysis = Analysis(
        Propensity(c.choice(p.get("model"), "analysis.propensity.model", ("logistic",), "logistic") or "logistic",
                   c.choice(p.get("continuous"), "analysis.propensity.continuous", ("spline", "quadratic", "linear"), "spline") or "spline"),
        WeightSettings(c.boolean(w.get("stabilize"), "analysis.weights.stabilize", True), trunc),
        tuple(sorted(set(horizons))), methods,
        c.boolean(a.get("hazard_ratio"), "analysis.hazard_ratio", True),
        c.integer(a.get("period_days"), "analysis.period_days", 30, 1) or 30,
        c.boolean(a.get("censoring_weights"), "analysis.censoring_weights", False),
        Bootstrap(c.integer(b.get("replicates"), "analysis.bootstrap.replicates", 200, 0) or 0,
                  c.integer(b.get("seed"), "analysis.bootstrap.seed", 20261201, 0) or 0,
                  c.choice(b.get("interval"), "analysis.bootstrap.interval", ("wald", "percentile"), "wald") or "wald",
                  c.choice(b.get("kind"), "analysis.bootstrap.kind", BOOTSTRAP_KINDS, "multinomial") or "multinomial"),
        c.number(bal.get("smd_threshold"), "analysis.balance.smd_threshold", 0.1),
        read_primary(c, a.get("primary"), methods, estimands, tuple(sorted(set(horizons)))),
        GFormula(c.integer(gf.get("simulated_persons"), "analysis.gformula.simulated_persons", 10000, 100) or 10000,
                 c.integer(gf.get("seed"), "analysis.gformula.seed", 20261202, 0) or 0),
        variance=c.choice(a.get("variance"), "analysis.variance", VARIANCES, "bootstrap") or "bootstrap",
    )
    return analysis


def read_primary(c: Collector, node: Any, methods: tuple[str, ...], estimands: tuple[str, ...],
                 horizons: tuple[int, ...]) -> Primary:
    """``analysis.primary``: the pre-specified primary estimate; by default the first method and
    the first estimand at the last horizon. Each must be one the analysis produces."""
    p = c.mapping(node, "analysis.primary", known("analysis.primary"))
    method = c.choice(p.get("method"), "analysis.primary.method", ADJUSTED, None)
    estimand = c.choice(p.get("estimand"), "analysis.primary.estimand", ESTIMANDS, None)
    day = c.integer(p.get("horizon_day"), "analysis.primary.horizon_day", None, 1)
    for key, v, among, what in (("method", method, methods, "analysis.methods"),
                                ("estimand", estimand, estimands, "estimands"),
                                ("horizon_day", day, horizons, "analysis.horizons_days")):
        if v is not None and among and v not in among:
            c.add(f"analysis.primary.{key}", f"expected one of {what} ({', '.join(map(str, among))}), got {v!r}")
    return Primary(method if method in methods else (methods[0] if methods else "ipw"),
                   estimand if estimand in estimands else (estimands[0] if estimands else "ATE"),
                   day if day in horizons else (horizons[-1] if horizons else 1095))


def read_report(c: Collector, node: Any) -> ReportSettings:
    """``report``: the smallest count shown."""
    r = c.mapping(node, "report", known("report"))
    report = ReportSettings(c.integer(r.get("min_cell"), "report.min_cell", 5, 1) or 5)
    return report
