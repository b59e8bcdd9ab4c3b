"""The protocol: the target trial and its emulation, parsed once into frozen typed objects.

The typed objects and the closed vocabularies live here; :mod:`emulant.protocol.reader` reads the
YAML file (CONTRACTS §3), fills every default, validates every key and returns a :class:`Protocol`. Every problem is collected before anything is raised, so
`ProtocolError.problems` lists them all, each naming its key path and what was expected.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from emulant.errors import EmulantError

SUMMARIES = ("any", "count", "last", "mean", "min", "max", "distinct_codes")
VALUE_SUMMARIES = ("last", "mean", "min", "max")  # need a numeric `value`; missing when no record
KINDS = ("continuous", "binary", "categorical")
BUILTINS = ("age", "sex", "calendar_year")
ESTIMANDS = ("ATE", "ATT", "ATO")
CONTRASTS = ("intention_to_treat", "per_protocol")
METHODS = ("unadjusted", "ipw", "standardization", "doubly_robust", "gformula")
PER_PROTOCOL_ONLY = ("gformula",)  # methods of the per_protocol contrast alone (CONTRACTS §5e)
DEATH = "death"
BOOTSTRAP_KINDS = ("multinomial", "bayesian")
VARIANCES = ("bootstrap", "influence")  # analysis.variance
DESIGNS = ("initiators", "sequential", "clone")  # CONTRACTS §3a, §5c, §5d
NO_START = "none"  # `initiate: none`: the arm's strategy is not to start any other arm's concept


class ProtocolError(EmulantError):
    """Raised with every problem found; ``problems`` is a list of one-line messages."""

    def __init__(self, problems: list[str], path: str | Path | None = None):
        self.problems = list(problems)
        self.path = str(path) if path is not None else None
        head = f"{self.path}: " if self.path else ""
        super().__init__(head + f"{len(self.problems)} problem(s):\n  - " + "\n  - ".join(self.problems))


# ----------------------------------------------------------------------------- typed objects


@dataclass(frozen=True)
class Concept:
    name: str
    source: str  # an extract table; 'deaths' for the built-in concept 'death'
    codes: tuple[str, ...]  # empty for 'death'
    match: str = "prefix"  # prefix | exact
    where: tuple[tuple[str, tuple[str, ...]], ...] = ()  # (column, allowed values)
    descriptions: tuple[tuple[str, str], ...] = ()  # (code, description) from a CSV code list
    codes_file: str | None = None  # the code-list file as written, when one was given


@dataclass(frozen=True)
class Criterion:
    concept: str
    window: tuple[int, int]  # days relative to time zero, both ends included


@dataclass(frozen=True)
class Eligibility:
    entry_start: dt.date
    entry_end: dt.date
    age_min: int | None = None
    age_max: int | None = None
    coverage_before_days: int = 365
    require: tuple[Criterion, ...] = ()
    exclude: tuple[Criterion, ...] = ()


@dataclass(frozen=True)
class Sustain:
    """Staying on a strategy (CONTRACTS §5b): the largest gap in supply, the concepts that
    count as a switch (default: the other arms' initiating concepts, filled at parse time)."""

    gap_days: int
    switch: tuple[str, ...] = ()


@dataclass(frozen=True)
class Arm:
    name: str
    initiate: str  # concept name; "" for `initiate: none` (see `starts`)
    sustain: Sustain | None = None  # None: the arm has no adherence rule (intention to treat only)
    start_within: tuple[int, int] | None = None  # clone design: start in days a..b (CONTRACTS §5d)

    @property
    def starts(self) -> bool:
        """False for an ``initiate: none`` arm (its strategy: start no other arm's concept)."""
        return bool(self.initiate)


@dataclass(frozen=True)
class Strategies:
    arms: tuple[Arm, ...]  # in the protocol's order; exactly two
    treated: str
    washout_days: int = 365
    same_day: str = "exclude"  # exclude | first_listed
    design: str = "initiators"  # initiators (§3a) | sequential (§5c) | clone (§5d)
    index: str | None = None  # clone: the concept whose first record in the entry window is time zero
    trial_every_days: int = 30  # sequential: days between trial starts
    noninitiator_sample: float = 1.0  # sequential: share of each trial's non-initiators kept

    @property
    def starting_arms(self) -> tuple[Arm, ...]:
        """The arms that start a concept (all but ``initiate: none``)."""
        return tuple(a for a in self.arms if a.starts)

    @property
    def initiating_concepts(self) -> tuple[str, ...]:
        """The arms' initiating concepts, in arm order, each once (``none`` arms have none)."""
        return tuple(dict.fromkeys(a.initiate for a in self.arms if a.starts))

    @property
    def comparator(self) -> str:
        return next(a.name for a in self.arms if a.name != self.treated)

    @property
    def arm_names(self) -> tuple[str, ...]:
        return tuple(a.name for a in self.arms)


@dataclass(frozen=True)
class FollowUp:
    max_days: int = 1095
    administrative_end: dt.date | None = None


@dataclass(frozen=True)
class MeasuredOutcome:
    measure: str  # concept name (source measurements, numeric value)
    at_day: int
    tolerance_days: int = 30
    change_from_baseline: bool = False
    missing: str = "censor"  # censor | complete_case

    @property
    def name(self) -> str:
        return self.measure


@dataclass(frozen=True)
class Outcomes:
    primary: str | MeasuredOutcome
    competing: tuple[str, ...] = ()
    secondary: tuple[str | MeasuredOutcome, ...] = ()
    negative_controls: tuple[str, ...] = ()
    for_decision: tuple[str, ...] = ()  # estimated only because decision.loss names them (death)

    def all(self) -> tuple[str | MeasuredOutcome, ...]:
        """Primary, secondary, negative controls, outcomes for the decision, in that order."""
        return (self.primary, *self.secondary, *self.negative_controls, *self.for_decision)

    def time_to_event(self) -> tuple[str, ...]:
        return tuple(o for o in self.all() if isinstance(o, str))

    def measured(self) -> tuple[MeasuredOutcome, ...]:
        return tuple(o for o in self.all() if isinstance(o, MeasuredOutcome))

    def role(self, name: str) -> str:
        if name == outcome_name(self.primary):
            return "primary"
        if name in self.negative_controls:
            return "negative_control"
        if name in self.for_decision:
            return "decision"
        return "secondary"


def outcome_name(outcome: str | MeasuredOutcome) -> str:
    return outcome if isinstance(outcome, str) else outcome.measure


@dataclass(frozen=True)
class Covariate:
    name: str
    builtin: str | None = None  # age | sex | calendar_year
    attribute: str | None = None  # a column of persons
    concept: str | None = None
    source: str | None = None  # a whole extract source (e.g. dispensings)
    window: tuple[int, int] | None = None
    summary: str | None = None  # any | count | last | mean | min | max | distinct_codes
    kind: str | None = None  # continuous | binary | categorical; None = decided from the data
    missing: str = "indicator"  # indicator | exclude

    @property
    def may_be_missing(self) -> bool:
        """True when the value can be missing, so a ``<name>_missing`` column exists."""
        return self.attribute is not None or self.summary in VALUE_SUMMARIES


@dataclass(frozen=True)
class Propensity:
    model: str = "logistic"
    continuous: str = "spline"  # spline | quadratic | linear


@dataclass(frozen=True)
class WeightSettings:
    stabilize: bool = True
    truncate: tuple[float, float] | None = None


@dataclass(frozen=True)
class Bootstrap:
    replicates: int = 200
    seed: int = 20261201
    interval: str = "wald"  # wald | percentile
    kind: str = "multinomial"  # multinomial | bayesian (Dirichlet weights, Rubin 1981)


@dataclass(frozen=True)
class GFormula:
    """``analysis.gformula``: the Monte Carlo of the parametric g-formula (CONTRACTS §5e)."""
    simulated_persons: int = 10000
    seed: int = 20261202


@dataclass(frozen=True)
class Primary:
    """The pre-specified primary estimate the report leads with (``analysis.primary``)."""
    method: str = "ipw"
    estimand: str = "ATE"
    horizon_day: int = 1095  # ignored when the primary outcome is measured (no horizon)


@dataclass(frozen=True)
class Analysis:
    propensity: Propensity = Propensity()
    weights: WeightSettings = WeightSettings()
    horizons_days: tuple[int, ...] = (365, 730, 1095)
    methods: tuple[str, ...] = ("ipw", "standardization", "doubly_robust")
    hazard_ratio: bool = True
    period_days: int = 30
    censoring_weights: bool = False
    bootstrap: Bootstrap = Bootstrap()
    smd_threshold: float = 0.1
    primary: Primary = Primary()
    gformula: GFormula = GFormula()
    variance: str = "bootstrap"  # bootstrap | influence (M-estimation SEs where available)


@dataclass(frozen=True)
class Decision:
    """CONTRACTS §5f: expected loss per strategy at one horizon."""

    horizon_day: int
    loss: tuple[tuple[str, float], ...]  # (time-to-event outcome or 'death', loss per event)
    strategy_loss: tuple[tuple[str, float], ...] = ()  # (arm, loss of following it)


@dataclass(frozen=True)
class Subgroup:
    """One analysis per level of a covariate; ``cut`` splits a continuous one (``x < c``)."""

    covariate: str
    cut: tuple[float, ...] = ()


@dataclass(frozen=True)
class ReportSettings:
    min_cell: int = 5


@dataclass(frozen=True)
class Study:
    id: str
    title: str = ""
    question: str = ""
    target_trial: tuple[tuple[str, str], ...] = ()  # (component, free text)


@dataclass(frozen=True)
class Protocol:
    study: Study
    concepts: Mapping[str, Concept]
    eligibility: Eligibility
    strategies: Strategies
    follow_up: FollowUp
    outcomes: Outcomes
    covariates: tuple[Covariate, ...]
    time_varying: tuple[Covariate, ...] = ()  # re-measured on the first day of every period (§5a)
    estimands: tuple[str, ...] = ("ATE", "ATT")
    contrasts: tuple[str, ...] = ("intention_to_treat",)
    analysis: Analysis = Analysis()
    report: ReportSettings = ReportSettings()
    decision: Decision | None = None
    subgroups: tuple[Subgroup, ...] = ()
    extract_columns: Mapping[str, Mapping[str, str]] = field(default_factory=dict)
    path: str | None = None  # the protocol file
    text: str = ""  # the file's text, verbatim
    sha256: str = ""

    @property
    def base_dir(self) -> Path:
        return Path(self.path).parent if self.path else Path.cwd()

    def concept(self, name: str) -> Concept:
        return self.concepts[name]

    def sources_used(self) -> tuple[str, ...]:
        """Extract tables the protocol reads, besides persons and coverage."""
        names = {c.source for c in self.concepts.values()}
        names |= {c.source for c in (*self.covariates, *self.time_varying) if c.source}
        return tuple(sorted(names))

    @property
    def per_protocol(self) -> bool:
        """True when the protocol asks for the per-protocol contrast (person-time is needed)."""
        return "per_protocol" in self.contrasts

    def as_dict(self) -> dict[str, Any]:
        """The protocol as parsed, defaults filled in (plain types, for the report and manifest)."""
        d = asdict(self)
        d.pop("text")
        return _plain(d)


def _plain(x: Any) -> Any:
    if isinstance(x, dict):
        return {k: _plain(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [_plain(v) for v in x]
    if isinstance(x, dt.date):
        return x.isoformat()
    return x
