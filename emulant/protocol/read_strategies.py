"""Reading ``strategies`` and ``follow_up`` (CONTRACTS §3, §3a, §5b)."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from emulant.protocol.collector import NAME_PATTERN, Collector
from emulant.protocol.keys import known, required
from emulant.protocol.model import Arm, Concept, FollowUp, Strategies, Sustain
from emulant.protocol.read_concepts import need_concept


def read_strategies(c: Collector, node: Any, concepts: Mapping[str, Concept]) -> Strategies:
    """``strategies``: the arms, the treated arm, the washout and the same-day rule."""
    st = c.mapping(node, "strategies", known("strategies"), required("strategies"))
    arm_node = st.get("arms") or {}
    if not isinstance(arm_node, dict):
        c.add("strategies.arms", "expected a mapping of arm names")
        arm_node = {}
    specs = {}
    for name, spec in arm_node.items():
        specs[str(name)] = c.mapping(spec, f"strategies.arms.{name}", known("strategies.arms.*"), required("strategies.arms.*"))
        if not NAME_PATTERN.match(str(name)):
            c.add(f"strategies.arms.{name}", "an arm name must be letters, digits and underscores")
    starts = [Arm(str(n), need_concept(c, concepts, d.get("initiate"), f"strategies.arms.{n}.initiate") if d.get("initiate") else "")
              for n, d in specs.items()]
    arms = [Arm(a.name, a.initiate, read_sustain(c, specs[a.name]["sustain"], a.name, starts, concepts)
                if specs[a.name].get("sustain") is not None else None) for a in starts]
    if len(arms) != 2 and arm_node:
        c.add("strategies.arms", f"expected exactly two arms, got {len(arms)}")
    treated = c.text(st.get("treated"), "strategies.treated")
    if arms and treated not in [a.name for a in arms]:
        c.add("strategies.treated", f"expected one of the arms ({', '.join(a.name for a in arms)}), got {treated!r}")
    strategies = Strategies(tuple(arms), treated, c.integer(st.get("washout_days"), "strategies.washout_days", 365, 0) or 0,
                            c.choice(st.get("same_day"), "strategies.same_day", ("exclude", "first_listed"), "exclude") or "exclude")
    return strategies


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
