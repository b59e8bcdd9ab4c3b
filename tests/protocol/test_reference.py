"""The protocol's reference documents and JSON Schema agree with the parser.

The reference validator is the `jsonschema` package (Draft 7), an outside implementation of
the JSON Schema specification: every example protocol must pass it, and a sample of protocols the
parser rejects must fail it too. The documents must be exactly what the key table writes.
"""

from __future__ import annotations

import copy
import json
from pathlib import Path

import jsonschema
import pytest
import yaml
from tiny_extract import protocol_dict, write_protocol

from emulant import cli
from emulant.protocol import ProtocolError, keys, load_protocol
from emulant.protocol.reference import DOC_FILE, SCHEMA_FILE, protocol_markdown
from emulant.protocol.schema import protocol_schema, schema_text

ROOT = Path(__file__).resolve().parents[2]
EXAMPLES = [*sorted((ROOT / "config" / "protocols").glob("*.yaml")), *sorted(Path(__file__).parent.glob("every_key*.yaml"))]
REGENERATE = "run `python -m emulant.protocol.reference` and commit the rewritten files"


def as_json(data):
    """What an editor's YAML reader hands the validator: dates as their ISO text."""
    return json.loads(json.dumps(data, default=str))


@pytest.fixture(scope="module")
def validator():
    schema = protocol_schema()
    jsonschema.Draft7Validator.check_schema(schema)
    return jsonschema.Draft7Validator(schema)


def test_protocol_doc_is_up_to_date():
    assert (ROOT / DOC_FILE).read_text(encoding="utf-8") == protocol_markdown(), \
        f"{DOC_FILE} differs from the key table: " + REGENERATE


def test_shipped_schema_is_up_to_date():
    assert SCHEMA_FILE.read_text(encoding="utf-8") == schema_text(), \
        f"{SCHEMA_FILE.name} differs from the key table: " + REGENERATE


def test_every_key_is_documented_and_in_the_schema():
    doc = (ROOT / DOC_FILE).read_text(encoding="utf-8")
    text = schema_text()
    for k in keys.KEYS:
        assert f"| `{k.path}` |" in doc, k.path
        if k.name != "*" and not k.path.endswith("[]"):
            assert f'"{k.name}"' in text, k.path


def test_schema_defaults_are_valid_values(validator):
    """Each default the schema offers an editor is a value the schema itself accepts."""
    def walk(node):
        if isinstance(node, dict):
            if "default" in node:
                assert jsonschema.Draft7Validator({k: v for k, v in node.items() if k != "default"}).is_valid(node["default"])
            for v in node.values():
                walk(v)
        elif isinstance(node, list):
            for v in node:
                walk(v)
    walk(protocol_schema())


def test_schema_command_prints_the_schema(capsys):
    assert cli.main(["schema"]) == 0
    assert json.loads(capsys.readouterr().out) == protocol_schema()


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_examples_validate(path, validator):
    load_protocol(path)  # the parser accepts it ...
    errors = [e.message for e in validator.iter_errors(as_json(yaml.safe_load(path.read_text())))]
    assert not errors  # ... and so does the schema


def test_fixture_protocol_validates(validator):
    assert not list(validator.iter_errors(as_json(protocol_dict())))


def _set(path, value):
    def edit(d):
        node = d
        *head, last = path
        for k in head:
            node = node.setdefault(k, {})
        node[last] = value
    return edit


def _drop(path):
    def edit(d):
        node = d
        *head, last = path
        for k in head:
            node = node[k]
        del node[last]
    return edit


# Protocols the parser rejects, each one edit of the valid fixture; the schema must reject them too.
REJECTED = {
    "unknown top-level key": _set(("eligibilty",), {}),
    "unknown nested key": _set(("analysis", "bootstrap", "replicate"), 10),
    "missing required section": _drop(("outcomes",)),
    "missing study id": _drop(("study", "id")),
    "bad study id": _set(("study", "id"), "Tiny Test"),
    "bad date": _set(("eligibility", "entry", "start"), "2016-13"),
    "negative minimum": _set(("eligibility", "coverage_before_days"), -1),
    "text for an integer": _set(("follow_up", "max_days"), "long"),
    "bad choice": _set(("strategies", "same_day"), "both"),
    "bad estimand": _set(("estimands",), ["ATX"]),
    "bad method": _set(("analysis", "methods"), ["magic"]),
    "window ending after day 0": _set(("eligibility", "require"), [{"concept": "t2d", "window": [-30, 10]}]),
    "window of three": _set(("eligibility", "require"), [{"concept": "t2d", "window": [-1, 0, 1]}]),
    "truncate out of range": _set(("analysis", "weights", "truncate"), [0.5, 1.5]),
    "boolean as text": _set(("analysis", "hazard_ratio"), "yes"),
    "bad concept name": _set(("concepts", "bad name"), {"source": "diagnoses", "codes": ["X"]}),
    "concept without codes": _set(("concepts", "extra"), {"source": "diagnoses"}),
    "arm with unknown key": _set(("strategies", "arms", "class_a", "start"), "class_a"),
    "covariate without name": _set(("covariates",), [{"builtin": "age"}]),
    "bad summary": _set(("covariates",), [{"name": "x", "concept": "t2d", "window": [-9, 0], "summary": "median"}]),
    "measured outcome missing at_day": _set(("outcomes", "primary"), {"measure": "hba1c"}),
    "horizon zero": _set(("analysis", "horizons_days"), [0]),
    "min_cell zero": _set(("report", "min_cell"), 0),
}


@pytest.mark.parametrize("name", sorted(REJECTED))
def test_parser_rejections_are_schema_rejections(name, validator, tmp_path):
    load_protocol(write_protocol(tmp_path / "valid"))
    d = copy.deepcopy(protocol_dict())
    REJECTED[name](d)
    with pytest.raises(ProtocolError):
        load_protocol(write_protocol(tmp_path / "edited", d))
    assert list(validator.iter_errors(as_json(d))), f"the schema accepts what the parser rejects: {name}"
