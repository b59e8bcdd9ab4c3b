"""Reading ``decision`` and ``subgroups`` (CONTRACTS §5f)."""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Any

from emulant.protocol.collector import Collector
from emulant.protocol.keys import known, required
from emulant.protocol.model import (
    DEATH,
    Analysis,
    Covariate,
    Decision,
    Outcomes,
    Strategies,
    Subgroup,
)


def _finite(c: Collector, v: Any, key: str) -> float:
    if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
        c.add(key, f"expected a finite number, got {v!r}")
        return 0.0
    return float(v)


def read_decision(c: Collector, node: Any, outcomes: Outcomes, strategies: Strategies,
                  analysis: Analysis) -> Decision | None:
    """``decision``: the horizon (one of the analysis horizons), the loss per event of each
    time-to-event outcome or ``death``, and the optional loss of following each strategy."""
    if node is None:
        return None
    d = c.mapping(node, "decision", known("decision"), required("decision"))
    horizon = c.integer(d.get("horizon_day"), "decision.horizon_day", None, 1)
    if horizon is not None and horizon not in analysis.horizons_days:
        c.add("decision.horizon_day", f"{horizon} is not one of analysis.horizons_days "
              f"({', '.join(map(str, analysis.horizons_days))})")
    allowed = [o for o in (outcomes.primary, *outcomes.secondary) if isinstance(o, str)]
    loss_node = d.get("loss")
    loss: list[tuple[str, float]] = []
    if loss_node is not None:
        if not isinstance(loss_node, dict) or not loss_node:
            c.add("decision.loss", "expected a mapping {outcome: loss per event} with at least "
                  "one outcome")
        else:
            for name, v in loss_node.items():
                key = f"decision.loss.{name}"
                if name in outcomes.negative_controls:
                    c.add(key, "a negative-control outcome measures bias, not benefit or harm; "
                          "it cannot carry a loss")
                elif name != DEATH and name not in allowed:
                    c.add(key, "not a time-to-event outcome of the protocol (expected one of "
                          f"{', '.join([*allowed, DEATH])})")
                loss.append((str(name), _finite(c, v, key)))
    strategy_node = d.get("strategy_loss")
    strategy_loss: list[tuple[str, float]] = []
    if strategy_node is not None:
        if not isinstance(strategy_node, dict):
            c.add("decision.strategy_loss", "expected a mapping {arm: loss of following it}")
        else:
            for arm, v in strategy_node.items():
                key = f"decision.strategy_loss.{arm}"
                if arm not in strategies.arm_names:
                    c.add(key, f"not an arm (arms: {', '.join(strategies.arm_names)})")
                strategy_loss.append((str(arm), _finite(c, v, key)))
    return Decision(horizon or 0, tuple(loss), tuple(strategy_loss))


def decision_outcomes(outcomes: Outcomes, decision: Decision | None) -> Outcomes:
    """``outcomes`` with all-cause death added for the decision when its loss names it and no
    outcome list has it already."""
    if decision is None or DEATH not in dict(decision.loss):
        return outcomes
    if DEATH in outcomes.time_to_event():
        return outcomes
    return replace(outcomes, for_decision=(DEATH,))


def read_subgroups(c: Collector, node: Any, covariates: tuple[Covariate, ...]) -> tuple[Subgroup, ...]:
    """``subgroups``: each a baseline covariate, with ``cut`` points for a continuous one."""
    out: list[Subgroup] = []
    by_name = {cv.name: cv for cv in covariates}
    for i, item in enumerate(c.listing(node, "subgroups")):
        key = f"subgroups[{i}]"
        s = c.mapping(item, key, known("subgroups[]"), required("subgroups[]"))
        name = c.text(s.get("covariate"), f"{key}.covariate")
        if name and name not in by_name:
            c.add(f"{key}.covariate", f"{name!r} is not a covariate (covariates: "
                  f"{', '.join(by_name)})")
        cuts: list[float] = []
        for j, x in enumerate(c.listing(s.get("cut"), f"{key}.cut")):
            cuts.append(_finite(c, x, f"{key}.cut[{j}]"))
        if cuts != sorted(set(cuts)):
            c.add(f"{key}.cut", "expected increasing cut points without repeats")
        cov = by_name.get(name)
        if cov is not None and not cuts and cov.kind == "continuous":
            c.add(f"{key}.cut", f"covariate {name!r} is continuous: give cut points, e.g. [75]")
        if cov is not None and cuts and cov.kind in ("categorical", "binary"):
            c.add(f"{key}.cut", f"covariate {name!r} is {cov.kind}: cut points apply to "
                  "continuous covariates only")
        out.append(Subgroup(name, tuple(cuts)))
    names = [s.covariate for s in out]
    dupes = sorted({n for n in names if names.count(n) > 1})
    if dupes:
        c.add("subgroups", f"covariate(s) listed twice: {', '.join(dupes)}")
    return tuple(out)
