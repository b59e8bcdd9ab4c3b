"""The extract check (CONTRACTS §2): one test per bad-input rule, each on a tiny handmade extract.

Each bad input must make ``emulant check`` exit 2 with a message naming the table and column,
and no traceback. Expected counts are hand computations on the rows written in each test.
"""

from __future__ import annotations

import gzip
import hashlib
import json
import re
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
import yaml
from tiny_extract import protocol_dict, tables, write_extract, write_protocol

from emulant import cli
from emulant.extract import ExtractError, check_extract, open_extract
from emulant.protocol import load_protocol


def run_check(capsys, extract: Path, protocol: Path) -> tuple[int, str]:
    rc = cli.main(["check", "--extract", str(extract), "--protocol", str(protocol)])
    out = capsys.readouterr()
    return rc, out.out + out.err


def bad(tmp_path, capsys, edit, proto: dict | None = None, fmt: str = "csv") -> str:
    """Write the tiny extract after ``edit(tables)``, run the check, assert exit 2; return output."""
    t = tables()
    edit(t)
    ex = write_extract(tmp_path / "extract", t, fmt)
    pp = write_protocol(tmp_path / "proto", proto)
    saved = tmp_path / "out" / "extract_check.json"
    rc = cli.main(["check", "--extract", str(ex), "--protocol", str(pp), "--save-check", str(saved)])
    out = capsys.readouterr()
    text = out.out + out.err
    assert rc == 2, text
    assert "Traceback" not in text
    kept = saved.parent / "person_level" / "check-problems.txt"
    if kept.is_file():  # the examples naming persons: kept there, never printed (disclosure rule)
        assert not re.search(r"person_id \S+:", text)
        return "\n".join(f"  - {ln}" for ln in kept.read_text().splitlines()[1:])
    return text


def problem_lines(text: str) -> list[str]:
    return [ln for ln in text.splitlines() if ln.startswith("  - ")]


# ----------------------------------------------------------------------------- the rules of §2


def test_missing_table(tmp_path, capsys):
    text = bad(tmp_path, capsys, lambda t: t.pop("coverage"))
    assert "table coverage is missing" in text and "coverage.csv" in text


def test_missing_required_column(tmp_path, capsys):
    text = bad(tmp_path, capsys, lambda t: t.__setitem__("dispensings", t["dispensings"].drop(columns="code")))
    assert "table dispensings (dispensings.csv): required column code is missing" in text


def test_unparseable_date(tmp_path, capsys):
    def edit(t):
        t["diagnoses"].loc[2, "date"] = "2017-13-40"
        t["diagnoses"].loc[4, "date"] = "soon"

    text = bad(tmp_path, capsys, edit)
    line = next(ln for ln in problem_lines(text) if "not dates" in ln)
    # rows of persons 3 and 5: hand count 2
    assert "table diagnoses (diagnoses.csv), column date: 2 value(s)" in line
    assert "person_id 3: '2017-13-40'" in line and "person_id 5: 'soon'" in line


def test_unparseable_birth_date(tmp_path, capsys):
    def edit(t):
        t["persons"].loc[3, "birth_date"] = "01/01/1990"

    text = bad(tmp_path, capsys, edit)
    assert "table persons (persons.csv), column birth_date: 1 value(s) are not dates" in text


def test_unparseable_number(tmp_path, capsys):
    def edit(t):
        t["measurements"]["value"] = t["measurements"]["value"].astype(object)
        t["measurements"].loc[1, "value"] = "high"

    text = bad(tmp_path, capsys, edit)
    assert "table measurements (measurements.csv), column value: 1 value(s) are not numbers" in text
    assert "person_id 2: 'high'" in text


def test_person_id_not_the_same_type(tmp_path, capsys):
    def edit(t):
        t["dispensings"]["person_id"] = "P" + t["dispensings"]["person_id"].astype(str)

    text = bad(tmp_path, capsys, edit, fmt="parquet")
    assert "person_id is not the same type in every table" in text
    assert "dispensings: string" in text and "persons: integer" in text


def test_person_id_text_in_csv_beside_integers(tmp_path, capsys):
    def edit(t):
        t["diagnoses"]["person_id"] = t["diagnoses"]["person_id"].astype(object)
        t["diagnoses"].loc[6, "person_id"] = "X7"

    text = bad(tmp_path, capsys, edit)
    assert "table diagnoses (diagnoses.csv), column person_id: 1 value(s) are not integers" in text


def test_duplicate_person_in_persons(tmp_path, capsys):
    def edit(t):
        t["persons"] = pd.concat([t["persons"], t["persons"].iloc[[4]]], ignore_index=True)

    text = bad(tmp_path, capsys, edit)
    assert "table persons (persons.csv), column person_id: 1 person_id value(s) appear more than once" in text
    assert "person_id 5 (2 rows)" in text


def test_more_than_one_death(tmp_path, capsys):
    def edit(t):
        t["deaths"] = pd.DataFrame({"person_id": [2, 2, 6], "date": ["2020-02-02", "2020-03-03", "2021-01-01"],
                                    "cause_code": ["C0", "C0", "C1"]})

    text = bad(tmp_path, capsys, edit)
    assert "table deaths (deaths.csv), column person_id: 1 person_id value(s) appear more than once" in text
    assert "at most one death per person" in text


def test_end_before_start(tmp_path, capsys):
    text = bad(tmp_path, capsys, lambda t: t["coverage"].__setitem__("end_date", ["2009-12-31"] + ["2023-12-31"] * 7))
    assert "table coverage (coverage.csv), column end_date: 1 period(s) end before they start" in text
    assert "person_id 1: '2010-01-01 to 2009-12-31'" in text


def test_event_person_not_in_persons(tmp_path, capsys):
    def edit(t):
        extra = pd.DataFrame({"person_id": [99, 98], "date": ["2018-01-01"] * 2, "code": ["DM2"] * 2,
                              "setting": ["outpatient"] * 2})
        t["diagnoses"] = pd.concat([t["diagnoses"], extra], ignore_index=True)

    text = bad(tmp_path, capsys, edit)
    assert "table diagnoses (diagnoses.csv), column person_id: 2 row(s) whose person_id is not in table persons" in text
    assert "person_id 98, person_id 99" in text


def test_days_supply_not_positive(tmp_path, capsys):
    text = bad(tmp_path, capsys, lambda t: t["dispensings"].__setitem__("days_supply", [30, 0, -5, 30, 30, 30, 30]))
    assert "table dispensings (dispensings.csv), column days_supply: 2 value(s) are <= 0" in text


def test_days_supply_not_whole(tmp_path, capsys):
    text = bad(tmp_path, capsys, lambda t: t["dispensings"].__setitem__("days_supply", [30, 2.5, 30, 30, 30, 30, 30]))
    assert "column days_supply: 1 value(s) are not whole numbers" in text


def test_concept_source_table_absent(tmp_path, capsys):
    proto = protocol_dict()
    proto["concepts"]["t2d"]["source"] = "procedures"
    text = bad(tmp_path, capsys, lambda t: None, proto)
    assert "concepts.t2d.source: table procedures is not in the extract" in text


def test_where_column_absent(tmp_path, capsys):
    text = bad(tmp_path, capsys, lambda t: t.__setitem__("diagnoses", t["diagnoses"].drop(columns="setting")))
    assert "concepts.hf_admission.where: column setting is not in table diagnoses (diagnoses.csv)" in text


def test_covariate_attribute_absent(tmp_path, capsys):
    text = bad(tmp_path, capsys, lambda t: t.__setitem__("persons", t["persons"].drop(columns="region")))
    assert "covariates (region).attribute: column region is not in table persons (persons.csv)" in text


def test_every_problem_listed_at_once(tmp_path, capsys):
    def edit(t):
        t.pop("coverage")
        t["dispensings"]["days_supply"] = [30, 0, 30, 30, 30, 30, 30]
        t["persons"] = t["persons"].drop(columns="region")

    text = bad(tmp_path, capsys, edit)
    lines = problem_lines(text)
    assert any("table coverage is missing" in ln for ln in lines)
    assert any("days_supply" in ln for ln in lines)
    assert any("attribute: column region" in ln for ln in lines)


def test_protocol_and_extract_problems_together(tmp_path, capsys):
    proto = protocol_dict()
    proto["strategies"]["treeted"] = proto["strategies"].pop("treated")
    text = bad(tmp_path, capsys, lambda t: t.pop("deaths"), proto)
    assert "did you mean 'treated'" in text and "table deaths is missing" in text


def test_no_traceback_in_a_subprocess(tmp_path):
    t = tables()
    t["diagnoses"].loc[0, "date"] = "not-a-date"
    ex = write_extract(tmp_path / "extract", t)
    pp = write_protocol(tmp_path / "proto")
    run = subprocess.run([sys.executable, "-m", "emulant", "check", "--extract", str(ex), "--protocol", str(pp)],
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 2
    assert "Traceback" not in run.stdout + run.stderr
    assert "table diagnoses (diagnoses.csv), column date" in run.stderr


def test_missing_extract_folder(tmp_path, capsys):
    pp = write_protocol(tmp_path / "proto")
    rc, text = run_check(capsys, tmp_path / "nowhere", pp)
    assert rc == 2 and "does not exist" in text and "Traceback" not in text


def test_unreadable_file(tmp_path, capsys):
    ex = write_extract(tmp_path / "extract")
    (ex / "measurements.csv").unlink()
    (ex / "measurements.parquet").write_bytes(b"this is not parquet")
    pp = write_protocol(tmp_path / "proto")
    rc, text = run_check(capsys, ex, pp)
    assert rc == 2 and "table measurements (measurements.parquet): the file could not be read" in text


def test_two_files_for_one_table(tmp_path, capsys):
    ex = write_extract(tmp_path / "extract")
    tables()["deaths"].to_parquet(ex / "deaths.parquet", index=False)
    rc, text = run_check(capsys, ex, write_protocol(tmp_path / "proto"))
    assert rc == 2 and "table deaths: more than one file (deaths.csv, deaths.parquet)" in text


# ----------------------------------------------------------------------------- what passes


def test_implausible_rows_counted_and_excluded(tmp_path):
    t = tables()
    # person 3 born 1970-07-07: one diagnosis before birth; person 2 died 2020-02-02: one
    # dispensing after death, one on the day of death (kept); person 6: a death before birth
    t["diagnoses"].loc[len(t["diagnoses"])] = [3, "1969-01-01", "DM2", "outpatient"]
    t["dispensings"].loc[len(t["dispensings"])] = [2, "2020-02-03", "RXA1", 30]
    t["dispensings"].loc[len(t["dispensings"])] = [2, "2020-02-02", "RXA1", 30]
    t["deaths"].loc[len(t["deaths"])] = [6, "1940-01-01", "C1"]
    ex = write_extract(tmp_path / "extract", t)
    p = load_protocol(write_protocol(tmp_path / "proto"))
    res = check_extract(ex, p)
    imp = res["implausible"]
    assert imp["diagnoses"]["before_birth"] == 1 and imp["diagnoses"]["after_death"] == 0
    assert imp["dispensings"] == {"before_birth": 0, "after_death": 1, "examples": [
        {"person_id": 2, "date": "2020-02-03", "reason": "after_death"}]}
    assert imp["deaths"]["before_birth"] == 1
    e = open_extract(ex, p)
    n = {v: e.con.execute(f"SELECT count(*) FROM {v}").fetchone()[0]
         for v in ("diagnoses", "raw_diagnoses", "dispensings", "raw_dispensings", "deaths", "raw_deaths")}
    assert (n["raw_diagnoses"], n["diagnoses"]) == (9, 8)
    assert (n["raw_dispensings"], n["dispensings"]) == (9, 8)
    assert (n["raw_deaths"], n["deaths"]) == (2, 1)
    json.dumps(res)  # the check's content is JSON as it stands


@pytest.mark.parametrize("fmt", ["parquet", "csv.gz"])
def test_parquet_and_csv_gz_read(tmp_path, fmt):
    ex = write_extract(tmp_path / "extract", fmt=fmt)
    p = load_protocol(write_protocol(tmp_path / "proto"))
    res = check_extract(ex, p)
    assert res["tables"]["persons"]["file"].endswith(f"persons.{fmt}")
    assert res["tables"]["diagnoses"]["rows"] == 8
    assert res["tables"]["coverage"]["date_min"] == "2010-01-01"
    assert res["tables"]["coverage"]["date_max"] == "2023-12-31"
    assert res["person_id_type"] == "BIGINT"
    e = open_extract(ex, p)
    assert e.con.execute("SELECT typeof(date) FROM diagnoses LIMIT 1").fetchone()[0] == "DATE"
    assert e.con.execute("SELECT sum(value) FROM measurements").fetchone()[0] == pytest.approx(22.2)


def test_csv_gz_is_compressed(tmp_path):
    ex = write_extract(tmp_path / "extract", fmt="csv.gz")
    with gzip.open(ex / "persons.csv.gz", "rt") as fh:
        assert fh.readline().startswith("person_id,birth_date")


def test_renames_from_extract_columns(tmp_path, capsys):
    t = tables()
    t["dispensings"] = t["dispensings"].rename(columns={"code": "atc", "date": "dispensed_on"})
    t["persons"] = t["persons"].rename(columns={"person_id": "pid"})
    ex = write_extract(tmp_path / "extract", t)
    proto = protocol_dict()
    proto["extract_columns"] = {"dispensings": {"code": "atc", "date": "dispensed_on"},
                                "persons": {"person_id": "pid"}}
    pp = write_protocol(tmp_path / "proto", proto)
    p = load_protocol(pp)
    res = check_extract(ex, p)
    assert res["tables"]["dispensings"]["columns"][:3] == ["person_id", "date", "code"]
    e = open_extract(ex, p)
    assert e.con.execute("SELECT count(*) FROM dispensings WHERE code LIKE 'RXA%'").fetchone()[0] == 4
    assert "person_id" in e.columns["persons"]
    # without the renames the same extract fails, naming the file's columns
    proto.pop("extract_columns")
    rc, text = run_check(capsys, ex, write_protocol(tmp_path / "proto2", proto))
    assert rc == 2 and "table dispensings (dispensings.csv): required column code is missing" in text
    assert "table persons (persons.csv): required column person_id is missing" in text


def test_rename_to_an_absent_column(tmp_path, capsys):
    ex = write_extract(tmp_path / "extract")
    proto = protocol_dict()
    proto["extract_columns"] = {"diagnoses": {"code": "icd"}}
    rc, text = run_check(capsys, ex, write_protocol(tmp_path / "proto", proto))
    assert rc == 2
    assert "table diagnoses (diagnoses.csv): column 'icd' (extract_columns.diagnoses.code) is not in the file" in text


def test_renamed_column_named_in_messages(tmp_path, capsys):
    t = tables()
    t["dispensings"] = t["dispensings"].rename(columns={"days_supply": "supply"})
    t["dispensings"]["supply"] = [30, 30, 0, 30, 30, 30, 30]
    ex = write_extract(tmp_path / "extract", t)
    proto = protocol_dict()
    proto["extract_columns"] = {"dispensings": {"days_supply": "supply"}}
    rc, text = run_check(capsys, ex, write_protocol(tmp_path / "proto", proto))
    assert rc == 2 and "column days_supply (file column supply): 1 value(s) are <= 0" in text


def test_sha256_equals_hashlib(tmp_path):
    ex = write_extract(tmp_path / "extract", fmt="parquet")
    res = check_extract(ex, load_protocol(write_protocol(tmp_path / "proto")))
    for name, info in res["tables"].items():
        # reference: Python's hashlib over the whole file
        assert info["sha256"] == hashlib.sha256((ex / f"{name}.parquet").read_bytes()).hexdigest()


def test_days_supply_default_and_empty_deaths(tmp_path):
    t = tables()
    t["dispensings"] = t["dispensings"].drop(columns="days_supply")
    t["deaths"] = t["deaths"].iloc[0:0]
    ex = write_extract(tmp_path / "extract", t)
    p = load_protocol(write_protocol(tmp_path / "proto"))
    res = check_extract(ex, p)
    assert res["tables"]["deaths"]["rows"] == 0
    e = open_extract(ex, p)
    assert e.con.execute("SELECT min(days_supply), max(days_supply) FROM dispensings").fetchone() == (30, 30)
    # a zero-byte deaths file is an empty deaths table too
    (ex / "deaths.csv").write_bytes(b"")
    assert check_extract(ex, p)["tables"]["deaths"]["rows"] == 0
    assert open_extract(ex, p).con.execute("SELECT count(*) FROM deaths").fetchone()[0] == 0


def test_text_person_ids(tmp_path):
    t = tables()
    for name in t:
        t[name]["person_id"] = "P" + t[name]["person_id"].astype(str).str.zfill(3)
    ex = write_extract(tmp_path / "extract", t)
    p = load_protocol(write_protocol(tmp_path / "proto"))
    assert check_extract(ex, p)["person_id_type"] == "VARCHAR"
    e = open_extract(ex, p)
    assert e.con.execute("SELECT count(*) FROM dispensings").fetchone()[0] == 7


def test_warnings_of_section_3a(tmp_path):
    proto = protocol_dict()
    proto["strategies"]["washout_days"] = 400  # beyond coverage_before_days 365
    proto["covariates"].append({"name": "prior_t2d", "concept": "t2d", "window": [-730, -1]})
    ex = write_extract(tmp_path / "extract")
    res = check_extract(ex, load_protocol(write_protocol(tmp_path / "proto", proto)))
    w = "\n".join(res["warnings"])
    assert "eligibility.require[0] (t2d): window [-1825, 0] reaches further back" in w
    assert "covariates (prior_t2d): window [-730, -1] reaches further back" in w
    assert "strategies.washout_days (400) reaches further back" in w
    # administrative end 2022-12-31; the last diagnosis is 2019-01-01 (hand reading of the rows)
    assert "later than the last record of table diagnoses (in 2019-01)" in w  # by month (disclosure)
    assert "table coverage" not in w  # coverage runs to 2023-12-31


def test_check_extract_raises_our_error(tmp_path):
    t = tables()
    t["coverage"].loc[0, "start_date"] = "2010-02-30"
    ex = write_extract(tmp_path / "extract", t)
    with pytest.raises(ExtractError) as info:
        check_extract(ex, None)
    assert len(info.value.problems) == 1
    assert info.value.problems[0].startswith("table coverage (coverage.csv), column start_date: 1 value(s)")


def test_config_duckdb_settings_accepted(tmp_path):
    ex = write_extract(tmp_path / "extract")
    res = check_extract(ex, None, {"threads": 1, "memory_limit": "1GB",
                                   "temp_directory": str(tmp_path / "spill")})
    assert res["tables"]["persons"]["rows"] == 8
    assert yaml.safe_dump(res)  # plain types only
