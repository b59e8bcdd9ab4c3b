"""The design keys of CONTRACTS §5c and §5d: ``strategies.design``, ``index``, ``trial_every_days``,
``noninitiator_sample``, arms with ``initiate: none`` or ``start_within``. Every expected value and
message is read off the contract by hand (no outside source: the contract is the reference); the
fixture protocol is the invented one of tests/tiny_extract.py."""

from __future__ import annotations

import copy

import pytest
from tiny_extract import one_problem as one
from tiny_extract import protocol_dict, protocol_problems, write_protocol

from emulant.protocol import load_protocol
from emulant.protocol.as_input import as_input


def clone_dict() -> dict:
    d = copy.deepcopy(protocol_dict())
    d["concepts"]["acute"] = {"source": "diagnoses", "codes": ["DM2"]}
    d["strategies"] = {"design": "clone", "index": {"concept": "acute"},
                       "arms": {"early": {"initiate": "class_a", "start_within": [0, 90]},
                                "never": {"initiate": "none"}}}
    return d


def sequential_dict() -> dict:
    d = copy.deepcopy(protocol_dict())
    d["strategies"] = {"design": "sequential",
                       "arms": {"class_a": {"initiate": "class_a", "sustain": {"gap_days": 60}},
                                "no_class_a": {"initiate": "none"}}}
    return d


def problems_of(tmp_path, base, edit) -> list[str]:
    return protocol_problems(tmp_path, edit, base)


def test_clone_protocol_parses_with_its_defaults(tmp_path):
    p = load_protocol(write_protocol(tmp_path, clone_dict()))
    s = p.strategies
    assert (s.design, s.index) == ("clone", "acute")
    early, never = s.arms
    assert (early.initiate, early.start_within, early.starts) == ("class_a", (0, 90), True)
    assert (never.initiate, never.start_within, never.starts) == ("", None, False)
    # §5d: clones have no assignment at time zero: per_protocol and ATE are the design's defaults
    assert p.contrasts == ("per_protocol",) and p.estimands == ("ATE",)
    assert s.treated == "early" and s.initiating_concepts == ("class_a",)
    back = as_input(p)["strategies"]
    assert back["arms"]["never"]["initiate"] == "none" and back["arms"]["early"]["start_within"] == [0, 90]
    assert back["trial_every_days"] is None and back["noninitiator_sample"] is None


def test_sequential_protocol_parses_with_its_defaults(tmp_path):
    p = load_protocol(write_protocol(tmp_path, sequential_dict()))
    s = p.strategies
    assert (s.design, s.trial_every_days, s.noninitiator_sample, s.treated) == ("sequential", 30, 1.0, "class_a")
    assert [a.starts for a in s.arms] == [True, False]
    assert p.contrasts == ("intention_to_treat",) and p.estimands == ("ATE", "ATT")


def test_initiators_is_the_default_design(tmp_path):
    p = load_protocol(write_protocol(tmp_path, protocol_dict()))
    assert p.strategies.design == "initiators" and p.strategies.index is None


def test_initiators_still_needs_treated(tmp_path):
    msg = one(problems_of(tmp_path, protocol_dict, lambda d: d["strategies"].pop("treated")), "strategies.treated:")
    assert "required key is missing" in msg


@pytest.mark.parametrize(("base", "where", "typo", "near"), [
    (clone_dict, ("strategies",), "indx", "index"),
    (clone_dict, ("strategies", "arms", "early"), "start_withn", "start_within"),
    (sequential_dict, ("strategies",), "trial_every_day", "trial_every_days"),
    (sequential_dict, ("strategies",), "noninitiator_sampl", "noninitiator_sample"),
    (clone_dict, ("strategies", "index"), "concpt", "concept"),
])
def test_design_keys_suggest_the_nearest(tmp_path, base, where, typo, near):
    def edit(d):
        node = d
        for k in where:
            node = node[k]
        node[typo] = 1

    msg = one(problems_of(tmp_path, base, edit), ".".join((*where, typo)) + ":")
    assert f"unknown key; did you mean '{near}'?" in msg


def test_unknown_design_suggests_the_nearest(tmp_path):
    msg = one(problems_of(tmp_path, clone_dict, lambda d: d["strategies"].update(design="clones")),
              "strategies.design:")
    assert "initiators, sequential, clone" in msg and "did you mean 'clone'" in msg


@pytest.mark.parametrize(("key", "value", "allowed"), [
    ("contrasts", ["intention_to_treat", "per_protocol"], "[per_protocol] only"),
    ("estimands", ["ATE", "ATT"], "[ATE] only"),
])
def test_clone_allows_per_protocol_and_ate_only_and_says_why(tmp_path, key, value, allowed):
    msg = one(problems_of(tmp_path, clone_dict, lambda d: d.update({key: value})), f"{key}:")
    assert "design clone allows" in msg and allowed in msg
    assert "clones have no assignment at time zero" in msg


def test_clone_needs_an_index(tmp_path):
    msg = one(problems_of(tmp_path, clone_dict, lambda d: d["strategies"].pop("index")), "strategies.index:")
    assert "required key is missing" in msg and "design clone" in msg


def test_index_is_for_clone_only(tmp_path):
    def edit(d):
        d["concepts"]["acute"] = {"source": "diagnoses", "codes": ["DM2"]}
        d["strategies"]["index"] = {"concept": "acute"}

    msg = one(problems_of(tmp_path, protocol_dict, edit), "strategies.index:")
    assert "only design clone" in msg and "initiators" in msg


def test_index_concept_must_be_defined(tmp_path):
    problems = problems_of(tmp_path, clone_dict, lambda d: d["strategies"]["index"].update(concept="acut"))
    assert any(p.startswith("strategies.index.concept:") for p in problems), problems


@pytest.mark.parametrize("base", [protocol_dict, sequential_dict])
def test_start_within_is_for_clone_only(tmp_path, base):
    def edit(d):
        first = next(iter(d["strategies"]["arms"]))
        d["strategies"]["arms"][first]["start_within"] = [0, 30]

    first = next(iter(base()["strategies"]["arms"]))
    msg = one(problems_of(tmp_path, base, edit), f"strategies.arms.{first}.start_within:")
    assert "design clone only" in msg


def test_initiate_none_is_not_for_initiators(tmp_path):
    msg = one(problems_of(tmp_path, protocol_dict, lambda d: d["strategies"]["arms"]["class_b"].update(initiate="none")),
              "strategies.arms.class_b.initiate:")
    assert "designs sequential and clone" in msg and "two starting arms" in msg


@pytest.mark.parametrize("arms", [
    {"class_a": {"initiate": "class_a"}, "class_b": {"initiate": "class_b"}},
    {"nothing": {"initiate": "none"}, "neither": {"initiate": "none"}},
])
def test_sequential_needs_one_starting_and_one_none_arm(tmp_path, arms):
    msg = one(problems_of(tmp_path, sequential_dict, lambda d: d["strategies"].update(arms=arms)), "strategies.arms:")
    assert "exactly one starting arm" in msg and "one `initiate: none` arm" in msg


def test_clone_starting_arm_needs_a_window(tmp_path):
    msg = one(problems_of(tmp_path, clone_dict, lambda d: d["strategies"]["arms"]["early"].pop("start_within")),
              "strategies.arms.early.start_within:")
    assert "required on a starting arm of design clone" in msg


def test_clone_needs_a_starting_arm(tmp_path):
    arms = {"never": {"initiate": "none"}, "nor": {"initiate": "none"}}
    msg = one(problems_of(tmp_path, clone_dict, lambda d: d["strategies"].update(arms=arms)), "strategies.arms:")
    assert "at least one arm must start a concept" in msg


@pytest.mark.parametrize("window", [[90, 0], [-1, 30], [0], "0..90", [0, 1.5]])
def test_start_within_needs_0_le_a_le_b(tmp_path, window):
    msg = one(problems_of(tmp_path, clone_dict, lambda d: d["strategies"]["arms"]["early"].update(start_within=window)),
              "strategies.arms.early.start_within:")
    assert "0 <= a <= b" in msg


def test_none_arm_sustains_nothing(tmp_path):
    msg = one(problems_of(tmp_path, clone_dict, lambda d: d["strategies"]["arms"]["never"].update(sustain={"gap_days": 30})),
              "strategies.arms.never.sustain:")
    assert "nothing to sustain" in msg


@pytest.mark.parametrize(("key", "value", "expect"), [
    ("noninitiator_sample", 0, "0 < share <= 1"),
    ("noninitiator_sample", 1.5, "0 < share <= 1"),
    ("trial_every_days", 0, ">= 1"),
])
def test_sequential_numbers_are_checked(tmp_path, key, value, expect):
    msg = one(problems_of(tmp_path, sequential_dict, lambda d: d["strategies"].update({key: value})), f"strategies.{key}:")
    assert expect in msg


@pytest.mark.parametrize("key", ["trial_every_days", "noninitiator_sample"])
@pytest.mark.parametrize("base", [protocol_dict, clone_dict])
def test_sequential_keys_are_for_sequential_only(tmp_path, base, key):
    msg = one(problems_of(tmp_path, base, lambda d: d["strategies"].update({key: 1})), f"strategies.{key}:")
    assert "only design sequential" in msg


def test_per_protocol_sequential_needs_sustain_on_the_starting_arm_only(tmp_path):
    def edit(d):
        d["contrasts"] = ["intention_to_treat", "per_protocol"]
        d["strategies"]["arms"]["class_a"].pop("sustain")

    msg = one(problems_of(tmp_path, sequential_dict, edit), "strategies.arms.class_a:")
    assert "per_protocol needs sustain" in msg
    d = sequential_dict()
    d["contrasts"] = ["intention_to_treat", "per_protocol"]
    assert load_protocol(write_protocol(tmp_path, d)).per_protocol  # the none arm needs none


def test_clone_arms_without_sustain_are_fine_per_protocol(tmp_path):
    p = load_protocol(write_protocol(tmp_path, clone_dict()))
    assert p.per_protocol and all(a.sustain is None for a in p.strategies.arms)
