"""The protocol's validation (CONTRACTS §3): key paths, nearest-key hints, cross-checks, defaults.

The fixture protocol is invented (tests/tiny_extract.py); every expected value below is read off
the contract's defaults or the fixture by hand.
"""

from __future__ import annotations

import copy
import datetime as dt

import pytest
import yaml
from tiny_extract import one_problem as one
from tiny_extract import protocol_dict, protocol_problems, write_extract, write_protocol

from emulant import cli
from emulant.extract import ExtractError, check_extract
from emulant.protocol import ProtocolError, load_protocol, parse_protocol


def problems_of(tmp_path, edit) -> list[str]:
    return protocol_problems(tmp_path, edit)


def test_fixture_is_valid(tmp_path):
    p = load_protocol(write_protocol(tmp_path))
    assert p.study.id == "tiny-test"
    assert p.concepts["class_a"].codes == ("RXA",)
    assert p.strategies.comparator == "class_b"


@pytest.mark.parametrize(("where", "typo", "near"), [
    ((), "eligibilty", "eligibility"),
    (("strategies",), "washout_day", "washout_days"),
    (("analysis", "bootstrap"), "replicate", "replicates"),
    (("eligibility", "entry"), "ends", "end"),
])
def test_unknown_key_suggests_the_nearest(tmp_path, where, typo, near):
    def edit(d):
        node = d
        for k in where:
            node = node.setdefault(k, {})
        node[typo] = 1

    key = ".".join((*where, typo))
    msg = one(problems_of(tmp_path, edit), key + ":")
    assert f"unknown key; did you mean '{near}'?" in msg


def test_concept_missing(tmp_path):
    def edit(d):
        d["eligibility"]["exclude"] = [{"concept": "heart_fail", "window": [-365, 0]}]

    msg = one(problems_of(tmp_path, edit), "eligibility.exclude[0].concept:")
    assert "concept 'heart_fail' is not defined under concepts" in msg


def test_concept_source_absent_from_extract(tmp_path, capsys):
    d = protocol_dict()
    d["concepts"]["fracture"] = {"source": "procedures", "codes": ["FX7"]}
    d["outcomes"]["negative_controls"] = ["fracture"]
    p = load_protocol(write_protocol(tmp_path / "proto", d))
    ex = write_extract(tmp_path / "extract")
    with pytest.raises(ExtractError) as info:
        check_extract(ex, p)
    msg = one(info.value.problems, "concepts.fracture.source:")
    assert "table procedures is not in the extract" in msg and "procedures.parquet" in msg
    rc = cli.main(["check", "--extract", str(ex), "--protocol", str(tmp_path / "proto" / "protocol.yaml")])
    assert rc == 2 and "concepts.fracture.source" in capsys.readouterr().err


def test_code_list_file_missing(tmp_path):
    def edit(d):
        d["concepts"]["class_a"]["codes"] = "codelists/nowhere.csv"

    msg = one(problems_of(tmp_path, edit), "concepts.class_a.codes:")
    assert "nowhere.csv does not exist" in msg


def test_code_list_file_empty(tmp_path):
    (tmp_path / "codelists").mkdir()
    (tmp_path / "codelists" / "empty.csv").write_text("code,description\n")
    (tmp_path / "codelists" / "nocode.csv").write_text("atc\nRX1\n")

    def edit(d):
        d["concepts"]["class_a"]["codes"] = "codelists/empty.csv"
        d["concepts"]["class_b"]["codes"] = "codelists/nocode.csv"
        d["concepts"]["t2d"]["codes"] = []

    probs = problems_of(tmp_path, edit)
    assert "has no codes" in one(probs, "concepts.class_a.codes:")
    assert "has no 'code' column" in one(probs, "concepts.class_b.codes:")
    assert "the code list is empty" in one(probs, "concepts.t2d.codes:")


def test_window_start_after_end(tmp_path):
    def edit(d):
        d["eligibility"]["require"][0]["window"] = [0, -1825]
        d["covariates"][3]["window"] = [-1, -5]

    probs = problems_of(tmp_path, edit)
    assert "window start 0 is after its end -1825" in one(probs, "eligibility.require[0].window:")
    assert "expected a <= b" in one(probs, "covariates[3] (hba1c).window:")


def test_windows_that_reach_past_time_zero(tmp_path):
    """A baseline window ends at time zero at the latest: a record after it lets the outcome
    enter the adjustment set or the eligibility (immortal time). Common practice in target trial
    emulation (eligibility and covariates are fixed at time zero); CONTRACTS §5a makes it an error."""
    def edit(d):
        d["covariates"][3]["window"] = [0, 400]
        d["eligibility"]["exclude"] = [{"concept": "hf_admission", "window": [0, 90]}]
        d["eligibility"]["require"][0]["window"] = [-1825, 1]
        d["outcomes"]["secondary"] = [{"measure": "hba1c", "at_day": 365, "tolerance_days": 365}]

    probs = problems_of(tmp_path, edit)
    assert "window end 400 is after day 0" in one(probs, "covariates[3] (hba1c).window:")
    assert "window end 90 is after day 0" in one(probs, "eligibility.exclude[0].window:")
    assert "window end 1 is after day 0" in one(probs, "eligibility.require[0].window:")
    msg = one(probs, "outcomes.secondary[0].tolerance_days:")
    assert "at_day - tolerance_days = 0 reaches day 0" in msg and "tolerance_days <= 364" in msg
    assert len(probs) == 4, probs


def test_windows_ending_on_time_zero_are_accepted(tmp_path):
    def edit(d):
        d["covariates"][3]["window"] = [-365, 0]
        d["outcomes"]["secondary"] = [{"measure": "hba1c", "at_day": 365, "tolerance_days": 364}]

    d = copy.deepcopy(protocol_dict())
    edit(d)
    load_protocol(write_protocol(tmp_path, d))


def test_entry_window_order(tmp_path):
    def edit(d):
        d["eligibility"]["entry"] = {"start": "2021-12-31", "end": "2016-01-01"}

    msg = one(problems_of(tmp_path, edit), "eligibility.entry:")
    assert "start 2021-12-31 is after end 2016-01-01" in msg


def test_treated_not_an_arm(tmp_path):
    msg = one(problems_of(tmp_path, lambda d: d["strategies"].update(treated="class_c")), "strategies.treated:")
    assert "expected one of the arms (class_a, class_b), got 'class_c'" in msg


def test_horizon_beyond_max_days(tmp_path):
    msg = one(problems_of(tmp_path, lambda d: d["analysis"].update(horizons_days=[365, 1200])),
              "analysis.horizons_days:")
    assert "horizon 1200 is beyond follow_up.max_days (1095)" in msg


def test_unknown_estimand(tmp_path):
    msg = one(problems_of(tmp_path, lambda d: d.update(estimands=["ATE", "ATU"])), "estimands[1]:")
    assert "expected one of ATE, ATT, ATO, got 'ATU'" in msg


def test_primary_estimate_follows_the_analysis_and_names_bad_keys(tmp_path):
    d = protocol_dict()
    d["estimands"] = ["ATT"]
    d["analysis"].update(methods=["doubly_robust", "ipw"], horizons_days=[365, 730])
    p = load_protocol(write_protocol(tmp_path, d))
    assert (p.analysis.primary.method, p.analysis.primary.estimand,
            p.analysis.primary.horizon_day) == ("doubly_robust", "ATT", 730)
    probs = problems_of(tmp_path, lambda d: d["analysis"].update(
        methods=["ipw"], primary={"method": "standardization", "estimand": "ATO",
                                  "horizon_day": 400, "measure": "x"}))
    assert "got 'standardization'" in one(probs, "analysis.primary.method:")
    assert "got 'ATO'" in one(probs, "analysis.primary.estimand:")
    assert "got 400" in one(probs, "analysis.primary.horizon_day:")
    one(probs, "analysis.primary.measure:")


@pytest.mark.parametrize("bad_id", ["Tiny_Test", "tiny test", "études", ""])
def test_bad_study_id(tmp_path, bad_id):
    msg = one(problems_of(tmp_path, lambda d: d["study"].update(id=bad_id)), "study.id:")
    assert "[a-z0-9-]+" in msg or "required" in msg


def test_all_problems_listed_at_once(tmp_path, capsys):
    def edit(d):
        d["study"]["id"] = "Bad ID"
        d["eligibility"]["entry"] = {"start": "2021-12-31", "end": "2016-01-01"}
        d["strategies"]["treated"] = "nobody"
        d["estimands"] = ["ATX"]
        d["analysis"]["horizons_days"] = [5000]
        d["covariats"] = []

    probs = problems_of(tmp_path, edit)
    starts = ("study.id:", "eligibility.entry:", "strategies.treated:", "estimands[0]:",
              "analysis.horizons_days:", "covariats:")
    for s in starts:
        one(probs, s)
    # the command lists them all too, with no traceback
    rc = cli.main(["check", "--extract", str(tmp_path / "no-extract"), "--protocol", str(tmp_path / "protocol.yaml")])
    err = capsys.readouterr().err
    assert rc == 2 and "Traceback" not in err
    assert all(s in err for s in starts)


def test_defaults_filled(tmp_path):
    d = protocol_dict()
    d.pop("analysis")
    d["strategies"].pop("washout_days")
    p = load_protocol(write_protocol(tmp_path, d))
    a = p.as_dict()
    # the defaults written in CONTRACTS §3
    assert a["estimands"] == ["ATE", "ATT"]
    assert a["contrasts"] == ["intention_to_treat"]
    assert a["strategies"]["washout_days"] == 365
    assert a["strategies"]["same_day"] == "exclude"
    assert a["analysis"]["horizons_days"] == [365, 730, 1095]
    assert a["analysis"]["methods"] == ["ipw", "standardization", "doubly_robust"]
    assert a["analysis"]["bootstrap"] == {"replicates": 200, "seed": 20261201, "interval": "wald",
                                         "kind": "multinomial"}
    assert a["analysis"]["weights"] == {"stabilize": True, "truncate": None}
    assert a["analysis"]["propensity"] == {"model": "logistic", "continuous": "spline"}
    assert a["analysis"]["period_days"] == 30 and a["analysis"]["smd_threshold"] == 0.1
    assert a["report"]["min_cell"] == 5
    # the primary estimate: first method and estimand at the last horizon (issue 19)
    assert a["analysis"]["primary"] == {"method": "ipw", "estimand": "ATE", "horizon_day": 1095}
    assert a["concepts"]["t2d"]["match"] == "prefix"
    assert a["concepts"]["death"]["source"] == "deaths"
    assert a["follow_up"] == {"max_days": 1095, "administrative_end": "2022-12-31"}
    assert a["eligibility"]["entry_start"] == "2016-01-01"
    kinds = {c["name"]: (c["kind"], c["missing"]) for c in a["covariates"]}
    assert kinds == {"age": ("continuous", "indicator"), "sex": ("categorical", "indicator"),
                     "region": ("categorical", "indicator"), "hba1c": ("continuous", "indicator")}
    assert "text" not in a
    yaml.safe_dump(a)  # plain types only
    assert p.eligibility.entry_start == dt.date(2016, 1, 1)


def test_nonsense_shapes_give_problems_not_crashes():
    for data in (None, [1, 2], "text", {"extract_columns": ["a"]}, {"study": "x", "concepts": [1]},
                 {"concepts": {"a": {"source": "diagnoses", "codes": ["A"], "where": {"s": {"x": 1}}}}}):
        with pytest.raises(ProtocolError) as info:
            parse_protocol(data)
        assert info.value.problems
        assert all(not p.startswith(":") for p in info.value.problems)


def test_not_yaml_and_missing_file(tmp_path):
    (tmp_path / "bad.yaml").write_text("study: [unclosed\n")
    with pytest.raises(ProtocolError, match="not valid YAML"):
        load_protocol(tmp_path / "bad.yaml")
    with pytest.raises(ProtocolError, match="does not exist"):
        load_protocol(tmp_path / "none.yaml")
