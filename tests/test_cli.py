"""The ``emulant`` command: check, synth, where, help, and errors without tracebacks.

The attrition expected from the tiny extract is a hand computation (tests/tiny_extract.py).
"""

from __future__ import annotations

import importlib
import json

import pytest
from tiny_extract import EXPECTED_ATTRITION, protocol_dict, write_extract, write_protocol

from emulant import cli


def _need(module: str, why: str):
    try:
        return importlib.import_module(module)
    except ImportError as exc:
        pytest.skip(f"{module} is not importable yet ({exc}); {why}")


def _run(capsys, *argv: str) -> tuple[int, str, str]:
    rc = cli.main(list(argv))
    out = capsys.readouterr()
    return rc, out.out, out.err


def test_help(capsys):
    rc, out, _ = _run(capsys, "--help")
    assert rc == 0
    for word in ("check", "synth", "where"):
        assert word in out
    rc, out, _ = _run(capsys, "check", "--help")
    assert rc == 0 and "--extract" in out and "--protocol" in out and "exit" in out.lower()
    rc, out, _ = _run(capsys, "synth", "--help")
    assert rc == 0 and "--persons" in out and "20000" in out


def test_usage_error_exits_2(capsys):
    rc, _, err = _run(capsys, "check", "--extract", "x")
    assert rc == 2 and "--protocol" in err and "Traceback" not in err
    rc, _, err = _run(capsys, "synth", "--out", "x", "--format", "xlsx")
    assert rc == 2 and "invalid choice" in err


def test_check_valid_extract_prints_attrition(tmp_path, capsys):
    _need("emulant.cohort", "the eligibility steps of `emulant check` live there")
    ex = write_extract(tmp_path / "extract")
    d = protocol_dict()
    d["report"] = {"min_cell": 1}  # nothing is suppressed: the exact attrition is printed
    pp = write_protocol(tmp_path / "proto", d)
    saved = tmp_path / "out" / "extract_check.json"
    rc, out, err = _run(capsys, "check", "--extract", str(ex), "--protocol", str(pp), "--save-check", str(saved))
    assert rc == 0, err
    assert "Attrition" in out and "Traceback" not in out + err
    lines = out[out.index("Attrition"):].splitlines()[2:]
    rows = [ln.split() for ln in lines if ln.strip()]  # the first step has no excluded count
    got = [(r[0], int(r[-1] if i == 0 else r[-2])) for i, r in enumerate(rows)]
    assert got == EXPECTED_ATTRITION  # hand computation
    assert "Warnings" in out and "coverage_before_days" in out
    check = json.loads(saved.read_text())
    assert check["tables"]["persons"]["rows"] == 8
    assert str(tmp_path) not in saved.read_text()  # paths relative (disclosure rule)


def test_check_output_follows_the_disclosure_rule(tmp_path, capsys):
    """With min_cell 5 every count of the 8-person extract's attrition is below 5 or recovers one:
    the terminal shows none of them, no birth date and no person identifier's date."""
    _need("emulant.cohort", "the eligibility steps of `emulant check` live there")
    ex = write_extract(tmp_path / "extract")
    d = protocol_dict()
    d["report"] = {"min_cell": 5}
    pp = write_protocol(tmp_path / "proto", d)
    saved = tmp_path / "out" / "extract_check.json"
    rc, out, err = _run(capsys, "check", "--extract", str(ex), "--protocol", str(pp), "--save-check", str(saved))
    assert rc == 0, err
    lines = out[out.index("Attrition"):].splitlines()[2:]
    shown = [ln.split()[-2:] for ln in lines if ln.strip()]
    # persons 8 is shown (8 >= 5), the rest is <5 or suppressed so that no exclusion is recovered
    assert shown[0][-1] == "8"
    assert all(c in ("<5", "—", "0") or int(c) >= 5 for row in shown[1:] for c in row)
    assert "1950-12-12" not in out and "1950-12" in out  # oldest birth date by month only
    assert str(tmp_path) not in out + err
    person_level = saved.parent / "person_level" / "extract_examples.json"
    assert person_level.is_file() and "person-level" in person_level.read_text()


def test_check_warns_of_a_covariate_with_a_single_value(tmp_path, capsys):
    # every person of the tiny cohort starts in 2018 (hand computation, tests/tiny_extract.py):
    # the calendar year is a constant, which adjusts for nothing (common practice, no source)
    d = protocol_dict()
    d["covariates"].append({"name": "entry_year", "builtin": "calendar_year", "kind": "categorical"})
    rc, out, err = _run(capsys, "check", "--extract", str(write_extract(tmp_path / "extract")),
                        "--protocol", str(write_protocol(tmp_path / "proto", d)))
    assert rc == 0, err
    assert ("covariates[4] (entry_year): a single value (2018) in all 4 persons of the cohort; "
            "the models leave it out") in out


def test_check_empty_cohort_names_the_step(tmp_path, capsys):
    _need("emulant.cohort", "the eligibility steps of `emulant check` live there")
    d = protocol_dict()
    d["eligibility"]["entry"] = {"start": "2022-01-01", "end": "2022-06-30"}  # nobody initiates then
    rc, out, err = _run(capsys, "check", "--extract", str(write_extract(tmp_path / "extract")),
                        "--protocol", str(write_protocol(tmp_path / "proto", d)))
    assert rc == 2 and "Traceback" not in err
    assert "initiated" in err


def test_unexpected_error_is_one_line(tmp_path, capsys, monkeypatch):
    import emulant.extract

    def boom(*_a, **_k):
        raise RuntimeError("disk on fire\nsecond line")

    monkeypatch.setattr(emulant.extract, "check_extract", boom)
    rc, _, err = _run(capsys, "check", "--extract", str(write_extract(tmp_path / "extract")),
                      "--protocol", str(write_protocol(tmp_path / "proto")))
    assert rc == 2
    assert err.strip().endswith("error while checking the extract "
                                f"{tmp_path / 'extract'}: RuntimeError: disk on fire")
    assert "second line" not in err and "Traceback" not in err


def test_synth_writes_files(tmp_path, capsys):
    _need("synthetic_cohort.generate", "the generator is written by another engineer")
    out_dir = tmp_path / "synth"
    rc, out, err = _run(capsys, "synth", "--persons", "300", "--seed", "11", "--out", str(out_dir),
                        "--format", "csv")
    assert rc == 0, err
    names = {f.name for f in out_dir.rglob("*") if f.is_file()}
    assert any(n.startswith("persons.") for n in names), names
    assert "truth.json" in names
    assert "300 persons" in out


def test_synth_rejects_nonsense(capsys, tmp_path):
    rc, _, err = _run(capsys, "synth", "--persons", "0", "--out", str(tmp_path))
    assert rc == 2 and "--persons" in err


def test_where(tmp_path, capsys, monkeypatch):
    write_protocol(tmp_path / "config" / "protocols", name="demo.yaml")
    (tmp_path / "config" / "config.yaml").write_text(
        "extract: data/extract\nprotocol: config/protocols/demo.yaml\nresults: out/results\nreports: out/reports\n")
    monkeypatch.chdir(tmp_path)
    rc, out, _ = _run(capsys, "where", "--config", "config/config.yaml")
    assert rc == 0
    assert "out/results/tiny-test" in out and "none yet" in out
    ledger = tmp_path / "out" / "reports" / "tiny-test" / "ledger.jsonl"
    ledger.parent.mkdir(parents=True)
    ledger.write_text(json.dumps({"stamp": "a", "report": "a/report.html"}) + "\n"  # relative to the ledger
                      + json.dumps({"stamp": "b", "report": "b/report.html"}) + "\n")
    rc, out, _ = _run(capsys, "where", "--config", "config/config.yaml")
    assert rc == 0 and "latest report: out/reports/tiny-test/b/report.html" in out


def test_where_takes_the_runs_config_overrides(tmp_path, capsys, monkeypatch):
    """`make demo ARGS="--config protocol=..."` must print the study that was run, not the default."""
    write_protocol(tmp_path / "config" / "protocols", name="demo.yaml")
    d = protocol_dict()
    d["study"]["id"] = "other-study"
    write_protocol(tmp_path / "studies", d, name="other.yaml")
    (tmp_path / "config" / "config.yaml").write_text(
        "extract: data/extract\nprotocol: config/protocols/demo.yaml\nresults: results\nreports: reports\n")
    monkeypatch.chdir(tmp_path)
    rc, out, _ = _run(capsys, "where", "--config", "extract=elsewhere", "protocol=studies/other.yaml")
    assert rc == 0 and "results/other-study" in out and "tiny-test" not in out


def test_where_missing_config(tmp_path, capsys):
    rc, _, err = _run(capsys, "where", "--config", str(tmp_path / "none.yaml"))
    assert rc == 2 and "does not exist" in err and "Traceback" not in err


def test_check_errors_name_no_person_in_the_terminal(tmp_path, capsys):
    """A bad value is reported by table, column and count; the person_id examples go to the
    person-level file beside --save-check, never to the terminal (disclosure rule)."""
    ex = write_extract(tmp_path / "extract")
    persons = (ex / "persons.csv").read_text().replace("1955-02-10", "not-a-date")
    (ex / "persons.csv").write_text(persons)
    saved = tmp_path / "out" / "extract_check.json"
    rc, out, err = _run(capsys, "check", "--extract", str(ex), "--protocol", str(write_protocol(tmp_path / "proto")),
                        "--save-check", str(saved))
    assert rc == 2 and "birth_date" in err and "not dates" in err
    assert "person_id 2" not in err + out and "not-a-date" not in err + out
    kept = (saved.parent / "person_level" / "check-problems.txt").read_text()
    assert "person_id 2" in kept and "person-level" in kept
