"""The answer first: the at-a-glance panel, the forest plot rows and the compact estimates table.

The fixture results files are the invented ones of ``test_report.py``; the expected strings are
hand computation from those files (e.g. a risk difference of 0.04217 is +4.2 percentage points).
Each check also reads the value back from ``estimates.csv``, so a number recomputed anywhere but
the results file would fail.
"""

from __future__ import annotations

import re

import pandas as pd
import pytest
from test_report import COMPARISON, MANIFEST, _parse, _protocol, write_results

from emulant import columns as col
from emulant.protocol import parse_protocol
from emulant.report import build_context, render_report
from emulant.report.compact import compact_tables
from emulant.report.forest import forest_rows


@pytest.fixture(scope="module")
def page(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("glance")
    protocol = _protocol(tmp)
    write_results(tmp / "results")
    html = render_report(tmp / "results", protocol, tmp / "r.html", MANIFEST,
                         COMPARISON).read_text(encoding="utf-8")
    return tmp, protocol, html


def test_glance_sits_under_the_cautions_with_the_primary_estimate(page):
    tmp, protocol, html = page
    assert html.index('class="cautions"') < html.index('id="glance"') < html.index("<nav")
    # default primary: first method (ipw) and estimand (ATE) at the last horizon (1095)
    p = protocol.analysis.primary
    assert (p.method, p.estimand, p.horizon_day) == ("ipw", "ATE", 1095)
    est = pd.read_csv(tmp / "results" / "estimates.csv")
    rd = est[(est.method == "ipw") & (est.estimand == "ATE") & (est.measure == "risk_difference")
             & (est.outcome == "admission")].iloc[0]
    pp = f"{100 * rd.estimate:+.1f}".replace("-", "−")
    lo, hi = (f"{100 * v:+.1f}".replace("-", "−") for v in (rd.ci_low, rd.ci_high))
    glance = html[html.index('id="glance"'):html.index("<nav")]
    assert f"a difference of {pp} percentage points (95% CI {lo} to {hi})" in glance
    assert "+4.2 percentage points (95% CI −19.0 to +27.0)" in glance  # by hand
    assert "a risk ratio of 1.14 (95% CI 0.61 to 2.11)" in glance
    assert "60 persons: 30 started class_a (treated), 30 started class_b" in glance


def test_glance_diagnostics_match_the_warnings(page):
    _, _, html = page
    glance = html[html.index('id="glance"'):html.index("<nav")]
    states = {name: state for state, name in re.findall(
        r'<span class="state">([a-z ]+)</span> <a href="#[^"]+">([^<]+)</a>', glance)
        if state != "see"}
    assert "3 more warning(s)" in glance  # few events; a ratio not estimable; a failed replicate
    # lab's weighted SMD 0.15 > 0.1; ESS 26.5 < 100; coverage end 6/30 vs 8/30 (6.7 pp <= 10);
    # fracture's adjusted intervals 0.80 to 1.38 include 1
    assert states == {"Balance": "failed", "Positivity": "failed", "Censoring": "passed",
                      "Negative controls": "passed"}
    ids = _parse(html).ids
    for target in re.findall(r'<a href="#([^"]+)">', glance):
        assert target in ids, target


def test_censoring_gap_flags_differential_censoring(tmp_path):
    protocol = _protocol(tmp_path)
    write_results(tmp_path / "results")
    cohort = pd.read_parquet(tmp_path / "results" / "cohort.parquet")
    reason = col.end_reason("admission")
    # class_a: 18 of 30 end at coverage end (60%), class_b 8 of 30 (26.7%): 33 pp apart
    idx = cohort.index[(cohort.arm == "class_a") & (cohort[reason] == "max_follow_up")]
    cohort.loc[idx, [reason, "end_reason"]] = "coverage_end"
    cohort.to_parquet(tmp_path / "results" / "cohort.parquet", index=False)
    ctx = build_context(tmp_path / "results", protocol)
    diag = {d["name"]: d["state"] for d in ctx["glance"]["diagnostics"]}
    assert diag["Censoring"] == "failed"
    assert any(w["section"] == "assumption-censoring" for w in ctx["warnings"])


def test_forest_rows_mark_the_primary_and_put_the_crude_apart(page):
    tmp, protocol, _ = page
    est = pd.read_csv(tmp / "results" / "estimates.csv", dtype={"estimand": str})
    rows = forest_rows(est, protocol, ["admission"])
    prim = [r for r in rows if r["primary"]]
    assert len(prim) == 1
    assert (prim[0]["method"], prim[0]["estimand"], prim[0]["horizon"]) == ("ipw", "ATE", 1095)
    assert prim[0]["abs"][0] == pytest.approx(0.04217) and prim[0]["rel"][0] == pytest.approx(1.137)
    assert len(rows) == 6 and not any(r["crude"] for r in rows)  # 2 estimands x 3 methods
    crude_rd = {"outcome": "admission", "contrast": "intention_to_treat", "estimand": None,
                "method": "unadjusted", "measure": "risk_difference", "horizon_day": 1095,
                "arm": "class_a", "comparator": "class_b", "estimate": 0.1, "ci_low": -0.1,
                "ci_high": 0.3}
    rows = forest_rows(pd.concat([pd.DataFrame([crude_rd]), est]), protocol, ["admission"])
    crude = [i for i, r in enumerate(rows) if r["crude"]]
    assert crude == [6] and rows[6]["abs"] == (0.1, -0.1, 0.3)  # drawn apart, last
    nc = forest_rows(est, protocol, ["fracture"])
    assert len(nc) == 6 and not any(r["primary"] for r in nc)
    assert all(r["abs"] is None and r["rel"][1:] == (0.80, 1.38) for r in nc)


def test_another_primary_moves_the_mark(tmp_path):
    protocol = _protocol(tmp_path)
    data = protocol.as_dict()
    write_results(tmp_path / "results")
    import yaml

    raw = yaml.safe_load((tmp_path / "protocol.yaml").read_text())
    raw["analysis"]["primary"] = {"method": "doubly_robust", "estimand": "ATT",
                                  "horizon_day": 1095}
    p2 = parse_protocol(raw, tmp_path)
    assert data["analysis"]["primary"]["method"] == "ipw"
    est = pd.read_csv(tmp_path / "results" / "estimates.csv", dtype={"estimand": str})
    prim = [r for r in forest_rows(est, p2, ["admission"]) if r["primary"]]
    assert [(r["method"], r["estimand"]) for r in prim] == [("doubly_robust", "ATT")]
    html = render_report(tmp_path / "results", p2, tmp_path / "r.html").read_text()
    assert "pre-specified: doubly robust (AIPW), ATT, day 1095" in html


def test_compact_table_reads_every_value_from_estimates(page):
    tmp, protocol, html = page
    est = pd.read_csv(tmp / "results" / "estimates.csv", dtype={"estimand": str})
    tables = {t["outcome"]: t for t in compact_tables(est, protocol)}
    adm = tables["admission"]
    assert [c["title"] for c in adm["columns"]] == ["day 1095", "whole follow-up"]
    row = next(r for r in adm["rows"] if r["estimand"] == "ATE" and r["method"] == "IPW")
    # sub-columns: risk class_a, risk class_b, difference (pp), ratio
    assert row["cells"][2] == {"value": "+4.2", "ci": "−19.0 to +27.0"}
    assert row["cells"][3] == {"value": "1.14", "ci": "0.61 to 2.11"}
    assert row["cells"][4] == {"value": "", "ci": ""}  # no adjusted hazard ratio in the fixture
    crude = adm["rows"][0]
    assert crude["estimand"] == "—" and crude["cells"][0]["value"] == "40.0%"  # 0.40 as percent
    assert crude["cells"][0]["ci"] == "25.0% to 57.0%"
    assert crude["cells"][4] == {"value": "not estimable", "ci": ""}  # its hazard ratio
    # the compact table is in the page, the tidy table folded in <details>
    assert 'class="compact"' in html
    folded = re.search(r'<details class="fold" id="estimates-full">(.*?)</details>', html, re.S)
    assert folded and "E-value (point; CI limit)" in folded.group(1)


def test_appendices_are_folded(page):
    _, _, html = page
    for sid in ("protocol", "codelists"):
        sec = html[html.index(f'<section id="{sid}"'):]
        sec = sec[:sec.index("</section>")]
        assert '<details class="fold">' in sec and "<summary>" in sec
    assert "primary:" in html  # the new key in the protocol as parsed


def test_measured_primary_outcome_reads_as_a_mean_difference():
    # the committed example with a measured primary outcome; invented estimates rows
    from pathlib import Path

    from emulant.protocol import load_protocol
    from emulant.report.glance import primary_estimate

    root = Path(__file__).resolve().parents[2]
    p = load_protocol(root / "config" / "protocols" / "measured-primary.yaml")
    treated, comparator = p.strategies.treated, p.strategies.comparator
    base = {"outcome": "marker", "contrast": "intention_to_treat", "estimand": "ATE",
            "method": "ipw", "horizon_day": None, "comparator": "", "ci_low": None,
            "ci_high": None}
    est = pd.DataFrame([{**base, "measure": "mean", "arm": treated, "estimate": -1.25},
                        {**base, "measure": "mean", "arm": comparator, "estimate": 0.5},
                        {**base, "measure": "mean_difference", "arm": treated,
                         "comparator": comparator, "estimate": -1.75, "ci_low": -2.5,
                         "ci_high": -1.0}])
    s = primary_estimate(est, p)["sentence"]
    assert s.startswith("In the whole eligible population (ATE), by inverse probability")
    assert f"the mean change in marker from baseline at day 365 was −1.25 under {treated}" in s
    assert "a difference of −1.75 (95% CI −2.50 to −1.00)." in s
