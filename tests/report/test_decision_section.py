"""The report's decision and subgroup sections read decision.csv and the subgroup rows as they
are: the NNT wording follows Altman (1998, BMJ 317:1309), "NNTB x to ∞ to NNTH y" when the
interval of the difference includes no effect, each rounded up to whole persons (common
practice); the rest is hand-checked text."""

from __future__ import annotations

import numpy as np
import pandas as pd
from decision_example import PROTOCOL, REPS, ROWS

from emulant.estimation.decision import decision_table
from emulant.report.decision import _nnt, decision_context, subgroup_context


def test_nnt_words():
    assert _nnt(20.0, 12.5, 50.0) == ("NNTB 20", "NNTB 13 to NNTB 50")
    assert _nnt(-100.0, 100.0, -100 / 3) == ("NNTH 100", "NNTB 100 to ∞ to NNTH 34")
    assert _nnt(-28.6, -50.0, -20.0) == ("NNTH 29", "NNTH 50 to NNTH 20")
    assert _nnt(float("inf"), 10.0, -10.0)[0] == "∞"


def test_decision_context_reads_the_file():
    dec = decision_table(ROWS, REPS, PROTOCOL, "wald")
    ctx = decision_context(dec, PROTOCOL)
    assert ctx["horizon"] == "365" and [x["outcome"] for x in ctx["loss"]] == ["event", "death"]
    (row,) = ctx["rows"]
    assert row["combo"] == "ATE, inverse probability weighting"
    assert [a["loss"] for a in row["arms"]] == ["0.235", "0.250"]
    assert [a["p_lowest"] for a in row["arms"]] == ["50%", "50%"]
    assert row["difference"] == "−0.0150"
    assert {(n["outcome"], n["nnt"]) for n in ctx["nnts"]} == {("event", "NNTB 20"),
                                                               ("death", "NNTH 100")}
    assert ctx["svg"].startswith("<svg")
    assert decision_context(dec.iloc[0:0], PROTOCOL) is None


def test_subgroup_context_lists_levels_differences_and_the_unestimable():
    from dataclasses import replace

    from emulant.protocol import Subgroup

    p = replace(PROTOCOL, subgroups=(Subgroup("sex"),))
    base = {"outcome": "event", "estimand": "ATE", "method": "ipw", "measure": "risk_difference",
            "horizon_day": 1095, "arm": "drug_a", "comparator": "drug_b"}
    overall = pd.DataFrame([{**base, "estimate": -0.05, "ci_low": -0.08, "ci_high": -0.02}])
    sub = pd.DataFrame([{**base, "subgroup": "sex=F", "estimate": -0.07, "ci_low": -0.1, "ci_high": -0.04},
                        {**base, "subgroup": "sex=M", "estimate": -0.03, "ci_low": -0.06, "ci_high": 0.0},
                        {**base, "subgroup": "sex=M minus sex=F", "estimate": 0.04,
                         "ci_low": -0.01, "ci_high": 0.09}])
    account = [{"subgroup": "sex=X", "estimable": False, "reason": "fewer than 5 persons in arm(s) drug_a"}]
    ctx = subgroup_context(sub, overall, account, p)
    (panel,) = ctx["panels"]
    assert [r["subgroup"] for r in panel["rows"]] == ["sex=F", "sex=M", "sex=M minus sex=F"]
    assert [r["between"] for r in panel["rows"]] == [False, False, True]
    assert ctx["not_estimable"] == [{"subgroup": "sex=X", "reason": account[0]["reason"]}]
    assert np.isclose(float(panel["rows"][2]["estimate"]), 0.04)
