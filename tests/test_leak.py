"""The leak test: nothing that leaves the run folder gives back a count below ``min_cell`` or a
person's identifier or date.

A small invented extract (the demo generator, 600 persons) is run twice with ``min_cell`` 10, so
that several cells fall below it; between the runs two eligible persons leave the extract (a
two-person change between deliveries). Then:

* the published tables are solved as a system of linear equations and inequalities — each
  report's flow table (remaining = next remaining + excluded), the baseline table (levels add up
  to the arm's n; a 0/1 row and its complement add up to n), the archived overlap histogram (bins
  add up to the arm's n) and the "since the previous run" table (then and now, the change) —
  and every count the system pins to one value must be 0 or at least ``min_cell``: in the current
  report, the changes between deliveries too; across both reports, every cell of either run (the
  bounds by
  linear programming, the interval audit of a suppressed table: common practice in statistical
  disclosure control, e.g. Hundepool et al., *Statistical Disclosure Control*, Wiley 2012,
  ch. 4, from memory);
* every archived file, the ledger, the rule logs and the captured terminal output are scanned
  for the extract's person identifiers (``P`` and seven digits), for the dates of the planted
  implausible rows, and for the oldest birth date.
"""

from __future__ import annotations

import html
import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from scipy.optimize import linprog

ROOT = Path(__file__).resolve().parents[1]
MIN_CELL = 10
PERSON_ID = re.compile(r"P\d{7}")
PLANTED_DATE = "1901-02-03"
OFFSET = 1e6  # keeps a change (now minus then) non-negative in the linear program
pytestmark = pytest.mark.slow


# ----------------------------------------------------------------------------- the system


class System:
    """Non-negative integer unknowns (relaxed to reals) with equalities and interval bounds."""

    def __init__(self):
        self.index: dict[str, int] = {}
        self.eq: list[tuple[dict[str, float], float]] = []
        self.ub: list[tuple[dict[str, float], float]] = []
        self.offset: dict[str, float] = {}

    def var(self, name: str) -> str:
        self.index.setdefault(name, len(self.index))
        return name

    def equal(self, coefs: dict[str, float], rhs: float) -> None:
        for n in coefs:
            self.var(n)
        self.eq.append((coefs, rhs))

    def between(self, coefs: dict[str, float], lo: float, hi: float) -> None:
        for n in coefs:
            self.var(n)
        self.ub.append(({k: -v for k, v in coefs.items()}, -lo))
        self.ub.append((coefs, hi))

    def change(self, name: str, now: str, then: str) -> None:
        """An unknown equal to ``now - then`` (stored shifted by OFFSET, so it stays >= 0)."""
        self.offset[self.var(name)] = OFFSET
        self.equal({name: 1, now: -1, then: 1}, OFFSET)

    def shown(self, name: str, text: str) -> None:
        """A published cell: an exact count, ``<m`` (1 to m - 1) or hidden (any count >= 0)."""
        self.var(name)
        t = text.replace(",", "").strip()
        if re.fullmatch(r"\d+", t):
            self.equal({name: 1}, float(t))
        elif t == f"<{MIN_CELL}":
            self.between({name: 1}, 1, MIN_CELL - 1)

    def _matrix(self, rows):
        a = np.zeros((len(rows), len(self.index)))
        for i, (coefs, _) in enumerate(rows):
            for k, v in coefs.items():
                a[i, self.index[k]] += v
        return a, np.array([r for _, r in rows], dtype=float)

    def bounds_of(self, name: str) -> tuple[float, float]:
        a_eq, b_eq = self._matrix(self.eq)
        a_ub, b_ub = self._matrix(self.ub)
        c = np.zeros(len(self.index))
        c[self.index[name]] = 1.0
        kw = {"A_eq": a_eq if len(b_eq) else None, "b_eq": b_eq if len(b_eq) else None,
              "A_ub": a_ub if len(b_ub) else None, "b_ub": b_ub if len(b_ub) else None,
              "bounds": [(0, None)] * len(self.index), "method": "highs"}
        lo = linprog(c, **kw)
        hi = linprog(-c, **kw)
        assert lo.status == 0, f"the published tables contradict each other ({lo.message})"
        return lo.fun, (-hi.fun if hi.status == 0 else float("inf"))

    def recovered_small(self) -> dict[str, float]:
        """Unknowns the system pins to one value between 1 and min_cell - 1."""
        out = {}
        for name in self.index:
            lo, hi = self.bounds_of(name)
            value = abs(lo - self.offset.get(name, 0.0))
            if hi - lo < 0.5 and 0.5 < value < MIN_CELL - 0.5:
                out[name] = round(value)
        return out


def test_the_audit_finds_a_recoverable_cell():
    """The checker itself: 22 -> 20 with the 2 excluded shown as <10 gives 2 back."""
    s = System()
    s.shown("r0", "22"), s.shown("r1", "20"), s.shown("x1", "<10")
    s.equal({"r0": 1, "r1": -1, "x1": -1}, 0)
    assert s.recovered_small() == {"x1": 2}
    t = System()
    t.shown("r0", "—"), t.shown("r1", "20"), t.shown("x1", "<10")
    t.equal({"r0": 1, "r1": -1, "x1": -1}, 0)
    assert t.recovered_small() == {}
    u = System()  # then 600, now 598: a two-person change between deliveries
    u.shown("p", "600"), u.shown("c", "598")
    u.change("d", "c", "p")
    assert u.recovered_small() == {"d": 2}


# ----------------------------------------------------------------------------- HTML tables


def _cell_text(raw: str) -> str:
    return html.unescape(re.sub(r"<[^>]+>", "", raw)).strip()


def section_tables(page: str, section: str) -> list[dict]:
    """Tables of one ``<section id=...>``: header texts and rows (cell texts, row classes)."""
    m = re.search(rf'<section id="{section}"[^>]*>(.*?)</section>', page, re.S)
    if not m:
        return []
    out = []
    for tab in re.findall(r"<table[^>]*>(.*?)</table>", m.group(1), re.S):
        head = re.search(r"<thead>(.*?)</thead>", tab, re.S)
        headers = [_cell_text(c) for c in re.findall(r"<th[^>]*>(.*?)</th>", head.group(1), re.S)] if head else []
        body = re.search(r"<tbody>(.*?)</tbody>", tab, re.S)
        rows = []
        for tr_attr, tr in re.findall(r"<tr([^>]*)>(.*?)</tr>", body.group(1) if body else "", re.S):
            cells = re.findall(r"<t([hd])([^>]*)>(.*?)</t[hd]>", tr, re.S)
            rows.append({"cls": tr_attr, "cells": [_cell_text(c[2]) for c in cells],
                         "level": 'class="level"' in (cells[0][1] if cells else "")})
        out.append({"headers": headers, "rows": rows})
    return out


def _col(headers: list[str], word: str) -> int:
    return next(i for i, h in enumerate(headers) if h.lower().startswith(word.lower()))


def add_flow(s: System, page: str, run: str) -> int:
    """A report's flow table: remaining[i-1] = remaining[i] + excluded[i]. Returns hidden cells."""
    tab = section_tables(page, "attrition")[0]
    ix, ir = _col(tab["headers"], "Excluded"), _col(tab["headers"], "Remaining")
    hidden = 0
    for i, r in enumerate(tab["rows"]):
        step = r["cells"][0]
        s.shown(f"{run}:rem:{step}", r["cells"][ir])
        hidden += r["cells"][ir] in (f"<{MIN_CELL}", "—")
        if i:
            s.shown(f"{run}:exc:{step}", r["cells"][ix])
            hidden += r["cells"][ix] in (f"<{MIN_CELL}", "—")
            prev = tab["rows"][i - 1]["cells"][0]
            s.equal({f"{run}:rem:{prev}": 1, f"{run}:rem:{step}": -1, f"{run}:exc:{step}": -1}, 0)
    return hidden


def add_comparison(s: System, page: str) -> None:
    """Then and now: each step's previous and current count and the change between them."""
    tabs = [t for t in section_tables(page, "since-previous") if t["headers"][:1] == ["Step"]]
    tab = tabs[0]
    ip, ic, ich = (_col(tab["headers"], w) for w in ("Previous", "Current", "Change"))
    for r in tab["rows"]:
        step = r["cells"][0]
        p, c = f"prev:rem:{step}", f"now:rem:{step}"
        s.shown(p, r["cells"][ip])
        s.shown(c, r["cells"][ic])
        # the change between deliveries is a count of persons too (those who came or left)
        s.change(f"change:{step}", c, p)
        ch = r["cells"][ich].replace(",", "")
        if ch == "none":
            s.equal({c: 1, p: -1}, 0)
        elif re.fullmatch(r"[+-]\d+", ch):
            s.equal({c: 1, p: -1}, float(ch))
        elif ch.endswith("more"):
            s.between({c: 1, p: -1}, 1, MIN_CELL - 1)
        elif ch.endswith("fewer"):
            s.between({p: 1, c: -1}, 1, MIN_CELL - 1)


def add_baseline(s: System, page: str) -> int:
    """Categorical levels add up to the arm's n; a 0/1 row with no missing row adds up with its
    complement to n. Returns the number of hidden cells."""
    tab = section_tables(page, "baseline")[0]
    arms = [h for h in tab["headers"][1:] if "n =" in h]
    ns = {}
    for j, h in enumerate(arms):
        s.shown(f"n:{j}", h.split("n =")[1])
        ns[j] = f"n:{j}"
    hidden, group, rows = 0, None, tab["rows"]
    for k, r in enumerate(rows):
        cells = [c.split(" (")[0] for c in r["cells"][1:1 + len(arms)]]
        if 'class="head"' in r["cls"]:
            group = r["cells"][0]
            continue
        if r["level"] and group is not None:
            for j, c in enumerate(cells):
                s.shown(f"{group}={r['cells'][0]}:{j}", c)
                hidden += c in (f"<{MIN_CELL}", "—")
            last = k + 1 == len(rows) or not rows[k + 1]["level"]
            if last:
                levels = [x for x in s.index if x.startswith(f"{group}=")]
                for j in range(len(arms)):
                    mine = {x: 1.0 for x in levels if x.endswith(f":{j}")}
                    s.equal({**mine, ns[j]: -1.0}, 0)
                group = None
            continue
        group = None
        label = r["cells"][0]
        if label.endswith("n (%)") and not (k + 1 < len(rows) and rows[k + 1]["cells"][0].startswith("missing")):
            for j, c in enumerate(cells):
                s.shown(f"{label}:{j}", c)
                hidden += c in (f"<{MIN_CELL}", "—")
                s.equal({f"{label}:{j}": 1, f"{label}:not:{j}": 1, ns[j]: -1}, 0)
    return hidden


def add_histogram(s: System, pos: dict) -> None:
    """The archived overlap histogram: each arm's bins add up to its n."""
    for arm, cells in pos["propensity_bins"]["counts"].items():
        s.shown(f"hist-n:{arm}", str(pos["n"][arm]))
        names = []
        for i, c in enumerate(cells):
            s.shown(f"hist:{arm}:{i}", str(c))
            names.append(f"hist:{arm}:{i}")
        s.equal({**{n: 1.0 for n in names}, f"hist-n:{arm}": -1.0}, 0)


# ----------------------------------------------------------------------------- the runs


def _env() -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(ROOT), env.get("PYTHONPATH", "")]))
    return env


def _emulant(wd: Path, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "emulant.cli", *args], cwd=wd, capture_output=True,
                          text=True, timeout=900, env=_env())


def _drop_persons(extract: Path, ids: list[str]) -> None:
    for f in extract.glob("*.parquet"):
        df = pd.read_parquet(f)
        df[~df["person_id"].isin(ids)].to_parquet(f, index=False)


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    from synthetic_cohort.generate import write_synthetic

    wd = tmp_path_factory.mktemp("leak")
    shutil.copytree(ROOT / "config", wd / "config")
    extract = wd / "data" / "extract"
    write_synthetic(extract, persons=600, seed=5)
    diag = pd.read_parquet(extract / "diagnoses.parquet")
    planted = diag.iloc[:2].copy()
    planted["date"] = pd.to_datetime(PLANTED_DATE).date()  # before birth: an implausible row
    pd.concat([diag, planted], ignore_index=True).to_parquet(extract / "diagnoses.parquet", index=False)
    proto_path = wd / "config" / "protocols" / "demo.yaml"
    proto = yaml.safe_load(proto_path.read_text())
    proto.setdefault("analysis", {})["bootstrap"] = {**proto["analysis"].get("bootstrap", {}), "replicates": 4}
    proto["report"] = {"min_cell": MIN_CELL}
    proto_path.write_text(yaml.safe_dump(proto, sort_keys=False))
    args = ["run", "--snakefile", str(ROOT / "Snakefile"), "--cores", "2", "--scheduler", "greedy",
            "--config", f"extract={extract}"]
    terminal = []
    check = _emulant(wd, "check", "--extract", str(extract), "--protocol", str(proto_path))
    assert check.returncode == 0, check.stderr[-3000:]
    terminal.append(check.stdout + check.stderr)
    first = _emulant(wd, *args)
    assert first.returncode == 0, first.stderr[-3000:]
    terminal.append(first.stdout + first.stderr)
    study = proto["study"]["id"]
    results = wd / "results" / study
    logs1 = {p.name: p.read_text() for p in (results / "logs").glob("*.log")}
    cohort = pd.read_parquet(results / "cohort.parquet")
    _drop_persons(extract, list(cohort["person_id"].astype(str).iloc[:2]))  # two persons leave
    second = _emulant(wd, *args)
    assert second.returncode == 0, second.stderr[-3000:]
    terminal.append(second.stdout + second.stderr)
    design = _emulant(wd, "run", "design", *args[1:])
    assert design.returncode == 0, design.stderr[-3000:]
    terminal.append(design.stdout + design.stderr)
    persons = pd.read_parquet(extract / "persons.parquet")
    return {"wd": wd, "study": study, "terminal": terminal, "logs1": logs1,
            "oldest_birth": str(pd.to_datetime(persons["birth_date"]).min().date())}


def _archives(r) -> list[Path]:
    reports = r["wd"] / "reports" / r["study"]
    return sorted(p for p in reports.iterdir() if p.is_dir())


def test_no_suppressed_count_can_be_recovered(runs):
    analyses = [p for p in _archives(runs) if not p.name.endswith("design")]
    assert len(analyses) == 2
    then = (analyses[0] / "report.html").read_text()
    now = (analyses[1] / "report.html").read_text()
    # the current report alone: no cell and no change between deliveries below min_cell
    s = System()
    hidden = add_flow(s, now, "now")
    add_comparison(s, now)
    hidden += add_baseline(s, now)
    add_histogram(s, json.loads((analyses[1] / "positivity.json").read_text()))
    assert hidden >= 3, "the extract should have several cells below min_cell"
    assert s.recovered_small() == {}
    # both reports side by side: no cell of either run (two exact counts of two published reports
    # always give their difference, so the changes themselves are not asked of this pair)
    both = System()
    add_flow(both, then, "prev")
    add_flow(both, now, "now")
    add_comparison(both, now)
    add_baseline(both, now)
    assert {k for k in both.recovered_small() if not k.startswith("change:")} == set()
    design = [p for p in _archives(runs) if p.name.endswith("design")][0]
    d = System()
    add_flow(d, (design / "report.html").read_text(), "design")
    add_baseline(d, (design / "report.html").read_text())
    assert d.recovered_small() == {}


def test_no_person_identifier_or_date_leaves_the_results_folder(runs):
    wd, study = runs["wd"], runs["study"]
    shared = {str(p.relative_to(wd)): p.read_text(errors="replace")
              for p in (wd / "reports").rglob("*") if p.is_file()}
    shared.update({f"log {k}": v for k, v in runs["logs1"].items()})
    shared.update({f"log {p.name}": p.read_text() for p in (wd / "results" / study / "logs").glob("*.log")})
    shared.update({f"terminal {i}": t for i, t in enumerate(runs["terminal"])})
    shared["results/extract_check.json"] = (wd / "results" / study / "extract_check.json").read_text()
    assert len(shared) > 10
    for name, text in shared.items():
        assert not PERSON_ID.search(text), f"a person identifier in {name}"
        assert PLANTED_DATE not in text, f"a person's date in {name}"
        assert runs["oldest_birth"] not in text, f"the oldest birth date in {name}"
        if not name.startswith("terminal"):  # Snakemake's own job lines name its input files
            assert str(wd) not in text, f"an absolute path in {name}"
    person_level = wd / "results" / study / "person_level" / "extract_examples.json"
    assert PERSON_ID.search(person_level.read_text())  # the examples are kept, in the marked file
