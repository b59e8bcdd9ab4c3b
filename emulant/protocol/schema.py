"""The JSON Schema of the protocol, built from the key table (:mod:`emulant.protocol.keys`).

Editors that read a ``# yaml-language-server: $schema=...`` comment complete keys and flag errors
with it; ``emulant schema`` prints it. It checks shapes, types, allowed values and minimums; what
needs more than one key (a concept that must be defined, a window inside follow-up) is left to
the parser, which remains the judge.
"""

from __future__ import annotations

import json
from typing import Any

from emulant.protocol import keys
from emulant.protocol.keys import Key

DATE_PATTERN = r"^\d{4}-\d{2}-\d{2}$"


def _description(k: Key) -> str:
    text = k.meaning[0].upper() + k.meaning[1:] + "."
    if k.rule:
        text += " Rule: " + k.rule + "."
    if k.default_note:
        text += " Default: " + k.default_note + "."
    elif not k.required and k.default not in (None, {}, []):
        text += f" Default: {json.dumps(k.default)}."
    return text


def _object(path: str) -> dict[str, Any]:
    kids = keys.children(path)
    out: dict[str, Any] = {"type": "object", "properties": {k.name: node(k) for k in kids},
                           "additionalProperties": False}
    req = [k.name for k in kids if k.required]
    if req:
        out["required"] = req
    return out


def _plain(k: Key) -> dict[str, Any]:
    t = k.type
    if t == "text":
        s: dict[str, Any] = {"type": ["string", "number"]}
        if k.pattern:
            s = {"type": "string", "pattern": k.pattern}
        return s
    if t == "concept":
        return {"type": "string"}
    if t == "integer":
        return {"type": "integer", **({"minimum": k.minimum} if k.minimum is not None else {})}
    if t == "number":
        return {"type": "number"}
    if t == "boolean":
        return {"type": "boolean"}
    if t == "date":
        return {"type": "string", "pattern": DATE_PATTERN, "format": "date"}
    if t == "window":
        # [a, b]: whole days, b <= 0 (a record after the day it describes would decide the past)
        return {"type": "array", "items": [{"type": "integer"}, {"type": "integer", "maximum": 0}],
                "minItems": 2, "maxItems": 2}
    if t == "days":  # [a, b], 0 <= a <= b: days on or after time zero (a <= b is the parser's)
        return {"type": "array", "items": {"type": "integer", "minimum": 0}, "minItems": 2, "maxItems": 2}
    if t == "quantiles":
        return {"type": "array", "items": {"type": "number", "minimum": 0, "maximum": 1},
                "minItems": 2, "maxItems": 2}
    if t == "choice":
        return {"enum": list(k.allowed)}
    if t == "codes":
        return {"oneOf": [{"type": "string", "minLength": 1},
                          {"type": "array", "items": {"type": ["string", "number"]}, "minItems": 1}]}
    if t == "values":
        one = {"type": ["string", "number"]}
        return {"oneOf": [one, {"type": "array", "items": one, "minItems": 1}]}
    raise ValueError(f"no schema for type {t} ({k.path})")


def node(k: Key) -> dict[str, Any]:
    """The schema of one key (and everything below it)."""
    if k.type == "mapping":
        s = _object(k.path)
    elif k.type == "outcome":
        s = {"oneOf": [{"type": "string"}, _object(k.path)]}
    elif k.type == "names":
        s = {"type": "object", "additionalProperties": node(keys.BY_PATH[k.path + ".*"])}
        if k.path in ("concepts", "strategies.arms"):
            s["propertyNames"] = {"pattern": r"^[A-Za-z_][A-Za-z0-9_]*$"}
    elif k.type == "list":
        s = {"type": "array", "items": node(keys.BY_PATH[k.path + "[]"])}
    else:
        s = _plain(k)
    if not k.required:  # null (or nothing) means the default
        s = {"anyOf": [s, {"type": "null"}]}
        if k.default not in (None, {}) and not k.default_note:
            s["default"] = k.default  # editors offer it on completion
    return {"description": _description(k), **s}


def protocol_schema() -> dict[str, Any]:
    """The whole protocol's JSON Schema (draft-07, the draft editors read most widely)."""
    return {"$schema": "http://json-schema.org/draft-07/schema#",
            "title": "emulant protocol",
            "description": "A target trial and its emulation (emulant). Generated from emulant/protocol/keys.py.",
            **_object("")}


def schema_text() -> str:
    return json.dumps(protocol_schema(), indent=2, ensure_ascii=False) + "\n"
