"""Reading a protocol mapping into the typed objects of :mod:`emulant.protocol`.

Every reader collects its problems and returns a best-effort value, so one pass lists every
problem of the file, each with its key path and what was expected.
"""

from __future__ import annotations

import datetime as dt
import difflib
import hashlib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import yaml

from emulant.protocol.collector import ID_PATTERN, NAME_PATTERN, Collector
from emulant.protocol.model import (
    BUILTINS,
    CONTRASTS,
    DEATH,
    ESTIMANDS,
    KINDS,
    METHODS,
    SUMMARIES,
    VALUE_SUMMARIES,
    Analysis,
    Arm,
    Bootstrap,
    Concept,
    Covariate,
    Criterion,
    Eligibility,
    FollowUp,
    MeasuredOutcome,
    Outcomes,
    Propensity,
    Protocol,
    ProtocolError,
    ReportSettings,
    Strategies,
    Study,
    WeightSettings,
    outcome_name,
)


def _codes(c: Collector, node: Any, key: str, base: Path) -> tuple[tuple[str, ...], tuple, str | None]:
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
        import pandas as pd

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


def _parse_concepts(c: Collector, node: Any, base: Path) -> dict[str, Concept]:
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
        d = c.mapping(spec, key, ("source", "codes", "match", "where"), required=("source", "codes"))
        source = c.text(d.get("source"), f"{key}.source")
        if source in ("persons", "coverage", "deaths"):
            c.add(f"{key}.source", f"'{source}' holds no codes; use an event source (dispensings, diagnoses, measurements …)")
        codes, desc, file = _codes(c, d.get("codes"), f"{key}.codes", base) if "codes" in d else ((), (), None)
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


def _need_concept(c: Collector, concepts: Mapping[str, Concept], name: Any, key: str) -> str:
    if not isinstance(name, str) or name not in concepts:
        near = difflib.get_close_matches(str(name), list(concepts), n=1, cutoff=0.5)
        hint = f"; did you mean '{near[0]}'?" if near else f"; defined: {', '.join(concepts)}"
        c.add(key, f"concept {name!r} is not defined under concepts{hint}")
    return str(name)


def _criteria(c: Collector, node: Any, key: str, concepts) -> tuple[Criterion, ...]:
    out = []
    for i, item in enumerate(c.listing(node, key)):
        k = f"{key}[{i}]"
        d = c.mapping(item, k, ("concept", "window"), required=("concept", "window"))
        name = _need_concept(c, concepts, d.get("concept"), f"{k}.concept") if d.get("concept") else ""
        w = c.window(d.get("window"), f"{k}.window") or (0, 0)
        out.append(Criterion(name, w))
    return tuple(out)


def _measured(c: Collector, d: Any, key: str, concepts) -> MeasuredOutcome:
    d = c.mapping(d, key, ("measure", "at_day", "tolerance_days", "change_from_baseline", "missing"), ("measure", "at_day"))
    m = _need_concept(c, concepts, d.get("measure"), f"{key}.measure") if d.get("measure") else ""
    if m in concepts and concepts[m].source != "measurements":
        c.add(f"{key}.measure", f"concept '{m}' has source '{concepts[m].source}'; a measured outcome needs source measurements")
    return MeasuredOutcome(
        measure=m,
        at_day=c.integer(d.get("at_day"), f"{key}.at_day", 0, 1) or 0,
        tolerance_days=c.integer(d.get("tolerance_days"), f"{key}.tolerance_days", 30, 0) or 0,
        change_from_baseline=c.boolean(d.get("change_from_baseline"), f"{key}.change_from_baseline", False),
        missing=c.choice(d.get("missing"), f"{key}.missing", ("censor", "complete_case"), "censor") or "censor",
    )


def _outcome(c: Collector, node: Any, key: str, concepts) -> str | MeasuredOutcome:
    if isinstance(node, dict):
        return _measured(c, node, key, concepts)
    return _need_concept(c, concepts, node, key)


def _covariates(c: Collector, node: Any, concepts) -> tuple[Covariate, ...]:
    out = []
    seen: set[str] = set()
    known = ("name", "builtin", "attribute", "concept", "source", "window", "summary", "kind", "missing")
    for i, item in enumerate(c.listing(node, "covariates")):
        k = f"covariates[{i}]"
        d = c.mapping(item, k, known, required=("name",))
        name = c.text(d.get("name"), f"{k}.name")
        if name and not NAME_PATTERN.match(name):
            c.add(f"{k}.name", "a covariate name must be letters, digits and underscores, starting with a letter")
        if name in seen:
            c.add(f"{k}.name", f"covariate '{name}' is listed twice")
        seen.add(name)
        k = f"covariates[{i}] ({name})"
        kinds = [x for x in ("builtin", "attribute", "concept", "source") if d.get(x) is not None]
        if len(kinds) != 1:
            c.add(k, f"give exactly one of builtin, attribute, concept, source (got {', '.join(kinds) or 'none'})")
        builtin = c.choice(d.get("builtin"), f"{k}.builtin", BUILTINS, None)
        concept = _need_concept(c, concepts, d["concept"], f"{k}.concept") if d.get("concept") is not None else None
        source = c.text(d.get("source"), f"{k}.source") if d.get("source") is not None else None
        window = c.window(d.get("window"), f"{k}.window")
        summary = c.choice(d.get("summary"), f"{k}.summary", SUMMARIES, None)
        if concept is not None or source is not None:
            if window is None:
                c.add(f"{k}.window", "a concept or source covariate needs a window [a, b]")
            if summary is None:
                summary = "any"
        elif window is not None or summary is not None:
            c.add(k, "window and summary apply only to a concept or source covariate")
        if source is not None and summary in VALUE_SUMMARIES and source != "measurements":
            c.add(f"{k}.summary", f"summary '{summary}' needs numeric values (source measurements)")
        if concept in concepts and summary in VALUE_SUMMARIES and concepts[concept].source != "measurements":
            c.add(f"{k}.summary", f"summary '{summary}' needs numeric values; concept '{concept}' has source '{concepts[concept].source}'")
        kind = c.choice(d.get("kind"), f"{k}.kind", KINDS, None)
        if kind is None:
            if builtin == "sex":
                kind = "categorical"
            elif builtin in ("age", "calendar_year"):
                kind = "continuous"
            elif summary == "any":
                kind = "binary"
            elif summary is not None:
                kind = "continuous"
        missing = c.choice(d.get("missing"), f"{k}.missing", ("indicator", "exclude"), "indicator")
        attribute = c.text(d.get("attribute"), f"{k}.attribute") if d.get("attribute") is not None else None
        out.append(Covariate(name, builtin, attribute, concept, source, window, summary, kind, missing or "indicator"))
    return tuple(out)


TOP_KEYS = ("study", "concepts", "eligibility", "strategies", "follow_up", "outcomes", "covariates",
            "estimands", "contrasts", "analysis", "report", "extract_columns")
TRIAL_COMPONENTS = ("eligibility", "strategies", "assignment", "time_zero", "follow_up", "outcome", "contrast", "analysis")


def read_protocol(data: Any, base_dir: str | Path = ".", path: str | Path | None = None, text: str = "") -> Protocol:
    """Validate a protocol mapping (the YAML's content) and return the typed :class:`Protocol`."""
    c = Collector()
    base = Path(base_dir)
    top = c.mapping(data, "", TOP_KEYS, required=("study", "concepts", "eligibility", "strategies", "outcomes"))

    s = c.mapping(top.get("study"), "study", ("id", "title", "question", "target_trial"), required=("id",))
    sid = c.text(s.get("id"), "study.id", "study")
    if not ID_PATTERN.match(sid):
        c.add("study.id", f"expected lower-case letters, digits and '-' only ([a-z0-9-]+), got {sid!r}")
    tt = c.mapping(s.get("target_trial"), "study.target_trial", TRIAL_COMPONENTS)
    study = Study(sid, c.text(s.get("title"), "study.title"), c.text(s.get("question"), "study.question"),
                  tuple((k, c.text(tt.get(k), f"study.target_trial.{k}")) for k in TRIAL_COMPONENTS if tt.get(k) is not None))

    concepts = _parse_concepts(c, top.get("concepts"), base)

    e = c.mapping(top.get("eligibility"), "eligibility", ("entry", "age", "coverage_before_days", "require", "exclude"), required=("entry",))
    entry = c.mapping(e.get("entry"), "eligibility.entry", ("start", "end"), required=("start", "end"))
    es, ee = c.date(entry.get("start"), "eligibility.entry.start"), c.date(entry.get("end"), "eligibility.entry.end")
    if es and ee and es > ee:
        c.add("eligibility.entry", f"start {es} is after end {ee} (expected start <= end)")
    age = c.mapping(e.get("age"), "eligibility.age", ("min", "max"))
    amin = c.integer(age.get("min"), "eligibility.age.min", None, 0)
    amax = c.integer(age.get("max"), "eligibility.age.max", None, 0)
    if amin is not None and amax is not None and amin > amax:
        c.add("eligibility.age", f"min {amin} is above max {amax}")
    elig = Eligibility(es or dt.date(1900, 1, 1), ee or dt.date(1900, 1, 1), amin, amax,
                       c.integer(e.get("coverage_before_days"), "eligibility.coverage_before_days", 365, 0) or 0,
                       _criteria(c, e.get("require"), "eligibility.require", concepts),
                       _criteria(c, e.get("exclude"), "eligibility.exclude", concepts))

    st = c.mapping(top.get("strategies"), "strategies", ("arms", "treated", "washout_days", "same_day"), required=("arms", "treated"))
    arms = []
    arm_node = st.get("arms") or {}
    if not isinstance(arm_node, dict):
        c.add("strategies.arms", "expected a mapping of arm names")
        arm_node = {}
    for name, spec in arm_node.items():
        d = c.mapping(spec, f"strategies.arms.{name}", ("initiate",), required=("initiate",))
        if not NAME_PATTERN.match(str(name)):
            c.add(f"strategies.arms.{name}", "an arm name must be letters, digits and underscores")
        arms.append(Arm(str(name), _need_concept(c, concepts, d.get("initiate"), f"strategies.arms.{name}.initiate") if d.get("initiate") else ""))
    if len(arms) != 2 and arm_node:
        c.add("strategies.arms", f"expected exactly two arms, got {len(arms)}")
    treated = c.text(st.get("treated"), "strategies.treated")
    if arms and treated not in [a.name for a in arms]:
        c.add("strategies.treated", f"expected one of the arms ({', '.join(a.name for a in arms)}), got {treated!r}")
    strategies = Strategies(tuple(arms), treated, c.integer(st.get("washout_days"), "strategies.washout_days", 365, 0) or 0,
                            c.choice(st.get("same_day"), "strategies.same_day", ("exclude", "first_listed"), "exclude") or "exclude")

    f = c.mapping(top.get("follow_up"), "follow_up", ("max_days", "administrative_end"))
    follow = FollowUp(c.integer(f.get("max_days"), "follow_up.max_days", 1095, 1) or 1095,
                      c.date(f.get("administrative_end"), "follow_up.administrative_end"))

    o = c.mapping(top.get("outcomes"), "outcomes", ("primary", "competing", "secondary", "negative_controls"), required=("primary",))
    outcomes = Outcomes(
        primary=_outcome(c, o.get("primary"), "outcomes.primary", concepts) if o.get("primary") is not None else "",
        competing=tuple(_need_concept(c, concepts, x, f"outcomes.competing[{i}]") for i, x in enumerate(c.listing(o.get("competing"), "outcomes.competing"))),
        secondary=tuple(_outcome(c, x, f"outcomes.secondary[{i}]", concepts) for i, x in enumerate(c.listing(o.get("secondary"), "outcomes.secondary"))),
        negative_controls=tuple(_need_concept(c, concepts, x, f"outcomes.negative_controls[{i}]") for i, x in enumerate(c.listing(o.get("negative_controls"), "outcomes.negative_controls"))),
    )
    if len(outcomes.competing) > 1:
        c.add("outcomes.competing", "at most one competing event is supported; combine them into one concept")
    names = [outcome_name(x) for x in outcomes.all()]
    dupes = sorted({n for n in names if names.count(n) > 1})
    if dupes:
        c.add("outcomes", f"outcome(s) listed twice: {', '.join(dupes)}")
    for m in outcomes.measured():
        if m.at_day + m.tolerance_days > follow.max_days:
            c.add("outcomes", f"measured outcome '{m.measure}' needs max_days >= at_day + tolerance_days = {m.at_day + m.tolerance_days} (follow_up.max_days is {follow.max_days})")

    covariates = _covariates(c, top.get("covariates"), concepts)

    estimands = tuple(c.choice(x, f"estimands[{i}]", ESTIMANDS, "ATE") for i, x in enumerate(c.listing(top.get("estimands"), "estimands"))) or ("ATE", "ATT")
    contrasts = tuple(c.choice(x, f"contrasts[{i}]", CONTRASTS, "intention_to_treat") for i, x in enumerate(c.listing(top.get("contrasts"), "contrasts"))) or ("intention_to_treat",)

    a = c.mapping(top.get("analysis"), "analysis", ("propensity", "weights", "horizons_days", "methods", "hazard_ratio", "period_days", "censoring_weights", "bootstrap", "balance"))
    p = c.mapping(a.get("propensity"), "analysis.propensity", ("model", "continuous"))
    w = c.mapping(a.get("weights"), "analysis.weights", ("stabilize", "truncate"))
    trunc = w.get("truncate")
    if trunc is not None:
        if not (isinstance(trunc, list) and len(trunc) == 2 and all(isinstance(x, int | float) and not isinstance(x, bool) for x in trunc)
                and 0 <= trunc[0] < trunc[1] <= 1):
            c.add("analysis.weights.truncate", f"expected two quantiles [low, high] with 0 <= low < high <= 1, got {trunc!r}")
            trunc = None
        else:
            trunc = (float(trunc[0]), float(trunc[1]))
    horizons = tuple(c.integer(x, f"analysis.horizons_days[{i}]", 1, 1) for i, x in enumerate(c.listing(a.get("horizons_days"), "analysis.horizons_days"))) or (365, 730, 1095)
    for h in horizons:
        if h > follow.max_days:
            c.add("analysis.horizons_days", f"horizon {h} is beyond follow_up.max_days ({follow.max_days})")
    methods = tuple(m for m in (c.choice(x, f"analysis.methods[{i}]", METHODS, None) for i, x in enumerate(c.listing(a.get("methods"), "analysis.methods"))) if m and m != "unadjusted") if a.get("methods") is not None else ("ipw", "standardization", "doubly_robust")
    b = c.mapping(a.get("bootstrap"), "analysis.bootstrap", ("replicates", "seed", "interval"))
    bal = c.mapping(a.get("balance"), "analysis.balance", ("smd_threshold",))
    analysis = Analysis(
        Propensity(c.choice(p.get("model"), "analysis.propensity.model", ("logistic",), "logistic") or "logistic",
                   c.choice(p.get("continuous"), "analysis.propensity.continuous", ("spline", "quadratic", "linear"), "spline") or "spline"),
        WeightSettings(c.boolean(w.get("stabilize"), "analysis.weights.stabilize", True), trunc),
        tuple(sorted(set(horizons))), methods,
        c.boolean(a.get("hazard_ratio"), "analysis.hazard_ratio", True),
        c.integer(a.get("period_days"), "analysis.period_days", 30, 1) or 30,
        c.boolean(a.get("censoring_weights"), "analysis.censoring_weights", False),
        Bootstrap(c.integer(b.get("replicates"), "analysis.bootstrap.replicates", 200, 0) or 0,
                  c.integer(b.get("seed"), "analysis.bootstrap.seed", 20261201, 0) or 0,
                  c.choice(b.get("interval"), "analysis.bootstrap.interval", ("wald", "percentile"), "wald") or "wald"),
        c.number(bal.get("smd_threshold"), "analysis.balance.smd_threshold", 0.1),
    )

    r = c.mapping(top.get("report"), "report", ("min_cell",))
    report = ReportSettings(c.integer(r.get("min_cell"), "report.min_cell", 5, 1) or 5)

    ec_node = top.get("extract_columns")
    ec = c.mapping(ec_node, "extract_columns", tuple(ec_node) if isinstance(ec_node, dict) else ())
    extract_columns: dict[str, dict[str, str]] = {}
    for table, ren in ec.items():
        if not isinstance(ren, dict) or not all(isinstance(v, str) for v in ren.values()):
            c.add(f"extract_columns.{table}", "expected a mapping {contract column: column in the file}")
            continue
        extract_columns[str(table)] = {str(k): str(v) for k, v in ren.items()}

    if c.problems:
        raise ProtocolError(c.problems, path)
    return Protocol(study, concepts, elig, strategies, follow, outcomes, covariates, estimands, contrasts,
                    analysis, report, extract_columns, str(path) if path else None, text,
                    hashlib.sha256(text.encode()).hexdigest() if text else "")


def parse_protocol(data: Any, base_dir: str | Path = ".", path: str | Path | None = None,
                   text: str = "") -> Protocol:
    """Validate a protocol mapping (the YAML's content) and return the typed :class:`Protocol`.

    Raises :class:`ProtocolError` listing every problem; every reader collects before raising.
    """
    return read_protocol(data, base_dir, path, text)


def load_protocol(path: str | Path) -> Protocol:
    """Read and validate a protocol file; raises :class:`ProtocolError` listing every problem."""
    p = Path(path)
    if not p.is_file():
        raise ProtocolError([f"protocol file {p} does not exist"], p)
    text = p.read_text(encoding="utf-8")
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise ProtocolError([f"not valid YAML: {exc}"], p) from None
    return parse_protocol(data, p.parent, p, text)
