"""The second-wave protocol keys (CONTRACTS §5a, §5b): ``time_varying``, ``sustain``, the
``per_protocol`` contrast. Every expected message is read off the contract by hand; the
fixture protocol is the invented one of tests/tiny_extract.py."""

from __future__ import annotations

import copy

import pytest
from tiny_extract import one_problem as one
from tiny_extract import protocol_dict, protocol_problems, write_protocol

from emulant.protocol import load_protocol


def per_protocol_dict() -> dict:
    d = copy.deepcopy(protocol_dict())
    d["strategies"]["arms"]["class_a"]["sustain"] = {"gap_days": 60}
    d["strategies"]["arms"]["class_b"]["sustain"] = {"gap_days": 30, "switch": ["class_a", "t2d"]}
    d["contrasts"] = ["intention_to_treat", "per_protocol"]
    d["time_varying"] = [{"name": "hba1c_now", "concept": "hba1c", "window": [-180, 0], "summary": "last"},
                         {"name": "dm_recent", "concept": "t2d", "window": [-90, 0]}]
    return d


def problems_of(tmp_path, edit) -> list[str]:
    return protocol_problems(tmp_path, edit, per_protocol_dict)


def test_per_protocol_protocol_parses_with_defaults(tmp_path):
    p = load_protocol(write_protocol(tmp_path, per_protocol_dict()))
    a, b = p.strategies.arms
    assert p.per_protocol and p.contrasts == ("intention_to_treat", "per_protocol")
    # §5b: switch defaults to the other arms' initiating concepts
    assert (a.sustain.gap_days, a.sustain.switch) == (60, ("class_b",))
    assert (b.sustain.gap_days, b.sustain.switch) == (30, ("class_a", "t2d"))
    tv = {c.name: (c.concept, c.window, c.summary, c.kind, c.missing) for c in p.time_varying}
    assert tv == {"hba1c_now": ("hba1c", (-180, 0), "last", "continuous", "indicator"),
                  "dm_recent": ("t2d", (-90, 0), "any", "binary", "indicator")}
    d = p.as_dict()
    assert d["strategies"]["arms"][0]["sustain"] == {"gap_days": 60, "switch": ["class_b"]}
    assert d["time_varying"][0]["name"] == "hba1c_now"


def test_intention_to_treat_protocol_has_no_person_time(tmp_path):
    p = load_protocol(write_protocol(tmp_path, protocol_dict()))
    assert not p.per_protocol and p.time_varying == ()
    assert all(a.sustain is None for a in p.strategies.arms)


def test_per_protocol_without_sustain_names_the_arm(tmp_path):
    msg = one(problems_of(tmp_path, lambda d: d["strategies"]["arms"]["class_b"].pop("sustain")),
              "strategies.arms.class_b:")
    assert "per_protocol needs sustain" in msg and "'class_b'" in msg


@pytest.mark.parametrize(("where", "typo", "near"), [
    (("strategies", "arms", "class_a", "sustain"), "gap_day", "gap_days"),
    (("strategies", "arms", "class_a", "sustain"), "switches", "switch"),
    (("strategies", "arms", "class_a"), "sustian", "sustain"),
    ((), "time_varyng", "time_varying"),
])
def test_new_keys_suggest_the_nearest(tmp_path, where, typo, near):
    def edit(d):
        node = d
        for k in where:
            node = node[k]
        node[typo] = 1

    msg = one(problems_of(tmp_path, edit), ".".join((*where, typo)) + ":")
    assert f"unknown key; did you mean '{near}'?" in msg


def test_time_varying_item_key_suggests_the_nearest(tmp_path):
    msg = one(problems_of(tmp_path, lambda d: d["time_varying"][0].update(windw=[-1, 0])),
              "time_varying[0].windw:")
    assert "did you mean 'window'?" in msg


def test_contrast_typo_suggests(tmp_path):
    msg = one(problems_of(tmp_path, lambda d: d.update(contrasts=["per_protocl"])), "contrasts[0]:")
    assert "did you mean 'per_protocol'?" in msg


def test_sustain_problems(tmp_path):
    def edit(d):
        d["strategies"]["arms"]["class_a"]["sustain"] = {"switch": ["class_a", "nothing"]}
        d["strategies"]["arms"]["class_b"]["sustain"] = {"gap_days": -1}

    probs = problems_of(tmp_path, edit)
    assert "required key is missing" in one(probs, "strategies.arms.class_a.sustain.gap_days:")
    assert "cannot also be a switch" in one(probs, "strategies.arms.class_a.sustain.switch:")
    assert "'nothing' is not defined" in one(probs, "strategies.arms.class_a.sustain.switch[1]:")
    assert "expected an integer >= 0" in one(probs, "strategies.arms.class_b.sustain.gap_days:")


def test_time_varying_rules(tmp_path):
    """§5a: a window ends on or before day 0; only a concept or a source; no name twice (a
    baseline covariate's name included); ``missing: exclude`` has no meaning per period."""
    def edit(d):
        d["time_varying"] = [
            {"name": "future", "concept": "hba1c", "window": [-30, 10], "summary": "last"},
            {"name": "age", "concept": "t2d", "window": [-30, 0]},
            {"name": "years", "builtin": "age"},
            {"name": "drop", "concept": "t2d", "window": [-30, 0], "missing": "exclude"},
        ]

    probs = problems_of(tmp_path, edit)
    assert "must end on or before day 0" in one(probs, "time_varying[0] (future).window:")
    assert "a baseline covariate has this name" in one(probs, "time_varying[1].name:")
    assert "unknown key" in one(probs, "time_varying[2].builtin:")
    assert "give exactly one of concept, source" in one(probs, "time_varying[2] (years):")
    assert "expected one of indicator" in one(probs, "time_varying[3] (drop).missing:")
