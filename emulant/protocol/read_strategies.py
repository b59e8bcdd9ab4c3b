"""Reading ``strategies`` and ``follow_up`` (CONTRACTS §3, §3a, §5b, §5c, §5d)."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from emulant.protocol.collector import NAME_PATTERN, Collector
from emulant.protocol.keys import known, required
from emulant.protocol.model import DESIGNS, NO_START, Arm, Concept, FollowUp, Strategies, Sustain
from emulant.protocol.read_concepts import need_concept

#: What each design allows, said in every message about it.
ALLOWS = {
    "initiators": "design initiators compares two starting arms, each with `initiate: <concept>`, "
                  "time zero at the first initiation",
    "sequential": "design sequential allows exactly one starting arm (`initiate: <concept>`) and one "
                  "`initiate: none` arm",
    "clone": "design clone needs strategies.index and arms with `initiate: <concept>` and "
             "`start_within: [a, b]` or `initiate: none`; its contrasts are [per_protocol] and its "
             "estimands [ATE] only, because clones have no assignment at time zero",
}


def read_strategies(c: Collector, node: Any, concepts: Mapping[str, Concept]) -> Strategies:
    """``strategies``: the design, the arms, the treated arm, the washout, the same-day rule and the
    keys of the sequential and clone designs (CONTRACTS §3a, §5c, §5d)."""
    st = c.mapping(node, "strategies", known("strategies"), required("strategies"))
    design = c.choice(st.get("design"), "strategies.design", DESIGNS, "initiators") or "initiators"
    arm_node = st.get("arms") or {}
    if not isinstance(arm_node, dict):
        c.add("strategies.arms", "expected a mapping of arm names")
        arm_node = {}
    specs = {}
    for name, spec in arm_node.items():
        specs[str(name)] = c.mapping(spec, f"strategies.arms.{name}", known("strategies.arms.*"), required("strategies.arms.*"))
        if not NAME_PATTERN.match(str(name)):
            c.add(f"strategies.arms.{name}", "an arm name must be letters, digits and underscores")
    starts = [Arm(n, _initiate(c, concepts, d.get("initiate"), n, design),
                  start_within=c.days(d.get("start_within"), f"strategies.arms.{n}.start_within"))
              for n, d in specs.items()]
    arms = [Arm(a.name, a.initiate, read_sustain(c, specs[a.name]["sustain"], a.name, starts, concepts)
                if specs[a.name].get("sustain") is not None else None, a.start_within) for a in starts]
    if len(arms) != 2 and arm_node:
        c.add("strategies.arms", f"expected exactly two arms, got {len(arms)}")
    index = _index(c, st.get("index"), concepts, design)
    every = c.integer(st.get("trial_every_days"), "strategies.trial_every_days", 30, 1) or 30
    share = c.number(st.get("noninitiator_sample"), "strategies.noninitiator_sample", 1.0)
    if not 0 < share <= 1:
        c.add("strategies.noninitiator_sample", f"expected a share with 0 < share <= 1, got {share}")
    for key in ("trial_every_days", "noninitiator_sample"):
        if st.get(key) is not None and design != "sequential":
            c.add(f"strategies.{key}", f"only design sequential reads this key; this protocol's design is {design}")
    _check_arms(c, arms, design, {n for n, d in specs.items() if d.get("start_within") is not None})
    treated = _treated(c, st.get("treated"), arms, design)
    return Strategies(tuple(arms), treated, c.integer(st.get("washout_days"), "strategies.washout_days", 365, 0) or 0,
                      c.choice(st.get("same_day"), "strategies.same_day", ("exclude", "first_listed"), "exclude") or "exclude",
                      design, index, every, share)


def _initiate(c: Collector, concepts: Mapping[str, Concept], v: Any, arm: str, design: str) -> str:
    key = f"strategies.arms.{arm}.initiate"
    if v == NO_START:
        if design == "initiators":
            c.add(key, f"`initiate: none` is for designs sequential and clone; {ALLOWS['initiators']}")
        return ""
    return need_concept(c, concepts, v, key) if v else ""


def _index(c: Collector, node: Any, concepts: Mapping[str, Concept], design: str) -> str | None:
    if node is None:
        if design == "clone":
            c.add("strategies.index", f"required key is missing: {ALLOWS['clone']}")
        return None
    d = c.mapping(node, "strategies.index", known("strategies.index"), required("strategies.index"))
    if design != "clone":
        c.add("strategies.index", f"only design clone reads an index event; this protocol's design is {design}")
    return need_concept(c, concepts, d.get("concept"), "strategies.index.concept") if d.get("concept") else None


def _check_arms(c: Collector, arms: list[Arm], design: str, windowed: set[str]) -> None:
    """What each design allows of its arms; every message names the arm's key and the design's rule."""
    for a in arms:
        key = f"strategies.arms.{a.name}"
        if a.start_within is not None and design != "clone":
            c.add(f"{key}.start_within", f"a grace window is for design clone only; {ALLOWS[design]}")
        if design == "clone" and a.starts and a.name not in windowed:
            c.add(f"{key}.start_within", f"required on a starting arm of design clone: {ALLOWS['clone']}")
        if not a.starts and a.sustain is not None:
            c.add(f"{key}.sustain", "an `initiate: none` arm has nothing to sustain: it deviates when it starts "
                                    "another arm's concept")
    if design == "sequential" and len(arms) == 2 and sorted(a.starts for a in arms) != [False, True]:
        c.add("strategies.arms", f"{ALLOWS['sequential']}; got {', '.join(_what(a) for a in arms)}")
    if design == "clone" and len(arms) == 2 and not any(a.starts for a in arms):
        c.add("strategies.arms", f"at least one arm must start a concept: {ALLOWS['clone']}")
    starting = [(a.initiate, a.start_within) for a in arms if a.starts]
    if design == "clone" and len(set(starting)) < len(starting):
        c.add("strategies.arms", "two clone arms with the same concept and start_within are the same strategy")


def _what(a: Arm) -> str:
    return f"{a.name} (initiate: {a.initiate or NO_START})"


def _treated(c: Collector, v: Any, arms: list[Arm], design: str) -> str:
    names = [a.name for a in arms]
    if v is None:
        if design == "initiators":
            c.add("strategies.treated", "required key is missing (design initiators: the arm whose members define the ATT)")
            return ""
        first = next((a.name for a in arms if a.starts), names[0] if names else "")
        return first
    treated = c.text(v, "strategies.treated")
    if arms and treated not in names:
        c.add("strategies.treated", f"expected one of the arms ({', '.join(names)}), got {treated!r}")
    return treated


def read_sustain(c: Collector, node: Any, arm: str, arms: list[Arm],
                 concepts: Mapping[str, Concept]) -> Sustain:
    """``strategies.arms.<arm>.sustain``: ``gap_days`` (required, >= 0) and ``switch`` (concepts;
    default: the other arms' initiating concepts), CONTRACTS §5b."""
    key = f"strategies.arms.{arm}.sustain"
    d = c.mapping(node, key, known("strategies.arms.*.sustain"), required("strategies.arms.*.sustain"))
    gap = c.integer(d.get("gap_days"), f"{key}.gap_days", 0, 0) or 0
    if d.get("switch") is None:
        switch = tuple(a.initiate for a in arms if a.name != arm and a.initiate)
    else:
        switch = tuple(need_concept(c, concepts, x, f"{key}.switch[{i}]")
                       for i, x in enumerate(c.listing(d.get("switch"), f"{key}.switch")))
        own = next((a.initiate for a in arms if a.name == arm), None)
        if own in switch:
            c.add(f"{key}.switch", f"concept '{own}' starts this arm; it cannot also be a switch")
    return Sustain(gap, switch)


def read_follow_up(c: Collector, node: Any) -> FollowUp:
    """``follow_up``: the longest follow-up and the administrative end."""
    f = c.mapping(node, "follow_up", known("follow_up"))
    follow = FollowUp(c.integer(f.get("max_days"), "follow_up.max_days", 1095, 1) or 1095,
                      c.date(f.get("administrative_end"), "follow_up.administrative_end"))
    return follow
