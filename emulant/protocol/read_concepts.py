"""Reading ``concepts`` and ``eligibility`` (CONTRACTS §2 code lists, §3a steps)."""

from __future__ import annotations

import datetime as dt
import difflib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import pandas as pd

from emulant.protocol.collector import NAME_PATTERN, Collector
from emulant.protocol.keys import known, required
from emulant.protocol.model import DEATH, Concept, Criterion, Eligibility


def read_codes(c: Collector, node: Any, key: str, base: Path) -> tuple[tuple[str, ...], tuple, str | None]:
    if isinstance(node, list):
        codes = tuple(str(x).strip() for x in node if str(x).strip())
        if not codes:
            c.add(key, "the code list is empty")
        return codes, (), None
    if isinstance(node, str):
        p = Path(node)
        p = p if p.is_absolute() else base / p
        if not p.is_file():
            c.add(key, f"code-list file {p} does not exist")
            return (), (), node
        try:
            df = pd.read_csv(p, dtype=str, keep_default_na=False)
        except Exception as exc:  # noqa: BLE001 - any parse failure is reported, never raised
            c.add(key, f"code-list file {p} could not be read as CSV ({exc})")
            return (), (), node
        if "code" not in df.columns:
            c.add(key, f"code-list file {p} has no 'code' column (columns: {', '.join(df.columns)})")
            return (), (), node
        codes = tuple(s.strip() for s in df["code"] if s.strip())
        if not codes:
            c.add(key, f"code-list file {p} has no codes")
        desc = ()
        if "description" in df.columns:
            desc = tuple((str(a).strip(), str(b)) for a, b in zip(df["code"], df["description"], strict=True))
        return codes, desc, node
    c.add(key, f"expected a list of codes or a CSV file name, got {node!r}")
    return (), (), None


def read_concepts(c: Collector, node: Any, base: Path) -> dict[str, Concept]:
    out: dict[str, Concept] = {DEATH: Concept(name=DEATH, source="deaths", codes=(), match="exact")}
    if node is None:
        return out
    if not isinstance(node, dict):
        c.add("concepts", "expected a mapping of concept names")
        return out
    for name, spec in node.items():
        key = f"concepts.{name}"
        if name == DEATH:
            c.add(key, "'death' is built in (the deaths table); choose another name")
            continue
        if not NAME_PATTERN.match(str(name)):
            c.add(key, "a concept name must be letters, digits and underscores, starting with a letter")
        d = c.mapping(spec, key, known("concepts.*"), required("concepts.*"))
        source = c.text(d.get("source"), f"{key}.source")
        if source in ("persons", "coverage", "deaths"):
            c.add(f"{key}.source", f"'{source}' holds no codes; use an event source (dispensings, diagnoses, measurements …)")
        codes, desc, file = read_codes(c, d.get("codes"), f"{key}.codes", base) if "codes" in d else ((), (), None)
        match = c.choice(d.get("match"), f"{key}.match", ("prefix", "exact"), "prefix")
        where_node = c.mapping(d.get("where"), f"{key}.where", tuple(d.get("where") or ()))
        where = []
        for col, val in where_node.items():
            vals = val if isinstance(val, list) else [val]
            if not vals or not all(isinstance(v, str | int | float) and not isinstance(v, bool) for v in vals):
                c.add(f"{key}.where.{col}", f"expected a value or a list of values, got {val!r}")
                continue
            where.append((str(col), tuple(str(v) for v in vals)))
        out[str(name)] = Concept(str(name), source, codes, match or "prefix", tuple(where), desc, file)
    return out


def need_concept(c: Collector, concepts: Mapping[str, Concept], name: Any, key: str) -> str:
    if not isinstance(name, str) or name not in concepts:
        near = difflib.get_close_matches(str(name), list(concepts), n=1, cutoff=0.5)
        hint = f"; did you mean '{near[0]}'?" if near else f"; defined: {', '.join(concepts)}"
        c.add(key, f"concept {name!r} is not defined under concepts{hint}")
    return str(name)


def read_criteria(c: Collector, node: Any, key: str, concepts) -> tuple[Criterion, ...]:
    out = []
    for i, item in enumerate(c.listing(node, key)):
        k = f"{key}[{i}]"
        d = c.mapping(item, k, known(f"{key}[]"), required(f"{key}[]"))
        name = need_concept(c, concepts, d.get("concept"), f"{k}.concept") if d.get("concept") else ""
        w = c.window(d.get("window"), f"{k}.window") or (0, 0)
        out.append(Criterion(name, w))
    return tuple(out)


def read_eligibility(c: Collector, node: Any, concepts: Mapping[str, Concept]) -> Eligibility:
    """``eligibility``: the entry window, age, coverage before time zero, requirements and exclusions."""
    e = c.mapping(node, "eligibility", known("eligibility"), required("eligibility"))
    entry = c.mapping(e.get("entry"), "eligibility.entry", known("eligibility.entry"), required("eligibility.entry"))
    es, ee = c.date(entry.get("start"), "eligibility.entry.start"), c.date(entry.get("end"), "eligibility.entry.end")
    if es and ee and es > ee:
        c.add("eligibility.entry", f"start {es} is after end {ee} (expected start <= end)")
    age = c.mapping(e.get("age"), "eligibility.age", known("eligibility.age"))
    amin = c.integer(age.get("min"), "eligibility.age.min", None, 0)
    amax = c.integer(age.get("max"), "eligibility.age.max", None, 0)
    if amin is not None and amax is not None and amin > amax:
        c.add("eligibility.age", f"min {amin} is above max {amax}")
    elig = Eligibility(es or dt.date(1900, 1, 1), ee or dt.date(1900, 1, 1), amin, amax,
                       c.integer(e.get("coverage_before_days"), "eligibility.coverage_before_days", 365, 0) or 0,
                       read_criteria(c, e.get("require"), "eligibility.require", concepts),
                       read_criteria(c, e.get("exclude"), "eligibility.exclude", concepts))
    return elig
