"""Protocol keys of the decision summary and subgroups (CONTRACTS §5f): defaults, death added
for the decision, and one clear problem per bad key."""

from __future__ import annotations

import pytest
from two_arm import two_arm_protocol

from emulant.protocol import ProtocolError

OUTCOMES = {"primary": "event", "competing": ["death"], "negative_controls": ["nc"]}
EXTRA = {"nc": {"source": "diagnoses", "codes": ["NC1"]}}
COVS = [{"name": "age", "builtin": "age"}, {"name": "sex", "builtin": "sex"}]


def _protocol(**sections):
    return two_arm_protocol("decide", EXTRA, outcomes=OUTCOMES, covariates=COVS, **sections)


def _problems(**sections) -> list[str]:
    with pytest.raises(ProtocolError) as info:
        _protocol(**sections)
    return info.value.problems


def test_no_decision_by_default():
    p = _protocol()
    assert p.decision is None and p.subgroups == ()
    assert p.analysis.bootstrap.kind == "multinomial"
    assert p.outcomes.for_decision == ()


def test_decision_read_and_death_added_for_it():
    p = _protocol(decision={"horizon_day": 730, "loss": {"event": 1, "death": 2.5},
                            "strategy_loss": {"drug_a": 0.01}},
                  subgroups=[{"covariate": "sex"}, {"covariate": "age", "cut": [75]}],
                  analysis={"bootstrap": {"kind": "bayesian"}})
    assert p.decision.horizon_day == 730
    assert dict(p.decision.loss) == {"event": 1.0, "death": 2.5}
    assert dict(p.decision.strategy_loss) == {"drug_a": 0.01}
    assert p.outcomes.for_decision == ("death",)
    assert p.outcomes.all()[-1] == "death" and p.outcomes.role("death") == "decision"
    assert [(s.covariate, s.cut) for s in p.subgroups] == [("sex", ()), ("age", (75.0,))]
    assert p.analysis.bootstrap.kind == "bayesian"


def test_death_not_added_without_a_loss_on_it():
    p = _protocol(decision={"horizon_day": 365, "loss": {"event": 1}})
    assert p.outcomes.for_decision == ()


@pytest.mark.parametrize(("decision", "key", "words"), [
    ({"horizon_day": 400, "loss": {"event": 1}}, "decision.horizon_day", "not one of"),
    ({"horizon_day": 365, "loss": {"nc": 1}}, "decision.loss.nc", "negative-control"),
    ({"horizon_day": 365, "loss": {"fracture": 1}}, "decision.loss.fracture", "not a time-to-event"),
    ({"horizon_day": 365, "loss": {"event": float("inf")}}, "decision.loss.event", "finite"),
    ({"horizon_day": 365, "loss": {"event": "high"}}, "decision.loss.event", "finite"),
    ({"horizon_day": 365, "loss": {}}, "decision.loss", "at least one"),
    ({"horizon_day": 365, "loss": {"event": 1}, "strategy_loss": {"drug_c": 1}},
     "decision.strategy_loss.drug_c", "not an arm"),
    ({"loss": {"event": 1}}, "decision.horizon_day", "required"),
    ({"horizon_day": 365, "loss": {"event": 1}, "horizon": 1}, "decision.horizon", "unknown"),
])
def test_bad_decision_named(decision, key, words):
    problems = _problems(decision=decision)
    assert any(p.startswith(key) and words in p for p in problems), problems


@pytest.mark.parametrize(("subgroups", "key", "words"), [
    ([{"covariate": "bmi"}], "subgroups[0].covariate", "not a covariate"),
    ([{"covariate": "age"}], "subgroups[0].cut", "continuous"),
    ([{"covariate": "sex", "cut": [1]}], "subgroups[0].cut", "continuous covariates only"),
    ([{"covariate": "age", "cut": [80, 70]}], "subgroups[0].cut", "increasing"),
    ([{"covariate": "sex"}, {"covariate": "sex"}], "subgroups", "twice"),
])
def test_bad_subgroups_named(subgroups, key, words):
    problems = _problems(subgroups=subgroups)
    assert any(p.startswith(key) and words in p for p in problems), problems


def test_bad_bootstrap_kind_named():
    problems = _problems(analysis={"bootstrap": {"kind": "poisson"}})
    assert any(p.startswith("analysis.bootstrap.kind") for p in problems), problems


def test_variance_defaults_to_the_bootstrap_and_reads_influence():
    assert _protocol().analysis.variance == "bootstrap"
    assert _protocol(analysis={"variance": "influence"}).analysis.variance == "influence"


def test_bad_variance_named_with_the_nearest_choice():
    problems = _problems(analysis={"variance": "influense"})
    assert any(p.startswith("analysis.variance") and "did you mean 'influence'?" in p
               for p in problems), problems
