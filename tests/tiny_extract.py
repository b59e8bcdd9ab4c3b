"""A tiny handmade extract and protocol for the extract, protocol and CLI tests.

Every person, date and code is invented. The expected attrition of the fixture protocol is a hand
computation, written next to the rows that drive it.
"""

from __future__ import annotations

import copy
from collections.abc import Callable
from pathlib import Path

import pandas as pd
import pytest
import yaml

from emulant.protocol import ProtocolError, load_protocol


def tables() -> dict[str, pd.DataFrame]:
    """Eight persons; the comments say which eligibility step each one leaves at."""
    persons = pd.DataFrame({
        "person_id": [1, 2, 3, 4, 5, 6, 7, 8],
        "birth_date": ["1960-05-01", "1955-02-10", "1970-07-07", "1990-01-01",
                       "1965-03-03", "1950-12-12", "1962-06-30", "1958-09-09"],
        "sex": ["F", "M", "F", "M", "F", "M", "F", "M"],
        "region": ["north", "south", "north", "east", "south", "east", "north", "south"],
    })
    coverage = pd.DataFrame({
        "person_id": [1, 2, 3, 4, 5, 6, 7, 8],
        "start_date": ["2010-01-01"] * 5 + ["2018-01-01", "2010-01-01", "2010-01-01"],
        "end_date": ["2023-12-31"] * 8,
    })
    dispensings = pd.DataFrame({
        # 1, 2, 3: class A in 2018; 5, 6, 7: class B in 2018; 4 is 28 (too young);
        # 6 has coverage from 2018-01-01 only (fails coverage_before); 8 never initiates
        "person_id": [1, 2, 3, 4, 5, 6, 7],
        "date": ["2018-03-01", "2018-04-01", "2018-05-01", "2018-06-01",
                 "2018-03-15", "2018-04-15", "2018-05-15"],
        "code": ["RXA1", "RXA2", "RXA1", "RXA1", "RXB1", "RXB1", "RXB2"],
        "days_supply": [30, 60, 30, 30, 90, 30, 30],
    })
    diagnoses = pd.DataFrame({
        "person_id": [1, 2, 3, 4, 5, 6, 7, 1],
        "date": ["2017-01-01", "2016-06-01", "2017-02-02", "2017-03-03",
                 "2017-04-04", "2017-05-05", "2010-05-05", "2019-01-01"],
        # 7's diabetes record is more than 1825 days before time zero: fails require:t2d
        "code": ["DM2", "DM2.1", "DM2", "DM2", "DM2", "DM2", "DM2", "HF5.1"],
        "setting": ["outpatient"] * 7 + ["inpatient"],
    })
    measurements = pd.DataFrame({
        "person_id": [1, 2, 5], "date": ["2018-01-01", "2018-02-01", "2018-01-20"],
        "code": ["LAB7", "LAB7", "LAB7"], "value": [7.1, 8.2, 6.9], "unit": ["pct"] * 3,
    })
    deaths = pd.DataFrame({"person_id": [2], "date": ["2020-02-02"], "cause_code": ["C0"]})
    return {"persons": persons, "coverage": coverage, "dispensings": dispensings,
            "diagnoses": diagnoses, "measurements": measurements, "deaths": deaths}


# persons 8 -> initiated 7 (8 never initiates) -> same_day 7 -> age 6 (4 is 28) ->
# coverage_before 5 (6) -> washout 5 -> require:t2d 4 (7); arms: class_a 1, 2, 3; class_b 5
EXPECTED_ATTRITION = [("persons", 8), ("initiated", 7), ("same_day", 7), ("age", 6),
                      ("coverage_before", 5), ("washout", 5), ("require:t2d", 4)]


def protocol_dict() -> dict:
    return {
        "study": {"id": "tiny-test", "title": "Tiny invented study"},
        "concepts": {
            "class_a": {"source": "dispensings", "codes": "codelists/class_a.csv"},
            "class_b": {"source": "dispensings", "codes": ["RXB"]},
            "t2d": {"source": "diagnoses", "codes": ["DM2"]},
            "hf_admission": {"source": "diagnoses", "codes": ["HF5"], "where": {"setting": "inpatient"}},
            "hba1c": {"source": "measurements", "codes": ["LAB7"]},
        },
        "eligibility": {
            "entry": {"start": "2016-01-01", "end": "2021-12-31"},
            "age": {"min": 40, "max": 85},
            "coverage_before_days": 365,
            "require": [{"concept": "t2d", "window": [-1825, 0]}],
        },
        "strategies": {"arms": {"class_a": {"initiate": "class_a"}, "class_b": {"initiate": "class_b"}},
                       "treated": "class_a", "washout_days": 365},
        "follow_up": {"max_days": 1095, "administrative_end": "2022-12-31"},
        "outcomes": {"primary": "hf_admission", "competing": ["death"]},
        "covariates": [
            {"name": "age", "builtin": "age"},
            {"name": "sex", "builtin": "sex"},
            {"name": "region", "attribute": "region", "kind": "categorical"},
            {"name": "hba1c", "concept": "hba1c", "window": [-365, 0], "summary": "last"},
        ],
        "analysis": {"horizons_days": [365, 730]},
    }


def write_protocol(folder: Path, data: dict | None = None, name: str = "protocol.yaml") -> Path:
    """Write the protocol YAML and its code list; returns the protocol file."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "codelists").mkdir(exist_ok=True)
    (folder / "codelists" / "class_a.csv").write_text("code,description\nRXA,class A (invented)\n")
    path = folder / name
    path.write_text(yaml.safe_dump(data if data is not None else protocol_dict(), sort_keys=False))
    return path


def write_extract(folder: Path, data: dict[str, pd.DataFrame] | None = None, fmt: str = "csv") -> Path:
    """Write each table as ``NAME.<fmt>`` (csv, csv.gz or parquet); returns the folder."""
    folder.mkdir(parents=True, exist_ok=True)
    for name, df in (data if data is not None else tables()).items():
        if fmt == "parquet":
            out = df.copy()
            for c in out.columns:
                if c in ("date", "birth_date", "start_date", "end_date"):
                    out[c] = pd.to_datetime(out[c]).dt.date
            out.to_parquet(folder / f"{name}.parquet", index=False)
        else:
            df.to_csv(folder / f"{name}.{fmt}", index=False)
    return folder


def protocol_problems(folder: Path, edit: Callable[[dict], object],
                      base: Callable[[], dict] = protocol_dict) -> list[str]:
    """The problems a ``ProtocolError`` lists for ``base()`` changed by ``edit`` (it must fail)."""
    d = copy.deepcopy(base())
    edit(d)
    with pytest.raises(ProtocolError) as info:
        load_protocol(write_protocol(folder, d))
    return info.value.problems


def one_problem(problems: list[str], start: str) -> str:
    """The one problem starting with ``start`` (fails when there are none or several)."""
    hits = [p for p in problems if p.startswith(start)]
    assert len(hits) == 1, problems
    return hits[0]
