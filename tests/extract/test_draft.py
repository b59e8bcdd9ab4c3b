"""``emulant draft``: a protocol draft from an extract that passes ``emulant check`` once the
concepts' codes are filled in.

The code-prefix counts are checked against pandas (an independent computation of the same
counts: distinct persons per prefix) on the invented synthetic extract; the disclosure rule
(no prefix held by fewer than ``min_cell`` persons) is common practice, no published source.
"""

from __future__ import annotations

import re
from pathlib import Path

import pandas as pd
import pytest
import yaml

from emulant import cli
from emulant.extract.draft import summarise

DEMO_CODES = {"treatment_a": "[RXK]", "treatment_b": "[RXP]", "condition": "[CMD]", "outcome": "[HFX]"}


@pytest.fixture(scope="module")
def extract(tmp_path_factory) -> Path:
    from synthetic_cohort.generate import write_synthetic

    out = tmp_path_factory.mktemp("draft") / "my-extract"
    write_synthetic(out, persons=2000, seed=3, fmt="csv")
    return out


def _fill(text: str) -> str:
    for name, codes in DEMO_CODES.items():
        text = re.sub(rf"^(  {name}:\s*\{{source: \w+, codes: )\[\]", rf"\g<1>{codes}", text, flags=re.M)
    return text


def test_draft_then_fill_then_check(extract, tmp_path, capsys):
    out = tmp_path / "study" / "protocol.yaml"
    assert cli.main(["draft", "--extract", str(extract), "--out", str(out)]) == 0
    text = out.read_text()
    assert "codes: []" in text and "persons" in text and "dispensings" in text
    assert yaml.safe_load(text)["study"]["id"] == "my-extract"
    capsys.readouterr()
    # as drafted, the check names every concept still to fill in
    assert cli.main(["check", "--extract", str(extract), "--protocol", str(out)]) == 2
    err = capsys.readouterr().err
    for name in DEMO_CODES:
        assert f"concepts.{name}.codes: the code list is empty" in err
    out.write_text(_fill(text))
    assert cli.main(["check", "--extract", str(extract), "--protocol", str(out)]) == 0, capsys.readouterr().err
    assert "Attrition" in capsys.readouterr().out


def test_draft_never_overwrites(extract, tmp_path, capsys):
    out = tmp_path / "p.yaml"
    out.write_text("mine\n")
    assert cli.main(["draft", "--extract", str(extract), "--out", str(out)]) == 2
    assert out.read_text() == "mine\n"
    assert "exists" in capsys.readouterr().err


def test_draft_of_a_bad_extract_names_the_problem(tmp_path, capsys):
    assert cli.main(["draft", "--extract", str(tmp_path / "nowhere"), "--out", str(tmp_path / "p.yaml")]) == 2
    assert "does not exist" in capsys.readouterr().err
    assert not (tmp_path / "p.yaml").exists()


def test_prefix_counts_agree_with_pandas(extract):
    s = summarise(extract, min_cell=20, prefix_length=3, top=50)
    df = pd.read_csv(extract / "diagnoses.csv", dtype=str)
    persons = pd.read_csv(extract / "persons.csv", dtype=str)
    deaths = pd.read_csv(extract / "deaths.csv", dtype=str)
    # the extract's views leave out rows dated before birth or after death
    df = df.merge(persons[["person_id", "birth_date"]], on="person_id")
    df = df.merge(deaths.rename(columns={"date": "death"}), on="person_id", how="left")
    df = df[(df["date"] >= df["birth_date"]) & (df["death"].isna() | (df["date"] <= df["death"]))]
    expected = df.assign(prefix=df["code"].str[:3]).groupby("prefix")["person_id"].nunique()
    expected = expected[expected >= 20].sort_values(ascending=False)
    got = {p: n for p, n, _ in s["sources"]["diagnoses"]}
    assert got == expected.to_dict()
    assert min(got.values()) >= 20


def test_small_prefixes_are_not_printed(extract):
    s = summarise(extract, min_cell=10**6)
    assert all(rows == [] for rows in s["sources"].values())
