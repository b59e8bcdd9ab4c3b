"""The protocol as parsed, in the shape a user writes it: every key of :mod:`.keys`, defaults
filled in. Parsing :func:`as_input` of a protocol (from the protocol's folder) gives the same
protocol back; the report's appendix and the run manifest show it.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import yaml

from emulant.protocol.model import (
    NO_START,
    Arm,
    Concept,
    Covariate,
    Criterion,
    MeasuredOutcome,
    Protocol,
)


def _date(d: dt.date | None) -> str | None:
    return d.isoformat() if d is not None else None


def _concept(c: Concept) -> dict[str, Any]:
    return {"source": c.source, "codes": c.codes_file if c.codes_file is not None else list(c.codes),
            "match": c.match, "where": {col: list(vals) for col, vals in c.where}}


def _criteria(items: tuple[Criterion, ...]) -> list[dict[str, Any]]:
    return [{"concept": x.concept, "window": list(x.window)} for x in items]


def _outcome(o: str | MeasuredOutcome) -> str | dict[str, Any]:
    if isinstance(o, str):
        return o
    return {"measure": o.measure, "at_day": o.at_day, "tolerance_days": o.tolerance_days,
            "change_from_baseline": o.change_from_baseline, "missing": o.missing}


def _arm(a: Arm) -> dict[str, Any]:
    sustain = None if a.sustain is None else {"gap_days": a.sustain.gap_days, "switch": list(a.sustain.switch)}
    return {"initiate": a.initiate or NO_START, "start_within": list(a.start_within) if a.start_within else None,
            "sustain": sustain}


def _covariate(c: Covariate) -> dict[str, Any]:
    d: dict[str, Any] = {"name": c.name}
    for k in ("builtin", "attribute", "concept", "source"):
        if getattr(c, k) is not None:
            d[k] = getattr(c, k)
    if c.window is not None:
        d["window"] = list(c.window)
    if c.summary is not None:
        d["summary"] = c.summary
    d["kind"] = c.kind
    d["missing"] = c.missing
    return d


def as_input(p: Protocol) -> dict[str, Any]:
    """The protocol as a mapping of the input's keys (dates as ``YYYY-MM-DD`` text, plain types)."""
    a, e, s = p.analysis, p.eligibility, p.strategies
    return {
        "study": {"id": p.study.id, "title": p.study.title, "question": p.study.question,
                  "target_trial": dict(p.study.target_trial)},
        "concepts": {n: _concept(c) for n, c in p.concepts.items() if n != "death"},
        "eligibility": {"entry": {"start": _date(e.entry_start), "end": _date(e.entry_end)},
                        "age": {"min": e.age_min, "max": e.age_max},
                        "coverage_before_days": e.coverage_before_days,
                        "require": _criteria(e.require), "exclude": _criteria(e.exclude)},
        "strategies": {"design": s.design, "index": {"concept": s.index} if s.index else None,
                       "arms": {arm.name: _arm(arm) for arm in s.arms},
                       "treated": s.treated, "washout_days": s.washout_days, "same_day": s.same_day,
                       "trial_every_days": s.trial_every_days if s.design == "sequential" else None,
                       "noninitiator_sample": s.noninitiator_sample if s.design == "sequential" else None},
        "follow_up": {"max_days": p.follow_up.max_days,
                      "administrative_end": _date(p.follow_up.administrative_end)},
        "outcomes": {"primary": _outcome(p.outcomes.primary), "competing": list(p.outcomes.competing),
                     "secondary": [_outcome(o) for o in p.outcomes.secondary],
                     "negative_controls": list(p.outcomes.negative_controls)},
        "covariates": [_covariate(c) for c in p.covariates],
        "time_varying": [_covariate(c) for c in p.time_varying],
        "estimands": list(p.estimands),
        "contrasts": list(p.contrasts),
        "analysis": {
            "propensity": {"model": a.propensity.model, "continuous": a.propensity.continuous},
            "weights": {"stabilize": a.weights.stabilize,
                        "truncate": list(a.weights.truncate) if a.weights.truncate else None},
            "horizons_days": list(a.horizons_days),
            "methods": list(a.methods),
            "hazard_ratio": a.hazard_ratio,
            "period_days": a.period_days,
            "censoring_weights": a.censoring_weights,
            "bootstrap": {"replicates": a.bootstrap.replicates, "seed": a.bootstrap.seed,
                          "interval": a.bootstrap.interval, "kind": a.bootstrap.kind},
            "variance": a.variance,
            "balance": {"smd_threshold": a.smd_threshold},
            "primary": {"method": a.primary.method, "estimand": a.primary.estimand,
                        "horizon_day": a.primary.horizon_day},
            "gformula": {"simulated_persons": a.gformula.simulated_persons,
                         "seed": a.gformula.seed},
        },
        "report": {"min_cell": p.report.min_cell},
        "decision": None if p.decision is None else {
            "horizon_day": p.decision.horizon_day, "loss": dict(p.decision.loss),
            "strategy_loss": dict(p.decision.strategy_loss)},
        "subgroups": [{"covariate": g.covariate, "cut": list(g.cut)} for g in p.subgroups],
        "extract_columns": {t: dict(r) for t, r in p.extract_columns.items()},
    }


def _leaf(v: Any) -> bool:
    return not isinstance(v, dict | list) or (not v) or (isinstance(v, list) and all(map(_leaf, v)) and
                                                          not any(isinstance(x, dict | list) and x for x in v))


class _Dumper(yaml.SafeDumper):
    """Short lists and mappings of plain values on one line, as a user writes them."""


def _list(d: yaml.SafeDumper, v: list) -> yaml.Node:
    return d.represent_sequence("tag:yaml.org,2002:seq", v, flow_style=all(_leaf(x) for x in v))


def _dict(d: yaml.SafeDumper, v: dict) -> yaml.Node:
    flow = bool(v) and all(_leaf(x) and len(str(x)) < 40 for x in v.values())
    return d.represent_mapping("tag:yaml.org,2002:map", v.items(), flow_style=flow)


_Dumper.add_representer(list, _list)
_Dumper.add_representer(dict, _dict)


def as_input_yaml(p: Protocol) -> str:
    """:func:`as_input` as YAML text, keys in the input's order, short parts on one line."""
    d = as_input(p)
    for section, key in (("eligibility", "entry"), ("follow_up", None)):  # dates written plain
        node = d[section][key] if key else d[section]
        for k in ("start", "end", "administrative_end"):
            if isinstance(node.get(k), str):
                node[k] = dt.date.fromisoformat(node[k])
    return yaml.dump(d, Dumper=_Dumper, sort_keys=False, allow_unicode=True, width=96)
