"""The protocol's reference documents, written from the key table (:mod:`emulant.protocol.keys`).

``python -m emulant.protocol.reference`` rewrites ``docs/protocol.md`` and the shipped JSON Schema
``emulant/protocol/protocol.schema.json``; ``tests/protocol/test_reference.py`` fails when either
differs from what this module writes, so the documents never drift from the parser.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

from emulant.protocol import keys
from emulant.protocol.keys import Key
from emulant.protocol.schema import schema_text

SCHEMA_FILE = Path(__file__).with_name("protocol.schema.json")
DOC_FILE = "docs/protocol.md"

INTRO = """\
# The protocol: every key

<!-- Written by `python -m emulant.protocol.reference` from emulant/protocol/keys.py; do not edit. -->

One YAML file states the target trial and its emulation, component by component. This page lists
every key the parser accepts, with its type, its default (an absent key, or `null`, takes it), the
allowed values, what it means, an example and the rule of the trial or of the emulation it drives.
Unknown keys are errors, with the nearest known key suggested; `emulant check --extract PATH
--protocol FILE` lists every problem at once.

- Paths: `a.b` is key `b` inside `a`; `*` is a name you choose (a concept, an arm, a column);
  `[]` is each item of a list.
- Relative paths (code-list files) resolve against the protocol file's own folder.
- Days are relative to time zero (day 0). A window `[a, b]` holds the records on days `a <= k <= b`.
- Complete examples, one per design and kind of outcome: `config/protocols/`, described with a
  worked example in [designs.md](designs.md); the extract's tables in [extract.md](extract.md);
  the files a run writes in [results.md](results.md).
- A first draft from your own extract: `emulant draft --extract PATH --out FILE` (the tables,
  date ranges and frequent code prefixes it finds, a placeholder for every required key).
- Editors: `emulant schema > protocol.schema.json` writes the JSON Schema (also shipped as
  `emulant/protocol/protocol.schema.json`); a first line
  `# yaml-language-server: $schema=protocol.schema.json` makes editors that read it complete keys
  and flag errors while you type. The schema checks shapes, types, allowed values and minimums;
  what needs two keys at once (a concept that must be defined, a horizon within follow-up) is
  checked by `emulant check` alone.
- The report's appendix and `manifest.json` (`protocol.as_parsed`) show the protocol as parsed, in
  this same shape with every default filled in: pasted into a file, it parses to the same protocol.
"""

TYPE_WORDS = {
    "mapping": "mapping", "names": "mapping of names", "list": "list", "text": "text",
    "integer": "integer", "number": "number", "boolean": "true/false", "date": "date YYYY-MM-DD",
    "window": "window [a, b]", "choice": "one of the values", "concept": "concept name",
    "codes": "codes: list or CSV file", "values": "value or list of values",
    "quantiles": "[low, high], 0 <= low < high <= 1", "outcome": "concept name or mapping",
    "days": "[a, b], 0 <= a <= b",
}


def _yaml_inline(v) -> str:
    return json.dumps(v, ensure_ascii=False).replace('"', "") if not isinstance(v, str) else v


def _default(k: Key) -> str:
    if k.path.endswith("[]") or k.path.endswith("*"):
        return ""  # an item of a list or a named entry: present or not, no default
    if k.required:
        return "**required**"
    if k.default_note:
        return k.default_note
    if k.default is None:
        return "none"
    if k.default in ({}, [], ""):
        return "empty"
    return f"`{_yaml_inline(k.default)}`"


def _row(k: Key) -> str:
    what = k.meaning
    if k.allowed:
        what += "; one of " + ", ".join(f"`{a}`" for a in k.allowed)
    if k.minimum is not None:
        what += f"; at least {k.minimum}"
    if k.pattern:
        what += f"; pattern `{k.pattern}`"
    rule = k.rule or ""
    example = f"`{_yaml_inline(k.example)}`" if k.example is not None else ""
    cells = [f"`{k.path}`", TYPE_WORDS[k.type], _default(k), what, rule, example]
    return "| " + " | ".join(c.replace("|", "\\|") for c in cells) + " |"


def protocol_markdown() -> str:
    """``docs/protocol.md``: one table per top-level key, every row of the key table in order."""
    out = [INTRO]
    for top in keys.children(""):
        out.append(f"\n## `{top.path}`\n\n{top.meaning[0].upper() + top.meaning[1:]}.\n")
        out.append("| key | type | default | meaning | rule it drives | example |")
        out.append("|---|---|---|---|---|---|")
        for k in keys.KEYS:
            if k.path == top.path or k.path.startswith(top.path + ".") or k.path.startswith(top.path + "["):
                out.append(_row(k))
    return "\n".join(out) + "\n"


def write_all(root: Path) -> list[Path]:
    """Rewrite the protocol reference and the shipped schema under the repository ``root``."""
    doc = root / DOC_FILE
    doc.parent.mkdir(parents=True, exist_ok=True)
    doc.write_text(protocol_markdown(), encoding="utf-8")
    SCHEMA_FILE.write_text(schema_text(), encoding="utf-8")
    return [doc, SCHEMA_FILE]


if __name__ == "__main__":
    root = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).resolve().parents[2]
    for f in write_all(root):
        print(f"wrote {f}")
