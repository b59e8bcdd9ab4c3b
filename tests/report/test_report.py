"""The rendered report: structure, self-containment, escaping, disclosure, the design report.

Fixture results files are small invented tables written here (hand-made; the expected counts in
the disclosure checks are hand computation). The HTML is checked with the standard library's
``html.parser`` (an outside, general-purpose parser).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from emulant import columns as col
from emulant.protocol import load_protocol
from emulant.report import build_context, render_report
from emulant.report.pdf import find_chromium

PROTOCOL = """
study:
  id: report-fixture
  title: Class A versus class B and admission (fixture)
  question: Does starting class A rather than class B change the risk of admission?
  target_trial:
    eligibility: Adults with condition D, no prior admission.
    strategies: Start class A, or start class B.
    assignment: Randomised, open label.
    follow_up: From assignment for three years.
    outcome: First admission.
    contrast: Intention-to-treat effect.
    analysis: Risk difference and ratio at each horizon.
concepts:
  class_a: {source: dispensings, codes: codelists/class_a.csv}
  class_b: {source: dispensings, codes: [RXB1]}
  cond_d: {source: diagnoses, codes: [DX1]}
  admission: {source: diagnoses, codes: [AD1]}
  fracture: {source: diagnoses, codes: [FX7]}
  mi: {source: diagnoses, codes: [MI1]}
  lab: {source: measurements, codes: [LB1]}
eligibility:
  entry: {start: 2016-01-01, end: 2021-12-31}
  age: {min: 40, max: 85}
  require: [{concept: cond_d, window: [-1825, 0]}]
strategies:
  arms: {class_a: {initiate: class_a}, class_b: {initiate: class_b}}
  treated: class_a
follow_up: {max_days: 1095, administrative_end: 2022-12-31}
outcomes:
  primary: admission
  competing: [death]
  negative_controls: [fracture]
covariates:
  - {name: age, builtin: age}
  - {name: region, attribute: region, kind: categorical}
  - {name: prior_mi, concept: mi, window: [-1825, -1], summary: any}
  - {name: lab, concept: lab, window: [-365, 0], summary: last}
estimands: [ATE, ATT]
analysis:
  horizons_days: [365, 1095]
  bootstrap: {replicates: 20, seed: 7}
report: {min_cell: 5}
"""

SCRIPT = "<script>alert('x')</script>"
DISTINCT_RD = 0.04217  # an estimate value that must never reach the design report


def _protocol(tmp: Path):
    (tmp / "codelists").mkdir(parents=True, exist_ok=True)
    (tmp / "codelists" / "class_a.csv").write_text(
        f'code,description\nRXA1,"Class A tablet {SCRIPT}"\nRXA2,Class A other\n',
        encoding="utf-8")
    (tmp / "protocol.yaml").write_text(PROTOCOL, encoding="utf-8")
    return load_protocol(tmp / "protocol.yaml")


def _cohort() -> pd.DataFrame:
    """30 persons per arm; region 'east' holds 3 persons of class_a (the disclosure case)."""
    rng = np.random.default_rng(1)
    n = 30
    arm = ["class_a"] * n + ["class_b"] * n
    region = (["north"] * 15 + ["south"] * 12 + ["east"] * 3
              + ["north"] * 14 + ["south"] * 16)
    reasons = (["outcome"] * 12 + ["coverage_end"] * 6 + ["max_follow_up"] * 12
               + ["outcome"] * 9 + ["coverage_end"] * 8 + ["competing"] * 2
               + ["max_follow_up"] * 11)
    lab_missing = np.r_[np.zeros(26), np.ones(4), np.zeros(30)].astype(int)
    df = pd.DataFrame({
        "person_id": np.arange(2 * n), "arm": arm,
        "treated": [1] * n + [0] * n,
        "time_zero": pd.Timestamp("2018-01-01"),
        "age": rng.normal(62, 8, 2 * n).round(),
        "region": region, col.missing_flag("region"): 0,
        "prior_mi": ([1] * 10 + [0] * 20) * 2,
        "lab": rng.normal(7.5, 1.0, 2 * n), col.missing_flag("lab"): lab_missing,
        "end_day": rng.integers(30, 1095, 2 * n), "end_reason": reasons,
    })
    df[col.end_day("admission")] = df["end_day"]
    df[col.end_reason("admission")] = df["end_reason"]
    return df


def write_results(d: Path, with_outcomes: bool = True) -> None:
    """Every results file of CONTRACTS §4, invented and small."""
    d.mkdir(parents=True, exist_ok=True)
    (d / "extract_check.json").write_text(json.dumps({
        "extract": "extract/",
        "tables": {
            "persons": {"file": "persons.parquet", "sha256": "a" * 64, "rows": 500,
                        "columns": ["person_id", "birth_date", "sex", "region"],
                        "date_min": "1930-01-01", "date_max": "1980-12-31"},
            "deaths": {"file": "deaths.csv", "sha256": "b" * 64, "rows": 3,
                       "columns": ["person_id", "date"], "date_min": "2017-01-01",
                       "date_max": "2022-01-01"},
        },
        "implausible": {"diagnoses": {"before_birth": 2, "after_death": 0,
                                      "examples": [{"person_id": 99, "date": "1901-01-01"}]}},
        "warnings": ["administrative_end is later than the last dispensings date"],
    }))
    pd.DataFrame({
        "step": ["persons", "initiated", "same_day", "age", "require:cond_d"],
        "description": ["every person", "first initiation in the window", "same-day starts",
                        "age 40-85", "condition D in the 5 years before"],
        "remaining": [500, 120, 117, 90, 60],
        "excluded": [0, 380, 3, 27, 30],
    }).to_csv(d / "attrition.csv", index=False)
    cohort = _cohort()
    cohort.to_parquet(d / "cohort.parquet", index=False)
    w = pd.DataFrame({"person_id": cohort["person_id"], "arm": cohort["arm"],
                      "propensity": np.linspace(0.2, 0.8, len(cohort)),
                      "weight_ATE": 1.0, "weight_ATT": 1.0})
    w.to_parquet(d / "weights.parquet", index=False)
    rows = []
    for est in ("ATE", "ATT"):
        for cov, lvl, before, after in (("age", "", 0.05, 0.01), ("region", "north", 0.02, 0.01),
                                        ("region", "south", -0.2, 0.03),
                                        ("region", "east", 0.45, 0.02),
                                        ("prior_mi", "", 0.0, 0.0), ("lab", "", 0.3, 0.15),
                                        ("lab_missing", "", 0.52, 0.04)):
            rows.append({"covariate": cov, "level": lvl, "estimand": est, "mean_treated": 0.5,
                         "mean_comparator": 0.4, "smd_unweighted": before,
                         "smd_weighted": after, "variance_ratio": None})
    pd.DataFrame(rows).to_csv(d / "balance.csv", index=False)
    (d / "positivity.json").write_text(json.dumps({
        "n": {"class_a": 30, "class_b": 30},
        "propensity_bins": {"edges": [i / 20 for i in range(21)],
                            "counts": {"class_a": [0] * 4 + [3, 5, 6, 4, 6, 6] + [0] * 10,
                                       "class_b": [0] * 4 + [6, 6, 4, 6, 5, 3] + [0] * 10}},
        "c_statistic": 0.61,
        "extreme": {"low": 0.05, "high": 0.95, "n": 0, "share": 0.0},
        "weights": {est: {"mean": {"class_a": 1.0, "class_b": 1.0}, "min": 0.6, "max": 2.4,
                          "largest": [2.4, 2.2, 2.0], "top1pct_share": 0.04,
                          "ess": {"class_a": 26.5, "class_b": 27.1}, "truncated": False}
                    for est in ("ATE", "ATT")},
        "model": {"converged": True, "penalized": False, "warnings": [],
                  "columns": ["age", "region: south", "region: east", "prior_mi", "lab"]},
    }))
    if not with_outcomes:
        return
    est = []

    def add(**kw):
        base = {"outcome": "admission", "contrast": "intention_to_treat", "estimand": "",
                "method": "unadjusted", "horizon_day": 1095, "arm": "class_a",
                "comparator": "", "ci_low": None, "ci_high": None, "se": None, "n": None,
                "events": None}
        base.update(kw)
        est.append(base)

    add(measure="risk", estimate=0.40, ci_low=0.25, ci_high=0.57, n=30, events=12)
    add(measure="risk", arm="class_b", estimate=0.30, ci_low=0.16, ci_high=0.48, n=30, events=9)
    for e in ("ATE", "ATT"):
        for meth in ("ipw", "standardization", "doubly_robust"):
            add(estimand=e, method=meth, measure="risk_difference", comparator="class_b",
                estimate=DISTINCT_RD, ci_low=-0.19, ci_high=0.27, se=0.117)
            add(estimand=e, method=meth, measure="risk_ratio", comparator="class_b",
                estimate=1.137, ci_low=0.61, ci_high=2.11, se=0.31)
            add(estimand=e, method=meth, measure="e_value", comparator="class_b",
                estimate=1.53, ci_low=1.0)
            add(estimand=e, method=meth, measure="risk_ratio", comparator="class_b",
                outcome="fracture", estimate=1.05, ci_low=0.80, ci_high=1.38, se=0.14)
    add(measure="hazard_ratio", horizon_day=None, comparator="class_b", estimate=None, n=60,
        events=21, note="not estimable: no events in the treated arm")
    pd.DataFrame(est).to_csv(d / "estimates.csv", index=False)
    cv = []
    for e, meth in (("", "unadjusted"), ("ATE", "ipw"), ("ATE", "doubly_robust"), ("ATT", "ipw")):
        for arm, slope in (("class_a", 0.4), ("class_b", 0.3)):
            for day in range(0, 1096, 15):
                cv.append({"contrast": "intention_to_treat", "estimand": e, "method": meth,
                           "arm": arm, "day": day, "risk": slope * day / 1095,
                           "ci_low": max(0.0, slope * day / 1095 - 0.1),
                           "ci_high": slope * day / 1095 + 0.1,
                           "at_risk": max(0, 30 - day // 40)})
    pd.DataFrame(cv).to_csv(d / "curves.csv", index=False)
    (d / "bootstrap.json").write_text(json.dumps({
        "requested": 20, "completed": 19, "failed": 1, "failures": ["replicate 4: singular"],
        "seed": 7, "interval": "wald", "workers": 2,
        "non_estimable": [{"outcome": "admission", "contrast": "intention_to_treat",
                           "estimand": "ATE", "method": "ipw", "measure": "risk_ratio",
                           "horizon_day": 1095, "arm": "class_a", "comparator": "class_b",
                           "replicates": 2, "of": 19}]}))


MANIFEST = {"stamp": "20261201T120000Z", "study_id": "report-fixture",
            "started": "2026-12-01T12:00:00Z", "finished": "2026-12-01T12:03:00Z",
            "code_version": "0.1.0+g1234567", "packages": {"pandas": "2.3.3", "numpy": "2.4.6"},
            "protocol_sha256": "c" * 64, "inputs": [{"path": "extract/persons.parquet",
                                                     "sha256": "a" * 64}],
            "seeds": {"bootstrap": 7}, "previous_stamp": "20261130T120000Z"}
COMPARISON = {"previous_stamp": "20261130T120000Z",
              "changed_inputs": [{"name": "diagnoses.parquet", "previous_sha256": "d" * 64,
                                  "sha256": "e" * 64}],
              "attrition": [{"step": "persons", "previous": 480, "current": 500},
                            {"step": "same_day", "previous": 2, "current": 3}],
              "estimates": [{"outcome": "admission", "estimand": "ATE", "method": "ipw",
                             "measure": "risk_difference", "horizon_day": 1095,
                             "arm": "class_a", "comparator": "class_b", "previous": 0.05,
                             "current": DISTINCT_RD, "shift": -0.008, "shift_in_se": -0.07}],
              "protocol_diff": "--- previous\n+++ current\n-  max_days: 730\n+  max_days: 1095\n"}

SECTION_IDS = ("question", "warnings", "disclosure", "target-trial", "provenance", "attrition",
               "baseline", "positivity", "results", "assumptions", "target-checklist",
               "since-previous", "manifest", "protocol", "codelists")


class Page(HTMLParser):
    """Collects ids, links, tags and the text of table cells by row."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.ids, self.links, self.tags, self.rows = set(), [], [], []
        self._row: list[str] | None = None
        self._cell: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        a = dict(attrs)
        if "id" in a:
            self.ids.add(a["id"])
        for k in ("src", "href", "xlink:href", "action", "data", "poster"):
            if k in a:
                self.links.append(a[k])
        if tag == "tr":
            self._row = []
        if tag in ("td", "th") and self._row is not None:
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None and self._row is not None:
            self._row.append("".join(self._cell).strip())
            self._cell = None
        if tag == "tr" and self._row is not None:
            self.rows.append(self._row)
            self._row = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def _parse(html: str) -> Page:
    p = Page()
    p.feed(html)
    p.close()
    return p


@pytest.fixture(scope="module")
def full(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("report")
    protocol = _protocol(tmp)
    write_results(tmp / "results")
    out = render_report(tmp / "results", protocol, tmp / "report.html", MANIFEST, COMPARISON)
    return tmp, protocol, out.read_text(encoding="utf-8")


def test_every_section_present_and_parses(full):
    _, _, html = full
    page = _parse(html)
    for sid in SECTION_IDS:
        assert sid in page.ids, sid
    # each section in the order issue 7 lists (warnings near the top, manifest last of the body)
    pos = [html.index(f'id="{sid}"') for sid in SECTION_IDS]
    assert pos == sorted(pos)
    assert "svg" in page.tags and "script" not in page.tags


def test_no_external_references(full):
    _, _, html = full
    page = _parse(html)
    assert page.links, "the contents links should be found"
    for link in page.links:
        assert link.startswith("#"), link
    assert not re.search(r"(?:https?:|file:|ftp:)//", html)
    assert "@import" not in html and "url(" not in re.sub(r"url\(#[^)]+\)", "", html)


def test_code_description_with_script_is_inert(full):
    _, _, html = full
    assert "<script" not in html.lower()
    assert "&lt;script&gt;alert(" in html  # shown as text in the code-list appendix


def test_small_category_suppressed_with_complement(full):
    # hand computation: class_a region = north 15, south 12, east 3 (n = 30)
    _, _, html = full
    page = _parse(html)
    rows = {r[0]: r for r in page.rows if r and r[0] in ("north", "south", "east")}
    assert rows["east"][1] == "<5"
    a_cells = [rows[k][1] for k in ("north", "south", "east")]
    shown = [int(re.match(r"([\d,]+)", c).group(1)) for c in a_cells
             if re.match(r"\d", c)]
    assert len(shown) <= 1, a_cells  # two cells hidden: 30 - 15 leaves 15, not 3
    assert "—" in a_cells
    assert "10.0%" not in " ".join(a_cells)  # 3/30
    assert "(12" not in rows["south"][1] and "(40.0%)" not in rows["south"][1]
    # the unweighted SMD of the hidden level is not shown (it would give the proportion back)
    assert rows["east"][3] == "hidden"
    # attrition: 3 same-day exclusions shown as <5, and 117 (= 120 - 3) is not printed there
    att = [r for r in page.rows if r and r[0] == "same_day"]
    assert att[0][2] == "<5" and att[0][3] != "117"
    assert ">117<" not in html
    # the deaths table has 3 rows: suppressed too
    deaths = [r for r in page.rows if r and r[0] == "deaths"]
    assert deaths[0][2] == "<5"


def test_warnings_and_negative_control(full):
    _, _, html = full
    page = _parse(html)
    assert 'class="warn"' in html
    assert "Small effective sample size" in html  # ESS 26.5 < 100
    assert "Imbalance after ATE weighting" in html  # lab: weighted SMD 0.15 > 0.1
    assert "Few events: fewer than 10 primary-outcome events in class_b" in html
    assert "1 of 20 replicates failed" in html
    assert "the interval includes the null" in html  # fracture RR 0.80 to 1.38
    assert any(r and r[0] == "coverage end" for r in page.rows)
    assert "Protocol amendment" in html and "diagnoses.parquet" in html


def test_a_ratio_without_estimate_says_why(full):
    # a ratio with no events in an arm has no finite estimate (Heinze & Schemper 2001): the
    # table says "not estimable" with the reason from estimates.csv, the warnings panel names
    # it, and the bootstrap section counts the replicates left out of an interval
    _, _, html = full
    page = _parse(html)
    hr = [r for r in page.rows if len(r) > 4 and r[1].endswith("hazard ratio")]
    assert hr and hr[0][4] == "not estimable: no events in the treated arm"
    assert "admission: 1 estimate(s) (hazard_ratio) not estimable: no events in the treated arm." in html
    assert "admission, ATE, ipw, risk_ratio, day 1,095: 2 of 19 replicates not estimable" in html


def _threatened(html: str, aid: str) -> bool:
    start = html.index(f'id="assumption-{aid}"')
    return "threatened in this run" in html[start:html.index("</article>", start)]


def _render_with(tmp_path, nc_low: float, extreme_n: int, method: str) -> str:
    """The fixture's results with one negative-control ratio and the extreme-score count edited."""
    res = tmp_path / "results"
    write_results(res)
    est = pd.read_csv(res / "estimates.csv")
    row = est[est.outcome == "fracture"].iloc[[0]].assign(
        method=method, estimand="" if method == "unadjusted" else "ATE", ci_low=nc_low,
        ci_high=nc_low + 0.5, estimate=nc_low + 0.2)
    pd.concat([est[est.outcome != "fracture"], row]).to_csv(res / "estimates.csv", index=False)
    bal = pd.read_csv(res / "balance.csv")
    bal.assign(smd_weighted=0.01).to_csv(res / "balance.csv", index=False)  # balanced
    pos = json.loads((res / "positivity.json").read_text())
    pos["n"] = {"class_a": 10893, "class_b": 10893}
    pos["extreme"].update(n=extreme_n, share=extreme_n / 21786)
    for w in pos["weights"].values():
        w["ess"] = {"class_a": 9000.0, "class_b": 9500.0}
    (res / "positivity.json").write_text(json.dumps(pos))
    protocol = _protocol(tmp_path)
    return render_report(res, protocol, tmp_path / "r.html", MANIFEST, COMPARISON).read_text()


def test_diagnostics_do_not_cry_wolf(tmp_path):
    # one person in 21,786 with an extreme propensity, and an unadjusted negative-control
    # interval that excludes the null (the crude comparison is confounded by design): neither
    # threatens an assumption, and the warnings panel says nothing of them. A negative control
    # speaks through the adjusted estimates (Lipsitch, Tchetgen Tchetgen & Cohen 2010); the
    # positivity rule (more than 1% extreme, or the top 1% carrying over 10% of the weight) is
    # our choice, stated in the report's code.
    html = _render_with(tmp_path / "calm", nc_low=1.2, extreme_n=1, method="unadjusted")
    assert not _threatened(html, "positivity") and not _threatened(html, "exchangeability")
    assert "Extreme propensity scores" not in html and "Negative control fracture" not in html
    # 2% extreme and an adjusted interval excluding the null: both warned, both threatened
    html = _render_with(tmp_path / "alarm", nc_low=1.2, extreme_n=436, method="ipw")
    assert _threatened(html, "positivity") and _threatened(html, "exchangeability")
    warn = html[html.index('id="warnings"'):html.index("</section>", html.index('id="warnings"'))]
    assert "Extreme propensity scores: 436 persons (2.0%, above 1% of the cohort)" in warn
    assert "Negative control fracture (ATE, inverse probability weighting, risk ratio)" in warn


def test_render_is_deterministic(full, tmp_path):
    tmp, protocol, html = full
    again = render_report(tmp / "results", protocol, tmp_path / "again.html", MANIFEST,
                          COMPARISON).read_text(encoding="utf-8")
    assert again == html


def test_design_report_holds_no_outcome(tmp_path):
    protocol = _protocol(tmp_path)
    write_results(tmp_path / "results")
    # an unreadable outcome file proves the design report never opens it
    (tmp_path / "results" / "estimates.csv").write_text("not,a\n\"broken", encoding="utf-8")
    out = render_report(tmp_path / "results", protocol, tmp_path / "design.html", MANIFEST,
                        COMPARISON, design=True)
    html = out.read_text(encoding="utf-8")
    page = _parse(html)
    assert {"baseline", "positivity", "attrition"} <= page.ids
    assert not {"results", "since-previous"} & page.ids
    assert f"{DISTINCT_RD:.4f}"[:5] not in html and "0.0422" not in html
    for word in ("Cumulative risk", "End of follow-up,", "Numbers at risk", "E-value",
                 "coverage end", "max follow up", "Few events", "replicates completed"):
        assert word not in html, word
    ctx = build_context(tmp_path / "results", protocol, design=True)
    assert ctx["estimates"] is None and ctx["curves"] is None and ctx["censoring"] is None


def test_missing_files_say_not_produced(tmp_path):
    protocol = _protocol(tmp_path)
    (tmp_path / "results").mkdir()
    html = render_report(tmp_path / "results", protocol, tmp_path / "r.html").read_text()
    assert html.count("Not produced in this run") >= 5
    page = _parse(html)
    assert "target-trial" in page.ids and "assumptions" in page.ids


CHROMIUM = find_chromium()
GEOMETRY = """<script>window.addEventListener("load", () => {
  const o = {};
  for (const [k, sel] of Object.entries(%s)) {
    const e = document.querySelector(sel);
    if (e) { const r = e.getBoundingClientRect(); o[k] = [r.top, r.bottom, r.width]; }
  }
  const p = document.createElement("pre"); p.id = "geometry-out";
  p.textContent = JSON.stringify(o); document.body.appendChild(p);
});</script>"""
FIRST_SCREEN = {"glance": "#glance", "answer": "#glance .answer", "checks": "#glance ul.checks",
                "forest": "#forest"}


def _chromium(*args: str, profile: Path) -> subprocess.CompletedProcess:
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           "--no-first-run", f"--user-data-dir={profile}", "--enable-logging=stderr", "--v=0",
           *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=180)


@pytest.mark.skipif(CHROMIUM is None, reason="chromium not installed")
def test_headless_chromium_renders_without_console_errors(full, tmp_path):
    _, _, html = full
    page = tmp_path / "page.html"
    page.write_text(html, encoding="utf-8")
    png = tmp_path / "page.png"
    res = _chromium(f"--screenshot={png}", "--window-size=1280,800", page.as_uri(),
                    profile=tmp_path / "profile")
    assert res.returncode == 0, res.stderr[-2000:]
    assert png.is_file() and png.stat().st_size > 10_000
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    console = [ln for ln in res.stderr.splitlines() if "CONSOLE" in ln]
    assert not console, console
    keep = os.environ.get("EMULANT_KEEP_SCREENSHOT")
    if keep:
        shutil.copy(png, keep)


@pytest.mark.skipif(CHROMIUM is None, reason="chromium not installed")
def test_first_screen_holds_the_answer_and_the_forest_plot(full, tmp_path):
    # Layout measured by the browser at 1280x800: a copy of the page with a measuring script
    # (the report itself has none), read back with --dump-dom.
    _, _, html = full
    probe = tmp_path / "probe.html"
    probe.write_text(html.replace("</body>", GEOMETRY % json.dumps(FIRST_SCREEN) + "</body>"),
                     encoding="utf-8")
    res = _chromium("--window-size=1280,800", "--virtual-time-budget=5000", "--dump-dom",
                    probe.as_uri(), profile=tmp_path / "profile")
    assert res.returncode == 0, res.stderr[-2000:]
    found = re.search(r'<pre id="geometry-out">([^<]*)</pre>', res.stdout)
    assert found, res.stdout[-500:]
    box = json.loads(found.group(1))
    assert set(box) == set(FIRST_SCREEN), box
    assert 0 <= box["glance"][0] < box["answer"][1] <= 800  # the answer in full
    assert box["checks"][1] <= 800  # every diagnostic's verdict
    assert box["forest"][0] <= 800 - 150  # the forest plot starts on the first screen
    assert box["forest"][2] >= 600  # drawn at a readable width
    console = [ln for ln in res.stderr.splitlines() if "CONSOLE" in ln and "geometry" not in ln]
    assert not console, console


def test_unreadable_results_file_names_it(tmp_path):
    from emulant.report import ReportError

    protocol = _protocol(tmp_path)
    write_results(tmp_path / "results")
    pd.DataFrame({"step": ["persons"], "remaining": [5]}).to_csv(
        tmp_path / "results" / "attrition.csv", index=False)
    with pytest.raises(ReportError, match=r"attrition\.csv: missing column\(s\) description"):
        render_report(tmp_path / "results", protocol, tmp_path / "r.html")


ROOT = Path(__file__).resolve().parents[2]


def test_per_protocol_section_reads_its_files_and_keeps_contrasts_apart(tmp_path):
    # the section shows what adherence.csv, estimates.csv (contrast per_protocol) and the
    # cohort's deviation_reason hold; the intention-to-treat tables keep their own rows only
    text = PROTOCOL.replace(
        "arms: {class_a: {initiate: class_a}, class_b: {initiate: class_b}}",
        "arms: {class_a: {initiate: class_a, sustain: {gap_days: 60}}, "
        "class_b: {initiate: class_b, sustain: {gap_days: 60}}}"
    ).replace("estimands: [ATE, ATT]",
              "estimands: [ATE, ATT]\ncontrasts: [intention_to_treat, per_protocol]")
    (tmp_path / "codelists").mkdir()
    (tmp_path / "codelists" / "class_a.csv").write_text("code\nRXA1\n", encoding="utf-8")
    (tmp_path / "protocol.yaml").write_text(text, encoding="utf-8")
    protocol = load_protocol(tmp_path / "protocol.yaml")
    d = tmp_path / "results"
    write_results(d)
    cohort = pd.read_parquet(d / "cohort.parquet")
    cohort["deviation_reason"] = (["stopped"] * 9 + ["switched"] * 6 + [None] * 15) * 2
    cohort.to_parquet(d / "cohort.parquet", index=False)
    est = pd.read_csv(d / "estimates.csv")
    pp = est[est.measure.isin(["risk", "risk_difference"])].assign(contrast="per_protocol")
    pp.loc[pp.measure == "risk_difference", "estimate"] = 0.06789
    pd.concat([est, pp]).to_csv(d / "estimates.csv", index=False)
    rows = [{"estimand": "ATE", "arm": a, "period": k, "start_day": 30 * k, "persons": 30 - k,
             "on_protocol": 30 - 2 * k, "deviating": 1, "weight_mean": 1.0 + 0.2 * k,
             "weight_p01": 0.5, "weight_p99": 2.0, "weight_max": 3.0}
            for a in ("class_a", "class_b") for k in range(3)]
    pd.DataFrame(rows).to_csv(d / "adherence.csv", index=False)
    html = render_report(d, protocol, tmp_path / "report.html").read_text(encoding="utf-8")
    section = html[html.index('<section id="per-protocol">'):html.index('<section id="assumptions">')]
    results = html[html.index('<section id="results">'):html.index('<section id="per-protocol">')]
    assert "0.0679" in section and "0.0679" not in results
    assert "fig-on-protocol" in section
    assert ">stopped<" in section and ">switched<" in section
    # 9 stopped per arm are shown; the mean weight 1.4 in period 2 is flagged as a warning
    assert "Per-protocol weights (ATE, class_a): the mean is 1.40 in period 2" in html
    assert "No unmeasured time-varying confounding of adherence" in html
    assert "Per protocol: follow-up ends on the day a person deviates" in html
