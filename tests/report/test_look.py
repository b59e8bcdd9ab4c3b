"""The report's own look: balance arrows sorted by imbalance, overlap outlines with the common
support shaded, design labels such as ``region: south``, yes/no, percentages.

Checks read the rendered page with the standard library's ``html.parser`` and the SVG text;
expected orders are hand computation from the invented rows below.
"""

from __future__ import annotations

import re

from test_report import MANIFEST, _parse, _protocol, write_results

from emulant.report import render_report
from emulant.report.figures import balance_figure, overlap_figure


def _svg_text(svg: str) -> list[str]:
    return [t for t in re.findall(r"<text[^>]*>([^<]+)</text>", svg)]


def test_balance_rows_sorted_by_unweighted_imbalance_with_a_band():
    rows = [{"label": "small", "before": 0.02, "after": {"ATE": 0.01}},
            {"label": "large", "before": -0.40, "after": {"ATE": 0.03}},
            {"label": "middle", "before": 0.20, "after": {"ATE": -0.05}},
            {"label": "hidden", "before": None, "after": {"ATE": 0.02}}]
    svg = balance_figure(rows, 0.1, ["ATE"])
    text = _svg_text(svg)
    order = [t for t in text if t in ("small", "large", "middle", "hidden")]
    assert order == ["large", "middle", "small", "hidden"]  # top to bottom by |unweighted|
    assert "|SMD| ≤ 0.1" in " ".join(text) and "unweighted → ATE weights" in " ".join(text)
    assert "stroke-dasharray" not in svg  # no dashed threshold line: a shaded band instead


def test_overlap_outlines_shade_outside_common_support():
    edges = [i / 10 for i in range(11)]
    arms = [{"name": "a", "heights": [0, 0, 6, 8, 9, 7, 6, 5, 0, 0], "hidden": [False] * 10},
            {"name": "b", "heights": [0, 5, 9, 8, 7, 6, 0, 0, 0, 0], "hidden": [False] * 10}]
    svg = overlap_figure(edges, arms, arms, "after ATE weighting")
    assert "before weighting" in svg and "after ATE weighting" in svg
    # both arms have persons in bins 2..5 only: support 0.2 to 0.6, the rest shaded grey
    assert svg.lower().count("#dadada") == 4  # two panels, a band on each side


def test_page_says_yes_no_and_labels_without_brackets(tmp_path):
    protocol = _protocol(tmp_path)
    write_results(tmp_path / "results")
    html = render_report(tmp_path / "results", protocol, tmp_path / "r.html",
                         MANIFEST).read_text(encoding="utf-8")
    page = _parse(html)
    body = html[:html.index('<section id="protocol"')]  # the YAML appendix keeps YAML's words
    assert ">True<" not in body and ">False<" not in body
    assert re.search(r"<dt>Model converged</dt><dd>yes</dd>", body)
    assert re.search(r"<dt>Penalized</dt><dd>no</dd>", body)
    assert "region: south, region: east" in body and "[south]" not in body
    trunc = [r for r in page.rows if r and r[0] in ("ATE", "ATT") and len(r) > 8]
    assert trunc and all(r[-1] == "no" for r in trunc)
