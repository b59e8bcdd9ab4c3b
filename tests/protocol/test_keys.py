"""The key table (emulant/protocol/keys.py) against what the readers actually read.

A recording collector stands in for the readers' collector while every example protocol (and
tests/protocol/every_key.yaml, which sets every key) is parsed;
each key path a reader asks for, with the reader's type, allowed values, minimum and default, must
be the table's row, and every mapping of the table must be visited by some example. The defaults of
the table must be what parsing a minimal protocol fills in. No outside source: these are the
project's own agreement checks (the parser is the reference for the documents and the schema).
"""

from __future__ import annotations

import copy
from pathlib import Path

import pytest
import yaml
from two_arm import two_arm_protocol

from emulant.protocol import keys, load_protocol, reader
from emulant.protocol.as_input import as_input
from emulant.protocol.collector import Collector

ROOT = Path(__file__).resolve().parents[2]
EXAMPLES = [*sorted((ROOT / "config" / "protocols").glob("*.yaml")), *sorted(Path(__file__).parent.glob("every_key*.yaml"))]
HOW = ("emulant/protocol/keys.py is the one list of protocol keys: add a Key row there (type, "
       "default, allowed values, meaning, example, rule), take the mapping's keys in the reader "
       "from keys.known()/keys.required(), add the key to emulant/protocol/as_input.py, then run "
       "`python -m emulant.protocol.reference` to rewrite docs/protocol.md and the JSON Schema")

#: Collector method -> the table types it may read.
METHOD_TYPES = {"mapping": {"mapping", "outcome", "names"}, "integer": {"integer"}, "number": {"number"},
                "boolean": {"boolean"}, "choice": {"choice"}, "text": {"text"}, "date": {"date"},
                "window": {"window"}, "listing": {"list"}, "days": {"days"}}


class Recorder(Collector):
    calls: list[tuple] = []

    def _rec(self, method, key, **info):
        Recorder.calls.append((method, key, info))

    def mapping(self, node, key, known, required=()):
        self._rec("mapping", key, known=tuple(known), required=tuple(required))
        return super().mapping(node, key, known, required)

    def integer(self, v, key, default, minimum=None):
        self._rec("integer", key, default=default, minimum=minimum)
        return super().integer(v, key, default, minimum)

    def number(self, v, key, default):
        self._rec("number", key, default=default)
        return super().number(v, key, default)

    def boolean(self, v, key, default):
        self._rec("boolean", key, default=default)
        return super().boolean(v, key, default)

    def choice(self, v, key, options, default):
        self._rec("choice", key, options=tuple(options), default=default)
        return super().choice(v, key, options, default)

    def text(self, v, key, default=""):
        self._rec("text", key, default=default)
        return super().text(v, key, default)

    def date(self, v, key):
        self._rec("date", key)
        return super().date(v, key)

    def window(self, v, key):
        self._rec("window", key)
        return super().window(v, key)

    def days(self, v, key):
        self._rec("days", key)
        return super().days(v, key)

    def listing(self, v, key):
        self._rec("listing", key)
        return super().listing(v, key)


@pytest.fixture(scope="module")
def recorded():
    Recorder.calls = []
    mp = pytest.MonkeyPatch()
    mp.setattr(reader, "Collector", Recorder)
    try:
        for f in EXAMPLES:
            load_protocol(f)
    finally:
        mp.undo()
    return list(Recorder.calls)


def test_there_are_examples():
    assert any(f.name == "demo.yaml" for f in EXAMPLES)


def test_every_key_the_readers_read_is_in_the_table(recorded):
    problems = []
    for method, key, info in recorded:
        path = keys.table_path(key)
        row = keys.BY_PATH.get(path) if path else keys.Key("", "mapping", "the top level")
        if row is None:
            problems.append(f"the reader reads '{path}' ({method}) but the key table has no row for it")
            continue
        if row.type not in METHOD_TYPES[method]:
            problems.append(f"'{path}': the reader reads it as {method}, the table says {row.type}")
        if method == "mapping" and row.type != "names":
            if set(info["known"]) != set(keys.known(path)):
                problems.append(f"'{path}': the reader knows {sorted(info['known'])}, the table {sorted(keys.known(path))}")
            if set(info["required"]) != set(keys.required(path)):
                problems.append(f"'{path}': the reader requires {sorted(info['required'])}, the table {sorted(keys.required(path))}")
        # a reader may narrow the table's values by other keys (e.g. to the methods asked for)
        if method == "choice" and not set(info["options"]) <= set(row.allowed):
            problems.append(f"'{path}': the reader allows {info['options']}, the table {row.allowed}")
        if method == "integer" and info["minimum"] != row.minimum:
            problems.append(f"'{path}': the reader's minimum is {info['minimum']}, the table's {row.minimum}")
        scalar_default = method in ("integer", "number", "boolean", "choice") and not path.endswith("[]")
        if scalar_default and not row.required and not row.default_note and info["default"] != row.default:
            problems.append(f"'{path}': the reader's default is {info['default']!r}, the table's {row.default!r}")
    assert not problems, "\n".join(problems) + "\n" + HOW


def test_every_mapping_in_the_table_is_read_by_some_example(recorded):
    seen = {keys.table_path(key) for method, key, _ in recorded}
    unseen = [k.path for k in keys.KEYS if k.type in ("mapping", "outcome") and k.path not in seen
              and not k.path.startswith("study.target_trial")]
    assert not unseen, (f"no example protocol uses {unseen}; set it in tests/protocol/every_key.yaml "
                        f"so the test can compare the reader's keys with the table. " + HOW)


def test_table_rows_are_well_formed():
    for k in keys.KEYS:
        assert k.type in keys.TYPES, k.path
        assert k.meaning, k.path
        assert k.path == "" or keys.parent(k.path) == "" or keys.parent(k.path) in keys.BY_PATH, k.path
        if k.type == "choice":
            assert k.allowed, k.path
            assert k.example is None or k.example in k.allowed, k.path
    assert len(keys.BY_PATH) == len(keys.KEYS), "a path is listed twice"


def _at(d, path):
    node = d
    for part in path.split("."):
        if not isinstance(node, dict) or part not in node:
            return KeyError
        node = node[part]
    return node


def test_table_defaults_are_what_the_parser_fills_in():
    """Every fixed default of the table, read off a minimal protocol as parsed."""
    parsed = as_input(two_arm_protocol("defaults"))
    checked = 0
    for k in keys.KEYS:
        if k.required or "*" in k.path or "[]" in k.path or k.default_note:
            continue
        if k.path.startswith("study.target_trial.") or k.path.startswith("outcomes.primary."):
            continue
        got = _at(parsed, k.path)
        assert got is not KeyError, f"'{k.path}' is missing from as_input(). " + HOW
        if k.type == "mapping":
            continue
        assert got == k.default, f"'{k.path}': the parser fills {got!r}, the table says {k.default!r}"
        checked += 1
    assert checked >= 25


def test_as_input_has_no_key_outside_the_table():
    def walk(node, path):
        row = keys.BY_PATH.get(path) if path else None
        if isinstance(node, dict) and (path == "" or row.type in ("mapping", "outcome", "names")):
            for k, v in node.items():
                sub = keys.table_path(f"{path}.{k}" if path else k)
                assert sub in keys.BY_PATH, f"as_input() writes '{sub}', which the key table lacks. " + HOW
                walk(v, sub)
        elif isinstance(node, list) and row.type == "list":
            for v in node:
                walk(v, path + "[]")

    for f in EXAMPLES:
        walk(as_input(load_protocol(f)), "")


def test_table_path_reads_reader_keys():
    assert keys.table_path("covariates[2] (age).kind") == "covariates[].kind"
    assert keys.table_path("concepts.kestrel.where.setting") == "concepts.*.where.*"
    assert keys.table_path("strategies.arms.plover.initiate") == "strategies.arms.*.initiate"
    assert keys.table_path("outcomes.secondary[0].at_day") == "outcomes.secondary[].at_day"
    assert keys.table_path("") == ""


def test_a_key_missing_from_the_table_is_caught(recorded):
    """The check itself can fail: drop one row and the reader's key shows up as unknown."""
    bad = copy.copy(keys.BY_PATH)
    bad.pop("strategies.washout_days")
    missing = [key for _, key, _ in recorded if keys.table_path(key) not in bad]
    assert "strategies.washout_days" in missing


def test_example_yaml_parses(tmp_path):
    for f in EXAMPLES:
        assert isinstance(yaml.safe_load(f.read_text()), dict)
