"""Reading a protocol mapping into the typed objects of :mod:`emulant.protocol.model`.

Every reader collects its problems and returns a best-effort value, so one pass lists every
problem of the file, each with its key path and what was expected. One module per group of
sections: :mod:`.read_concepts` (concepts, eligibility), :mod:`.read_strategies` (strategies,
follow-up), :mod:`.read_outcomes` (outcomes, covariates), :mod:`.read_analysis` (estimands,
contrasts, analysis, report); this module puts them together.
"""

from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Any

import yaml

from emulant.protocol.collector import ID_PATTERN, Collector
from emulant.protocol.keys import known, required
from emulant.protocol.model import Protocol, ProtocolError, Study
from emulant.protocol.read_analysis import read_analysis, read_estimands, read_report
from emulant.protocol.read_concepts import read_concepts, read_eligibility
from emulant.protocol.read_decision import decision_outcomes, read_decision, read_subgroups
from emulant.protocol.read_outcomes import read_covariates, read_outcomes
from emulant.protocol.read_strategies import read_follow_up, read_strategies

TRIAL_COMPONENTS = known("study.target_trial")


def read_protocol(data: Any, base_dir: str | Path = ".", path: str | Path | None = None, text: str = "") -> Protocol:
    """Validate a protocol mapping (the YAML's content) and return the typed :class:`Protocol`."""
    c = Collector()
    base = Path(base_dir)
    top = c.mapping(data, "", known(""), required(""))

    s = c.mapping(top.get("study"), "study", known("study"), required("study"))
    sid = c.text(s.get("id"), "study.id", "study")
    if not ID_PATTERN.match(sid):
        c.add("study.id", f"expected lower-case letters, digits and '-' only ([a-z0-9-]+), got {sid!r}")
    tt = c.mapping(s.get("target_trial"), "study.target_trial", TRIAL_COMPONENTS)
    study = Study(sid, c.text(s.get("title"), "study.title"), c.text(s.get("question"), "study.question"),
                  tuple((k, c.text(tt.get(k), f"study.target_trial.{k}")) for k in TRIAL_COMPONENTS if tt.get(k) is not None))

    concepts = read_concepts(c, top.get("concepts"), base)

    elig = read_eligibility(c, top.get("eligibility"), concepts)
    strategies = read_strategies(c, top.get("strategies"), concepts)

    follow = read_follow_up(c, top.get("follow_up"))
    outcomes = read_outcomes(c, top.get("outcomes"), concepts, follow)

    covariates = read_covariates(c, top.get("covariates"), concepts)
    time_varying = read_covariates(c, top.get("time_varying"), concepts, "time_varying",
                                   tuple(x.name for x in covariates))
    estimands, contrasts = read_estimands(c, top, strategies)

    analysis = read_analysis(c, top.get("analysis"), follow, estimands, contrasts)
    report = read_report(c, top.get("report"))
    decision = read_decision(c, top.get("decision"), outcomes, strategies, analysis)
    outcomes = decision_outcomes(outcomes, decision)
    subgroups = read_subgroups(c, top.get("subgroups"), covariates)

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
    return Protocol(study, concepts, elig, strategies, follow, outcomes, covariates, time_varying,
                    estimands, contrasts,
                    analysis, report, decision=decision, subgroups=subgroups,
                    extract_columns=extract_columns, path=str(path) if path else None, text=text,
                    sha256=hashlib.sha256(text.encode()).hexdigest() if text else "")


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
