"""Reading ``strategies`` and ``follow_up`` (CONTRACTS §3, §3a)."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from emulant.protocol.collector import NAME_PATTERN, Collector
from emulant.protocol.model import Arm, Concept, FollowUp, Strategies
from emulant.protocol.read_concepts import need_concept


def read_strategies(c: Collector, node: Any, concepts: Mapping[str, Concept]) -> Strategies:
    """``strategies``: the arms, the treated arm, the washout and the same-day rule."""
    st = c.mapping(node, "strategies", ("arms", "treated", "washout_days", "same_day"), required=("arms", "treated"))
    arms = []
    arm_node = st.get("arms") or {}
    if not isinstance(arm_node, dict):
        c.add("strategies.arms", "expected a mapping of arm names")
        arm_node = {}
    for name, spec in arm_node.items():
        d = c.mapping(spec, f"strategies.arms.{name}", ("initiate",), required=("initiate",))
        if not NAME_PATTERN.match(str(name)):
            c.add(f"strategies.arms.{name}", "an arm name must be letters, digits and underscores")
        arms.append(Arm(str(name), need_concept(c, concepts, d.get("initiate"), f"strategies.arms.{name}.initiate") if d.get("initiate") else ""))
    if len(arms) != 2 and arm_node:
        c.add("strategies.arms", f"expected exactly two arms, got {len(arms)}")
    treated = c.text(st.get("treated"), "strategies.treated")
    if arms and treated not in [a.name for a in arms]:
        c.add("strategies.treated", f"expected one of the arms ({', '.join(a.name for a in arms)}), got {treated!r}")
    strategies = Strategies(tuple(arms), treated, c.integer(st.get("washout_days"), "strategies.washout_days", 365, 0) or 0,
                            c.choice(st.get("same_day"), "strategies.same_day", ("exclude", "first_listed"), "exclude") or "exclude")
    return strategies


def read_follow_up(c: Collector, node: Any) -> FollowUp:
    """``follow_up``: the longest follow-up and the administrative end."""
    f = c.mapping(node, "follow_up", ("max_days", "administrative_end"))
    follow = FollowUp(c.integer(f.get("max_days"), "follow_up.max_days", 1095, 1) or 1095,
                      c.date(f.get("administrative_end"), "follow_up.administrative_end"))
    return follow
