"""The report says which variance each interval uses (``analysis.variance``): the analysis plan
names the rows with influence-function intervals, and a run without replicates says so."""

from __future__ import annotations

from two_arm import two_arm_protocol

from emulant.report import narrative, results
from emulant.wording import variance_note


def _analysis_text(variance: str, bootstrap: dict) -> str:
    p = two_arm_protocol("wording", analysis={"methods": ["ipw"], "variance": variance})
    rows = narrative.emulation_rows(p, None, results.bootstrap(bootstrap), False)
    return next(r["emulation"] for r in rows if r["id"] == "analysis")


def test_bootstrap_only_says_nothing_of_influence_functions():
    text = _analysis_text("bootstrap", {"requested": 200, "completed": 200, "failed": 0})
    assert "influence" not in text and "200 of 200 replicates completed" in text


def test_influence_names_its_rows_and_a_run_without_replicates():
    b = {"requested": 0, "completed": 0, "failed": 0, "variance": "influence", "influence_rows": 38}
    text = _analysis_text("influence", b)
    assert variance_note(two_arm_protocol("w", analysis={"variance": "influence"})) in text
    assert "no bootstrap replicate (every interval is from the influence function)" in text
    assert results.bootstrap(b)["influence_rows"] == "38"
    assert results.bootstrap({"requested": 5})["influence_rows"] is None
