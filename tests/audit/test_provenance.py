"""The audit trail: stamps, manifest, archive, ledger and the comparison with the previous run.

These check bookkeeping, not statistics: the expected values are hand-written from the inputs.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
from pathlib import Path

import pandas as pd
import pytest
from two_arm import two_arm_protocol

from emulant.audit import provenance


def _protocol(text: str = "v1"):
    return two_arm_protocol("prov-test", text=text)


def _results(tmp: Path, estimate: float, persons_sha: str) -> Path:
    res = tmp / "results" / "prov-test"
    res.mkdir(parents=True, exist_ok=True)
    (res / "extract_check.json").write_text(json.dumps(
        {"tables": {"persons": {"file": "x/persons.csv", "sha256": persons_sha, "rows": 10}}}))
    pd.DataFrame({"step": ["persons", "initiated"], "description": ["", ""], "remaining": [10, 8],
                  "excluded": [0, 2]}).to_csv(res / "attrition.csv", index=False)
    pd.DataFrame([{"outcome": "event", "contrast": "intention_to_treat", "estimand": "ATE", "method": "ipw",
                   "measure": "risk_difference", "horizon_day": 365, "arm": "drug_a", "comparator": "drug_b",
                   "estimate": estimate, "ci_low": estimate - 0.1, "ci_high": estimate + 0.1, "se": 0.05,
                   "n": 8, "events": 3}]).to_csv(res / "estimates.csv", index=False)
    (res / "report.html").write_text("<html></html>")
    return res


def test_sha256_matches_hashlib(tmp_path):
    f = tmp_path / "f.bin"
    f.write_bytes(b"abc" * 1_000_000)
    assert provenance.sha256_file(f) == hashlib.sha256(b"abc" * 1_000_000).hexdigest()


def test_stamps_never_repeat(tmp_path):
    now = dt.datetime(2026, 12, 1, 12, 0, 0, tzinfo=dt.UTC)
    s1 = provenance.new_stamp(tmp_path, now=now)
    (tmp_path / s1).mkdir()
    s2 = provenance.new_stamp(tmp_path, now=now)
    assert s1 == "20261201T120000Z" and s2 == "20261201T120000Z-2"
    assert provenance.new_stamp(tmp_path, kind="design", now=now) == "20261201T120000Z-design"


def test_archive_ledger_and_comparison(tmp_path):
    reports = tmp_path / "reports" / "prov-test"
    res = _results(tmp_path, 0.10, "aaa")
    m1 = provenance.build_manifest(_protocol("v1"), res, reports)
    assert m1["previous_stamp"] is None and m1["inputs"][0]["sha256"] == "aaa"
    (res / "manifest.json").write_text(json.dumps(m1))
    e1 = provenance.archive_run(res / "manifest.json", res / "report.html", res, reports, 1)
    assert (reports / e1["folder"] / "estimates.csv").is_file()
    assert not list(reports.glob(".partial-*"))  # filled under a temporary name, renamed whole
    with pytest.raises(FileExistsError):  # an archive folder is never overwritten
        provenance.archive_run(res / "manifest.json", res / "report.html", res, reports, 1)

    res = _results(tmp_path, 0.16, "bbb")
    m2 = provenance.build_manifest(_protocol("v2"), res, reports)
    assert m2["previous_stamp"] == m1["stamp"] and m2["stamp"] != m1["stamp"]
    cmp = provenance.compare_with_previous(reports, m2, res, 1)
    assert cmp["changed_inputs"] == [{"name": "persons", "previous_sha256": "aaa", "sha256": "bbb"}]
    row = cmp["estimates"][0]
    assert row["previous"] == pytest.approx(0.10) and row["shift"] == pytest.approx(0.06)
    assert row["shift_in_se"] == pytest.approx(0.06 / 0.05)
    assert cmp["attrition"] == [{"step": "persons", "previous": "10", "current": "10", "change": "none"},
                                {"step": "initiated", "previous": "8", "current": "8", "change": "none"}]
    assert "-v1" in cmp["protocol_diff"] and "+v2" in cmp["protocol_diff"]
    (res / "manifest.json").write_text(json.dumps(m2))
    provenance.archive_run(res / "manifest.json", res / "report.html", res, reports, 1)
    ledger = provenance.read_ledger(reports)
    assert [e["stamp"] for e in ledger] == [m1["stamp"], m2["stamp"]]


def test_archive_holds_the_shared_form_only(tmp_path):
    """With min_cell 5 the archive's attrition, estimates and check carry no count below 5 and no
    count that gives one back; curves and balance (event days, SMDs) are not archived."""
    reports = tmp_path / "reports" / "prov-test"
    res = _results(tmp_path, 0.10, "aaa")
    pd.DataFrame({"outcome": ["event"], "day": [3]}).to_csv(res / "curves.csv", index=False)
    m1 = provenance.build_manifest(_protocol("v1"), res, reports)
    (res / "manifest.json").write_text(json.dumps(m1))
    e1 = provenance.archive_run(res / "manifest.json", res / "report.html", res, reports, 5)
    folder = reports / e1["folder"]
    att = pd.read_csv(folder / "attrition.csv", dtype=str, keep_default_na=False)
    # 10 -> 8 with 2 excluded: 2 is below 5, and 10 - 8 would give it back, so 10 is hidden too
    assert list(att.remaining) == ["—", "8"] and list(att.excluded) == ["", "<5"]
    est = pd.read_csv(folder / "estimates.csv", dtype=str)
    assert est.loc[0, "events"] == "<5" and est.loc[0, "n"] == "8"
    assert not (folder / "curves.csv").exists() and "curves.csv" not in e1["files"]
    assert json.loads((folder / "manifest.json").read_text())["inputs"][0]["rows"] == 10
    assert str(tmp_path) not in (reports / "ledger.jsonl").read_text()
