"""Reading ``outcomes``, ``covariates`` and ``time_varying`` (CONTRACTS §3, §3a, §5a)."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from emulant.protocol.collector import NAME_PATTERN, Collector
from emulant.protocol.keys import known, required, table_path
from emulant.protocol.model import (
    BUILTINS,
    KINDS,
    SUMMARIES,
    VALUE_SUMMARIES,
    Concept,
    Covariate,
    FollowUp,
    MeasuredOutcome,
    Outcomes,
    outcome_name,
)
from emulant.protocol.read_concepts import need_concept


def read_measured(c: Collector, d: Any, key: str, concepts) -> MeasuredOutcome:
    d = c.mapping(d, key, known(table_path(key)), required(table_path(key)))
    m = need_concept(c, concepts, d.get("measure"), f"{key}.measure") if d.get("measure") else ""
    if m in concepts and concepts[m].source != "measurements":
        c.add(f"{key}.measure", f"concept '{m}' has source '{concepts[m].source}'; a measured outcome needs source measurements")
    at_day = c.integer(d.get("at_day"), f"{key}.at_day", 0, 1) or 0
    tolerance = c.integer(d.get("tolerance_days"), f"{key}.tolerance_days", 30, 0) or 0
    if at_day >= 1 and at_day - tolerance < 1:
        c.add(f"{key}.tolerance_days", f"at_day - tolerance_days = {at_day - tolerance} reaches day 0 or "
                                       "earlier, so a baseline value could count as the outcome (expected "
                                       f"tolerance_days <= {at_day - 1})")
    return MeasuredOutcome(
        measure=m,
        at_day=at_day,
        tolerance_days=tolerance,
        change_from_baseline=c.boolean(d.get("change_from_baseline"), f"{key}.change_from_baseline", False),
        missing=c.choice(d.get("missing"), f"{key}.missing", ("censor", "complete_case"), "censor") or "censor",
    )


def read_outcome(c: Collector, node: Any, key: str, concepts) -> str | MeasuredOutcome:
    if isinstance(node, dict):
        return read_measured(c, node, key, concepts)
    return need_concept(c, concepts, node, key)


def read_covariates(c: Collector, node: Any, concepts, section: str = "covariates",
                    taken: tuple[str, ...] = ()) -> tuple[Covariate, ...]:
    """``covariates`` (baseline) or, with ``section="time_varying"``, the covariates re-measured
    on the first day of every period (§5a): a concept or source only, a window ending on or
    before day 0, ``missing: indicator`` only; ``taken`` are names already used."""
    out = []
    seen: set[str] = set(taken)
    tv = section == "time_varying"
    for i, item in enumerate(c.listing(node, section)):
        k = f"{section}[{i}]"
        d = c.mapping(item, k, known(f"{section}[]"), required(f"{section}[]"))
        name = c.text(d.get("name"), f"{k}.name")
        if name and not NAME_PATTERN.match(name):
            c.add(f"{k}.name", "a covariate name must be letters, digits and underscores, starting with a letter")
        if name in seen:
            c.add(f"{k}.name", f"covariate '{name}' is listed twice" + (" (a baseline covariate has this name)" if name in taken else ""))
        seen.add(name)
        k = f"{section}[{i}] ({name})"
        sources = ("concept", "source") if tv else ("builtin", "attribute", "concept", "source")
        kinds = [x for x in sources if d.get(x) is not None]
        if len(kinds) != 1:
            c.add(k, f"give exactly one of {', '.join(sources)} (got {', '.join(kinds) or 'none'})")
        builtin = None if tv else c.choice(d.get("builtin"), f"{k}.builtin", BUILTINS, None)
        concept = need_concept(c, concepts, d["concept"], f"{k}.concept") if d.get("concept") is not None else None
        source = c.text(d.get("source"), f"{k}.source") if d.get("source") is not None else None
        window = c.window(d.get("window"), f"{k}.window")
        summary = c.choice(d.get("summary"), f"{k}.summary", SUMMARIES, None)
        if concept is not None or source is not None:
            if window is None:
                c.add(f"{k}.window", "a concept or source covariate needs a window [a, b]")
            if summary is None:
                summary = "any"
        elif window is not None or summary is not None:
            c.add(k, "window and summary apply only to a concept or source covariate")
        if source is not None and summary in VALUE_SUMMARIES and source != "measurements":
            c.add(f"{k}.summary", f"summary '{summary}' needs numeric values (source measurements)")
        if concept in concepts and summary in VALUE_SUMMARIES and concepts[concept].source != "measurements":
            c.add(f"{k}.summary", f"summary '{summary}' needs numeric values; concept '{concept}' has source '{concepts[concept].source}'")
        kind = c.choice(d.get("kind"), f"{k}.kind", KINDS, None)
        if kind is None:
            if builtin == "sex":
                kind = "categorical"
            elif builtin in ("age", "calendar_year"):
                kind = "continuous"
            elif summary == "any":
                kind = "binary"
            elif summary is not None:
                kind = "continuous"
        missing = c.choice(d.get("missing"), f"{k}.missing", ("indicator",) if tv else ("indicator", "exclude"), "indicator")
        attribute = c.text(d.get("attribute"), f"{k}.attribute") if d.get("attribute") is not None and not tv else None
        out.append(Covariate(name, builtin, attribute, concept, source, window, summary, kind, missing or "indicator"))
    return tuple(out)


def read_outcomes(c: Collector, node: Any, concepts: Mapping[str, Concept], follow: FollowUp) -> Outcomes:
    """``outcomes``: primary, competing, secondary and negative-control outcomes."""
    o = c.mapping(node, "outcomes", known("outcomes"), required("outcomes"))
    outcomes = Outcomes(
        primary=read_outcome(c, o.get("primary"), "outcomes.primary", concepts) if o.get("primary") is not None else "",
        competing=tuple(need_concept(c, concepts, x, f"outcomes.competing[{i}]") for i, x in enumerate(c.listing(o.get("competing"), "outcomes.competing"))),
        secondary=tuple(read_outcome(c, x, f"outcomes.secondary[{i}]", concepts) for i, x in enumerate(c.listing(o.get("secondary"), "outcomes.secondary"))),
        negative_controls=tuple(need_concept(c, concepts, x, f"outcomes.negative_controls[{i}]") for i, x in enumerate(c.listing(o.get("negative_controls"), "outcomes.negative_controls"))),
    )
    if len(outcomes.competing) > 1:
        c.add("outcomes.competing", "at most one competing event is supported; combine them into one concept")
    names = [outcome_name(x) for x in outcomes.all()]
    dupes = sorted({n for n in names if names.count(n) > 1})
    if dupes:
        c.add("outcomes", f"outcome(s) listed twice: {', '.join(dupes)}")
    for m in outcomes.measured():
        if m.at_day + m.tolerance_days > follow.max_days:
            c.add("outcomes", f"measured outcome '{m.measure}' needs max_days >= at_day + tolerance_days = {m.at_day + m.tolerance_days} (follow_up.max_days is {follow.max_days})")
    return outcomes
