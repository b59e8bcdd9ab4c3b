"""The report's g-formula part of the per-protocol section: the models with their terms, the
natural-course check read from estimates.csv, its warning, and the g-formula's assumptions."""

from __future__ import annotations

import pandas as pd
from test_report import PROTOCOL, write_results

from emulant.protocol import load_protocol
from emulant.report import render_report


def test_gformula_part_lists_models_and_warns_when_the_natural_course_is_off(tmp_path):
    text = PROTOCOL.replace(
        "arms: {class_a: {initiate: class_a}, class_b: {initiate: class_b}}",
        "arms: {class_a: {initiate: class_a, sustain: {gap_days: 60}}, "
        "class_b: {initiate: class_b, sustain: {gap_days: 60}}}"
    ).replace("estimands: [ATE, ATT]",
              "estimands: [ATE, ATT]\ncontrasts: [intention_to_treat, per_protocol]\n"
              "time_varying:\n  - {name: tone_now, concept: lab, window: [-29, 0], summary: last}"
    ).replace("analysis:\n", "analysis:\n  methods: [ipw, gformula]\n"
              "  gformula: {simulated_persons: 3000, seed: 9}\n")
    (tmp_path / "codelists").mkdir()
    (tmp_path / "codelists" / "class_a.csv").write_text("code\nRXA1\n", encoding="utf-8")
    (tmp_path / "protocol.yaml").write_text(text, encoding="utf-8")
    protocol = load_protocol(tmp_path / "protocol.yaml")
    d = tmp_path / "results"
    write_results(d)
    est = pd.read_csv(d / "estimates.csv")
    pp = est[est.measure.isin(["risk", "risk_difference"]) & (est.method == "ipw")]
    gf = pp.assign(contrast="per_protocol", method="gformula")
    gf.loc[gf.measure == "risk_difference", "estimate"] = -0.04321
    o = str(est.outcome.iloc[0])
    nc = []
    for arm, (sim, obs, lo, hi) in {"class_a": (0.101, 0.1, -0.004, 0.006),
                                    "class_b": (0.130, 0.1, 0.012, 0.048)}.items():
        for measure, value, ci in (("natural_course_risk", sim, (None, None)),
                                   ("observed_risk", obs, (None, None)),
                                   ("natural_course_difference", sim - obs, (lo, hi))):
            nc.append({"outcome": o, "contrast": "per_protocol", "estimand": None,
                       "method": "gformula", "measure": measure, "horizon_day": 1095,
                       "arm": arm, "comparator": None, "estimate": value,
                       "ci_low": ci[0], "ci_high": ci[1]})
    pd.concat([est, gf.assign(contrast="per_protocol"), pd.DataFrame(nc)]).to_csv(
        d / "estimates.csv", index=False)
    html = render_report(d, protocol, tmp_path / "report.html").read_text(encoding="utf-8")
    section = html[html.index('<section id="per-protocol">'):html.index('<section id="assumptions">')]
    assert "\u22120.0432" in section and "parametric g-formula" in section
    assert "g-formula's models and their terms" in section
    assert "previous values of tone_now" in section and "arm × tone_now now" in section
    # the natural course: class_b's difference (3.0 points, interval 1.2 to 4.8) is flagged
    assert "10.1%" in section and "13.0%" in section
    assert "g-formula natural course (" + o + ", class_b, day 1,095)" in html
    assert "g-formula natural course (" + o + ", class_a" not in html
    assert "g-formula: sequential exchangeability" in html and "g-formula: correct models" in html
    assert "simulates 3,000 persons" in section
    # natural-course rows stay out of the per-protocol estimates tables
    assert section.count("natural_course") == 0
