"""Write the invented registry extract, its demo protocol and its known truth.

``write_synthetic(out_dir, persons, seed, fmt)`` writes the extract tables (CONTRACTS §2),
``protocol.yaml`` with ``codelists/*.csv`` beside it (CONTRACTS §3) and ``truth.json``. A file
whose new content equals the old one is left untouched (same bytes, same mtime), so a workflow
engine sees no change when the same seed is written again.

Command line::

    python -m synthetic_cohort.generate --out DIR [--persons N] [--seed S] [--format csv]
                                        [--scenario designs]
    python -m synthetic_cohort.generate --write-config     # regenerate config/ from the template
"""

from __future__ import annotations

import argparse
import filecmp
import json
import os
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from emulant.protocol import Protocol, load_protocol
from synthetic_cohort import params as P
from synthetic_cohort import rules
from synthetic_cohort.baseline import UNITS, VOCAB, baseline
from synthetic_cohort.followup import follow
from synthetic_cohort.records import NONE, SETTINGS, Table, Tables, person_ids, to_arrow
from synthetic_cohort.truth import (
    measured_truth,
    summarise_risks,
    sustained_risks,
    time_to_event_truth,
)

HERE = Path(__file__).resolve().parent
TEMPLATE = HERE / "demo_protocol.yaml"
CODELISTS = HERE / "codelists"
TABLES = ("persons", "coverage", "dispensings", "diagnoses", "measurements", "deaths")
FORMATS = ("parquet", "csv")
SCENARIOS = ("demo", "designs")  # designs: the index-flare scenario (synthetic_cohort/designs.py)
DESIGNS_PROTOCOLS = HERE / "designs"  # its example protocols, written beside its extract
CSV_OPTIONS = pacsv.WriteOptions(quoting_style="needed")
OUTCOME_PARAMS = {"hf_admission": P.PRIMARY, "lens_opacity": P.NEGATIVE_CONTROL,
                  "death": P.DEATH}  # all-cause death, for the decision summary
PRIMARY_NAME = "hf_admission"  # the outcome whose hazard follows the tone and the class taken
NOT_FOLLOWED = ("never_initiates", "arm_record_after_death", "initiated_before_window")


class SynthError(ValueError):
    """Bad arguments to the generator (the message names the argument)."""


def demo_protocol() -> Protocol:
    """The demo protocol template, parsed."""
    return load_protocol(TEMPLATE)


def _assemble(b, sort: bool = True) -> Tables:
    cov = b.cov.arrays()
    order = np.lexsort((cov["date"], cov["person_id"])) if sort else np.arange(len(cov["date"]))
    coverage = Table({"person_id": cov["person_id"][order], "start_date": cov["date"][order],
                      "end_date": cov["end_date"][order]})
    vocab = np.asarray(VOCAB, dtype=object)
    events = {
        "dispensings": b.disp.table({"code": vocab}, sort),
        "diagnoses": b.diag.table({"code": vocab, "setting": np.asarray(SETTINGS, object)}, sort),
        "measurements": b.meas.table({"code": vocab, "unit": np.asarray(UNITS, object)}, sort),
    }
    attrs = {"region": (b.region, P.REGIONS), "area_type": (b.area, P.AREA_TYPES)}
    return Tables(b.birth, b.sex, attrs, b.death.copy(), coverage, events)


def measured_covariates(t: Tables, protocol: Protocol, t0: np.ndarray) -> dict[str, np.ndarray]:
    """The covariates the hazards use, as the protocol measures them (``t`` plausible rows)."""
    cov = {c.name: c for c in protocol.covariates}

    def value(name):
        return np.asarray(rules.covariate(t, protocol, cov[name], t0))

    region = value("region")
    return {"age": value("age").astype(float), "male": (value("sex") == "M").astype(float),
            "cv": value("prior_cv"), "kidney": value("prior_kidney"), "lab": value("marker_base"),
            "drugs": value("n_drugs"),
            "region": _index_of(region, P.REGIONS)}


def _index_of(values: np.ndarray, levels: tuple[str, ...]) -> np.ndarray:
    lookup = {v: i for i, v in enumerate(levels)}
    uniq, inv = np.unique(values.astype(str), return_inverse=True)
    return np.asarray([lookup[u] for u in uniq], np.int64)[inv]


def build(persons: int, seed: int, protocol: Protocol | None = None) -> tuple[Tables, dict]:
    """Draw the extract and compute its truth (in memory)."""
    protocol = protocol or demo_protocol()
    rng = np.random.default_rng(seed)
    b = baseline(rng, persons)
    first = _assemble(b, sort=False)  # the rules need no order
    cohort = rules.eligibility(first, protocol)
    followed = ~np.isin(b.design, [list(P.DESIGNS).index(d) for d in NOT_FOLLOWED])
    followed &= ~b.is_case("entry_day_before")
    initiated = cohort.t0 < NONE
    if np.any(initiated & (cohort.t0 != b.t0p)) or np.any(initiated & ~followed):
        raise AssertionError("generator bug: a time zero differs from the planned index date")
    t0 = np.where(initiated, cohort.t0, b.t0p)
    arm = np.where(initiated, cohort.arm, b.arm)
    x = measured_covariates(rules.plausible(first), protocol, np.where(followed, t0, NONE))
    follow(rng, b, followed, t0, arm, x)
    tables = _assemble(b)
    return tables, _truth(protocol, cohort, x, persons, seed, b)


def _truth(protocol: Protocol, cohort: rules.Cohort, x: dict, persons: int, seed: int,
           b) -> dict:
    st = protocol.strategies
    if tuple(a.name for a in st.arms) != P.ARMS or st.treated != P.TREATED:
        raise SynthError("the demo protocol's arms must be " + ", ".join(P.ARMS))
    el = cohort.eligible
    xe = {k: v[el] for k, v in x.items()}
    arm = cohort.arm[el]
    horizons = protocol.analysis.horizons_days
    levels = _subgroup_levels(protocol, xe)
    closed = [n for n in protocol.outcomes.time_to_event() if n != PRIMARY_NAME]
    tte = {name: time_to_event_truth(xe, arm, OUTCOME_PARAMS[name], horizons, st.treated,
                                     st.comparator)
           for name in closed}
    subgroups = {label: {name: time_to_event_truth(xe, arm, OUTCOME_PARAMS[name], horizons,
                                                   st.treated, st.comparator, among)
                         for name in closed}
                 for label, among in levels}
    # the primary outcome depends on the tone and the treatment taken over time: its truths are
    # the same persons simulated under each strategy (a stream of its own: the data stay as
    # drawn), the per-person risks averaged over the cohort and within each subgroup level
    itt, pp = sustained_risks(xe, arm, b.tone0[el], b.days_supply[el], horizons,
                              np.random.default_rng([seed, 13]))

    def summary(risks, among=None):
        return summarise_risks(risks, arm, horizons, st.treated, st.comparator, among)

    tte = {PRIMARY_NAME: summary(itt), **tte}
    for label, among in levels:
        subgroups[label] = {PRIMARY_NAME: summary(itt, among), **subgroups[label]}
    per_protocol = {PRIMARY_NAME: summary(pp)}
    subgroups_pp = {label: {PRIMARY_NAME: summary(pp, among)} for label, among in levels}
    measured = {}
    for m in protocol.outcomes.measured():
        if m.measure != "marker" or m.change_from_baseline:
            raise SynthError(f"outcome {m.measure}: the truth is for the marker without change "
                             "from baseline")
        measured[m.measure] = measured_truth(xe, arm, st.treated, st.comparator)
    by_arm = {a: int((arm == i).sum()) for i, a in enumerate(P.ARMS)}
    return _rounded({
        "seed": int(seed), "persons": int(persons), "protocol_study_id": protocol.study.id,
        "eligible": {"n": int(el.sum()), "by_arm": by_arm},
        "attrition": [{"step": s, "remaining": r} for s, r in cohort.attrition],
        "time_to_event": tte, "measured": measured, "subgroups": subgroups,
        "per_protocol": per_protocol, "subgroups_per_protocol": subgroups_pp,
        "dgp": {"hazard_ratio": {PRIMARY_NAME: P.PRIMARY_TAKEN[st.treated] / P.PRIMARY_TAKEN[st.comparator],
                                 "lens_opacity": 1.0, "death": 1.0},
                "hazard_ratio_men": {PRIMARY_NAME: P.PRIMARY_TAKEN_MALE[st.treated]
                                     / P.PRIMARY_TAKEN_MALE[st.comparator]},
                "tone_per_10": P.PRIMARY_TONE10, "tone_target": P.TONE["target"],
                "sustain_gap_days": P.SUSTAIN_GAP,
                "marker_effect": P.MARKER_OUTCOME["effect"][st.treated]
                - P.MARKER_OUTCOME["effect"][st.comparator]},
        "description": (
            "Invented registry: adults with a chronic metabolic disorder starting kestrel "
            "(treated) or plover. True values are per-person expectations under each "
            "strategy (piecewise-constant cause-specific hazards, death competing, no censoring) "
            "averaged over the eligible cohort; ATT averages over kestrel initiators. "
            "hf_admission depends on the tone marker and the class taken in each 30-day period "
            "(direct hazard ratio while on kestrel: 0.75 in women, 1.05 in men); its "
            "intention-to-treat truth averages over simulated switch and stop paths, its "
            "per_protocol truth keeps everyone on the assigned class throughout; both are "
            "averaged within each subgroup level too ('subgroups', 'subgroups_per_protocol'). "
            "lens_opacity (negative control): hazard ratio 1; death (all-cause, no competing "
            "event): hazard ratio 1; marker near day 365: -4.0 under kestrel."),
    })


def _subgroup_levels(protocol: Protocol, x: dict) -> list[tuple[str, np.ndarray]]:
    """The protocol's subgroup levels among the eligible, labelled as emulant labels them
    (``sex=F``, ``age<75``, ``age>=75``); the demo's truths cover ``sex`` and ``age``."""
    covs = {c.name: c for c in protocol.covariates}
    out = []
    for s in protocol.subgroups:
        builtin = covs[s.covariate].builtin if s.covariate in covs else None
        if builtin == "sex" and not s.cut:
            out += [(f"{s.covariate}=F", x["male"] == 0), (f"{s.covariate}=M", x["male"] == 1)]
        elif builtin == "age" and s.cut:
            edges = [-np.inf, *s.cut, np.inf]
            for lo, hi in zip(edges[:-1], edges[1:], strict=True):
                label = (f"{s.covariate}<{hi:g}" if lo == -np.inf else f"{s.covariate}>={lo:g}"
                         if hi == np.inf else f"{lo:g}<={s.covariate}<{hi:g}")
                out.append((label, (x["age"] >= lo) & (x["age"] < hi)))
        else:
            raise SynthError(f"subgroup {s.covariate!r}: the demo's truths cover sex and age (cut)")
    return out


def _rounded(x):
    if isinstance(x, dict):
        return {k: _rounded(v) for k, v in x.items()}
    if isinstance(x, list):
        return [_rounded(v) for v in x]
    if isinstance(x, float):
        return round(x, 10)
    return x


def replace_if_changed(path: Path, write: Callable[[Path], None]) -> bool:
    """Write through a temporary file; replace ``path`` only if the bytes differ."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        write(tmp)
        if path.is_file() and filecmp.cmp(tmp, path, shallow=False):
            return False
        os.replace(tmp, path)
        return True
    finally:
        if tmp.exists():
            tmp.unlink()


def _write_text(path: Path, text: str) -> bool:
    return replace_if_changed(path, lambda p: p.write_text(text, encoding="utf-8"))


def _write_codelists(folder: Path) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    out = []
    for f in sorted(CODELISTS.glob("*.csv")):
        _write_text(folder / f.name, f.read_text(encoding="utf-8"))
        out.append(folder / f.name)
    return out


def write_synthetic(out_dir, persons: int = 20000, seed: int = 20261201,
                    fmt: str = "parquet", scenario: str = "demo") -> dict:
    """Write the invented extract, its protocol(s), ``codelists/`` and ``truth.json``.

    ``scenario``: ``demo`` (the initiators demo: ``protocol.yaml`` and ``codelists/``) or
    ``designs`` (the index-flare scenario of ``synthetic_cohort/designs.py``: ``clone.yaml``,
    ``sequential.yaml``, ``dynamic.yaml``), each from its own persons and stream. Returns the
    truth (the content of ``truth.json``). Files whose content is unchanged keep their mtime.
    Files of the other format for the same tables are removed, so each table has one file.
    """
    if fmt not in FORMATS:
        raise SynthError(f"format: expected one of {', '.join(FORMATS)}, got {fmt!r}")
    if scenario not in SCENARIOS:
        raise SynthError(f"scenario: expected one of {', '.join(SCENARIOS)}, got {scenario!r}")
    if isinstance(persons, bool) or not isinstance(persons, int | np.integer) or persons < 1:
        raise SynthError(f"persons: expected a whole number >= 1, got {persons!r}")
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        raise SynthError(f"seed: expected a whole number >= 0, got {seed!r}")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    if scenario == "designs":
        from synthetic_cohort import designs, truth_designs

        tables, latent = designs.build(int(persons), int(seed))
        truth = _rounded(truth_designs.designs_truth(tables, latent, int(persons), int(seed)))
    else:
        tables, truth = build(int(persons), int(seed))
    arrow = to_arrow(tables, person_ids(int(persons)))
    for name in TABLES:
        tab = arrow[name]
        if fmt == "parquet":
            replace_if_changed(out / f"{name}.parquet", lambda p, t=tab: pq.write_table(t, p))
        else:
            replace_if_changed(out / f"{name}.csv", lambda p, t=tab: pacsv.write_csv(t, p, CSV_OPTIONS))
        for other in (".parquet", ".csv", ".csv.gz"):
            stale = out / f"{name}{other}"
            if other != f".{fmt}" and stale.exists():
                stale.unlink()
    if scenario == "designs":
        for f in sorted(DESIGNS_PROTOCOLS.glob("*.yaml")):
            _write_text(out / f.name, f.read_text(encoding="utf-8"))
    else:
        _write_text(out / "protocol.yaml", TEMPLATE.read_text(encoding="utf-8"))
        _write_codelists(out / "codelists")
    _write_text(out / "truth.json", json.dumps(truth, indent=2) + "\n")
    return truth


def config_protocol_text() -> str:
    """The committed copy's text: the template with code lists under ``../codelists/``."""
    text = TEMPLATE.read_text(encoding="utf-8")
    return text.replace("codes: codelists/", "codes: ../codelists/")


def write_config(root: str | Path | None = None) -> list[Path]:
    """Regenerate ``config/protocols/demo.yaml`` and ``config/codelists/*.csv`` from the template."""
    root = Path(root) if root is not None else HERE.parent
    proto = root / "config" / "protocols" / "demo.yaml"
    proto.parent.mkdir(parents=True, exist_ok=True)
    _write_text(proto, config_protocol_text())
    return [proto, *_write_codelists(root / "config" / "codelists")]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m synthetic_cohort.generate", description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--out", help="folder for the extract, protocol.yaml and truth.json")
    ap.add_argument("--persons", type=int, default=20000)
    ap.add_argument("--seed", type=int, default=20261201)
    ap.add_argument("--format", choices=FORMATS, default="parquet")
    ap.add_argument("--scenario", choices=SCENARIOS, default="demo",
                    help="demo (initiators) or designs (index flare: clone, sequential, dynamic)")
    ap.add_argument("--write-config", action="store_true",
                    help="regenerate config/protocols/demo.yaml and config/codelists/")
    args = ap.parse_args(argv)
    if not args.out and not args.write_config:
        ap.error("give --out DIR and/or --write-config")
    if args.write_config:
        for p in write_config():
            print(p)
    if args.out:
        try:
            truth = write_synthetic(args.out, args.persons, args.seed, args.format, args.scenario)
        except SynthError as exc:
            print(f"error: {exc}")
            return 2
        if args.scenario == "designs":
            print(f"{args.out}: {truth['persons']} persons, {truth['clone']['eligible']} eligible "
                  f"for the clone protocols, {truth['sequential']['person_trials']} sequential "
                  "person-trials")
        else:
            print(f"{args.out}: {truth['persons']} persons, {truth['eligible']['n']} eligible "
                  f"({', '.join(f'{k} {v}' for k, v in truth['eligible']['by_arm'].items())})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
