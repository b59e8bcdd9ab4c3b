"""The reference documents in docs/ agree with the code: the extract's tables and columns, the
results files, the README's links, and the designs page's worked example, which is rebuilt here
and run through the cohort code (the expected rows are worked out by hand in docs/designs.md from
the rules stated there; no outside source).
"""

from __future__ import annotations

import re
from pathlib import Path

import pandas as pd

from emulant.audit.provenance import ESTIMATE_KEY, RESULT_FILES
from emulant.columns import END_REASONS
from emulant.extract.tables import REQUIRED_COLUMNS, REQUIRED_TABLES

ROOT = Path(__file__).resolve().parents[1]
DOCS = ROOT / "docs"


def _row(text: str, first_cell: str) -> str:
    rows = [ln for ln in text.splitlines() if ln.startswith(f"| {first_cell} |")]
    assert len(rows) == 1, f"no single table row for {first_cell}"
    return rows[0]


def test_extract_doc_names_every_table_and_required_column():
    text = (DOCS / "extract.md").read_text()
    for table, cols in REQUIRED_COLUMNS.items():
        required_cell = _row(text, f"`{table}`").split("|")[2]
        assert re.findall(r"`(\w+)`", required_cell) == list(cols), table
    for table in REQUIRED_TABLES:
        assert f"`{table}`" in text.split("## Checks")[1] or table in text


def test_results_doc_names_every_file_and_column():
    text = (DOCS / "results.md").read_text()
    for name in (*RESULT_FILES, "manifest.json", "report.html"):
        _row(text, f"`{name}`")
    for col in (*ESTIMATE_KEY, "estimate", "ci_low", "ci_high", "se", "n", "events"):
        assert f"`{col}`" in text, col
    for reason in END_REASONS:
        assert f"`{reason}`" in text, reason


def test_readme_links_the_reference_documents():
    readme = (ROOT / "README.md").read_text()
    for doc in ("protocol.md", "extract.md", "results.md", "designs.md"):
        assert f"(docs/{doc})" in readme, doc
        assert (DOCS / doc).is_file()
    assert "shared documents" not in readme


def test_designs_doc_lists_every_example():
    text = (DOCS / "designs.md").read_text()
    for f in sorted((ROOT / "config" / "protocols").glob("*.yaml")):
        _row(text, f"`config/protocols/{f.name}`")


def _worked_extract(folder: Path) -> Path:
    folder.mkdir(parents=True)
    frames = {
        "persons": [("p1", "1960-05-10", "F", "north"), ("p2", "1950-01-01", "M", "south"),
                    ("p3", "1955-03-03", "F", "east"), ("p4", "1948-07-20", "M", "north")],
        "coverage": [("p1", "2015-01-01", "2022-12-31"), ("p2", "2017-01-01", "2022-12-31"),
                     ("p3", "2014-01-01", "2022-12-31"), ("p4", "2010-01-01", "2022-12-31")],
        "dispensings": [("p1", "2018-06-15", "RXK1", 30), ("p1", "2019-01-10", "RXP1", 30),
                        ("p2", "2017-06-01", "RXP2", 30), ("p3", "2016-09-01", "RXP1", 30),
                        ("p3", "2017-04-01", "RXP1", 30), ("p4", "2019-03-01", "RXP1", 30),
                        ("p4", "2019-03-26", "RXP1", 30), ("p4", "2019-06-29", "RXP1", 30)],
        "diagnoses": [("p1", "2016-03-01", "CMD", "outpatient"), ("p1", "2020-02-01", "HFX", "inpatient"),
                      ("p2", "2016-08-01", "CMD", "outpatient"), ("p3", "2015-02-01", "CMD", "outpatient"),
                      ("p4", "2018-01-05", "CMD", "outpatient")],
        "measurements": [("p1", "2018-05-01", "LBM1", 52.0, "mmol/mol")],
    }
    columns = {"persons": ["person_id", "birth_date", "sex", "region"],
               "coverage": ["person_id", "start_date", "end_date"],
               "dispensings": ["person_id", "date", "code", "days_supply"],
               "diagnoses": ["person_id", "date", "code", "setting"],
               "measurements": ["person_id", "date", "code", "value", "unit"]}
    for name, rows in frames.items():
        pd.DataFrame(rows, columns=columns[name]).to_csv(folder / f"{name}.csv", index=False)
    (folder / "deaths.csv").write_text("person_id,date\n")
    return folder


def test_worked_example_of_the_initiators_design(tmp_path):
    from emulant.cohort import build_cohort
    from emulant.extract import open_extract
    from emulant.protocol import load_protocol

    text = (DOCS / "designs.md").read_text().split("The example's `attrition.csv`:")[1]
    text = text.split("\n## ")[0]  # up to the next design's section
    documented = [tuple(c.strip() for c in ln.strip("|").split("|")) for ln in text.splitlines()
                  if ln.startswith("| ") and not ln.startswith("| step")]
    protocol = load_protocol(ROOT / "config" / "protocols" / "demo.yaml")
    res = build_cohort(open_extract(_worked_extract(tmp_path / "ex"), protocol), protocol)
    got = [(r.step, str(r.remaining), str(r.excluded)) for r in res.attrition.itertuples()]
    assert got == documented
    p1 = res.cohort.set_index("person_id").loc["p1"]
    assert (p1["arm"], str(pd.Timestamp(p1["time_zero"]).date())) == ("kestrel", "2018-06-15")
    assert (int(p1["end_day"]), p1["end_reason"]) == (596, "outcome")
    p4 = res.cohort.set_index("person_id").loc["p4"]
    assert (p4["arm"], str(pd.Timestamp(p4["time_zero"]).date())) == ("plover", "2019-03-01")
    assert (int(p4["end_day"]), p4["end_reason"]) == (1095, "max_follow_up")


def test_worked_example_of_a_sustained_strategy(tmp_path):
    import yaml

    from emulant.cohort import build_cohort
    from emulant.cohort.person_time import add_deviations
    from emulant.extract import open_extract
    from emulant.protocol import parse_protocol

    folder = ROOT / "config" / "protocols"
    d = yaml.safe_load((folder / "demo.yaml").read_text())
    for arm in d["strategies"]["arms"].values():
        arm["sustain"] = {"gap_days": 60}
    d["contrasts"] = ["intention_to_treat", "per_protocol"]
    protocol = parse_protocol(d, folder)
    ex = _worked_extract(tmp_path / "ex")
    cohort = add_deviations(open_extract(ex, protocol), protocol,
                            build_cohort(open_extract(ex, protocol), protocol).cohort)
    p4 = cohort.set_index("person_id").loc["p4"]
    assert (p4["stop_day"], p4["deviation_day"], p4["deviation_reason"]) == (120, 120, "stopped")


def test_worked_example_of_the_clone_design(tmp_path):
    from emulant.cohort import build_cohort
    from emulant.extract import open_extract
    from emulant.protocol import load_protocol

    protocol = load_protocol(ROOT / "config" / "protocols" / "clone.yaml")
    res = build_cohort(open_extract(_worked_extract(tmp_path / "ex"), protocol), protocol)
    assert [(r.step, r.remaining) for r in res.attrition.itertuples()][:2] == [("persons", 4), ("indexed", 1)]
    c = res.cohort.set_index("arm")
    assert set(res.cohort.person_id) == {"p4"}
    assert str(pd.Timestamp(c.loc["early", "time_zero"]).date()) == "2018-01-05"
    assert (c.loc["early", "deviation_day"], c.loc["early", "deviation_reason"]) == (91, "not_started")
    assert pd.isna(c.loc["never", "deviation_day"]) and c.loc["never", "deviation_reason"] is None
    assert (int(c.loc["never", "end_day"]), c.loc["never", "end_reason"]) == (1095, "max_follow_up")
