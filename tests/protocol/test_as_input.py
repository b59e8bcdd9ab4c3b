"""The protocol as parsed, in the input's shape, parses back to the same protocol.

The parser is the reference (no outside source): for every example protocol and the test fixture,
``parse(as_input(p))`` equals ``p`` apart from the file's own path, text and hash, also after a
trip through YAML text (what a user pastes from the report's appendix).
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import pytest
import yaml
from tiny_extract import write_protocol

from emulant.protocol import keys, load_protocol, parse_protocol
from emulant.protocol.as_input import as_input, as_input_yaml

ROOT = Path(__file__).resolve().parents[2]
EXAMPLES = [*sorted((ROOT / "config" / "protocols").glob("*.yaml")), *sorted(Path(__file__).parent.glob("every_key*.yaml"))]


def _bare(p):
    return dataclasses.replace(p, path=None, text="", sha256="")


def _protocols(tmp_path):
    yield from (load_protocol(f) for f in EXAMPLES)
    yield load_protocol(write_protocol(tmp_path))


def test_as_input_parses_back_to_the_same_protocol(tmp_path):
    for p in _protocols(tmp_path):
        assert _bare(parse_protocol(as_input(p), p.base_dir)) == _bare(p), p.path


def test_pasted_yaml_parses_back(tmp_path):
    for p in _protocols(tmp_path):
        pasted = p.base_dir / "pasted.yaml"
        pasted.write_text(as_input_yaml(p), encoding="utf-8")
        try:
            assert _bare(load_protocol(pasted)) == _bare(p), p.path
        finally:
            pasted.unlink()


def test_manifest_shape_is_json_and_parses_back(tmp_path):
    for p in _protocols(tmp_path):
        shown = json.loads(json.dumps(as_input(p)))
        assert _bare(parse_protocol(shown, p.base_dir)) == _bare(p)


def test_defaults_are_written_out():
    p = load_protocol(ROOT / "config" / "protocols" / "measured-primary.yaml")
    d = yaml.safe_load(as_input_yaml(p))
    assert d["follow_up"] == {"max_days": 425, "administrative_end": None}
    assert d["analysis"]["period_days"] == 30 and d["analysis"]["censoring_weights"] is False
    assert d["covariates"][2] == {"name": "entry_year", "builtin": "calendar_year", "kind": "continuous",
                                  "missing": "indicator"}


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_every_parsed_key_comes_out(path):
    d = as_input(load_protocol(path))
    assert tuple(d) == keys.known("")


def test_date_like_text_stays_text(tmp_path):
    d = yaml.safe_load((ROOT / "tests" / "protocol" / "every_key.yaml").read_text())
    d["study"]["title"] = "2020-01-01"
    d["concepts"]["event"]["where"]["ward"] = "2021-02-03"
    f = tmp_path / "p.yaml"
    f.write_text(yaml.safe_dump(d, sort_keys=False))
    p = load_protocol(f)
    f.write_text(as_input_yaml(p))
    assert _bare(load_protocol(f)) == _bare(p)
