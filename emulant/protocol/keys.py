"""The protocol's keys in one table: what the readers accept, what the reference documents and the
JSON Schema say.

Every key of the protocol YAML is one :class:`Key` row of :data:`KEYS`: its path, type, default,
allowed values, meaning, an example and the rule it drives. The readers take each mapping's known
and required keys from here (:func:`known`, :func:`required`); ``docs/protocol.md`` and the JSON
Schema (:mod:`emulant.protocol.schema`) are generated from it; ``tests/protocol/test_keys.py``
records what the readers actually read and fails when a key is in one and not the other.

Paths: ``a.b`` is key ``b`` of mapping ``a``; ``*`` stands for a name the user chooses (a concept,
an arm, a column); ``[]`` for each item of a list.

To add a key: add its row to the table below (right after its siblings), read it in the reader
with ``c.mapping(node, key, known(PATH), required(PATH))``, give it a value in
:mod:`emulant.protocol.as_input`, and run ``python -m emulant.protocol.reference`` to rewrite
``docs/protocol.md`` and ``emulant/protocol/protocol.schema.json``.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

from emulant.protocol.model import (
    BOOTSTRAP_KINDS,
    BUILTINS,
    CONTRASTS,
    DESIGNS,
    ESTIMANDS,
    KINDS,
    METHODS,
    SUMMARIES,
    VARIANCES,
)

#: The value types. ``mapping``: fixed keys (rows below it); ``names``: keys the user names, each
#: value as its ``*`` row says; ``list``: items as its ``[]`` row says; ``outcome``: a concept name
#: or a measured-outcome mapping; ``codes``: a list of codes or a CSV file name; ``values``: one
#: value or a list of them; ``quantiles``: ``[low, high]`` with 0 <= low < high <= 1; ``days``:
#: ``[a, b]`` with 0 <= a <= b, days on or after time zero.
TYPES = ("mapping", "names", "list", "text", "integer", "number", "boolean", "date", "window",
         "choice", "concept", "codes", "values", "quantiles", "outcome", "days")


class _Required:
    def __repr__(self) -> str:
        return "REQUIRED"


REQUIRED: Any = _Required()  # a key without a default


@dataclass(frozen=True)
class Key:
    path: str
    type: str
    meaning: str
    default: Any = None  # REQUIRED, or the value an absent key takes (None: absent means none)
    allowed: tuple[str, ...] = ()  # for choice
    minimum: int | None = None  # for integer
    pattern: str | None = None  # for text
    example: Any = None
    rule: str = ""  # the rule of the trial or of the emulation the key drives
    default_note: str = ""  # when the default is derived rather than fixed

    @property
    def required(self) -> bool:
        return self.default is REQUIRED

    @property
    def name(self) -> str:
        return re.split(r"\.|\[\]", self.path)[-1] or self.path.rsplit(".", 1)[-1]


def _criterion(p: str, what: str) -> tuple[Key, ...]:
    return (
        Key(f"{p}[]", "mapping", f"one {what}: a concept and a window", example={"concept": "cmd", "window": [-1825, 0]}),
        Key(f"{p}[].concept", "concept", "the concept whose records are looked for", REQUIRED, example="cmd"),
        Key(f"{p}[].window", "window", "days relative to time zero, both ends included; must end on or before day 0", REQUIRED, example=[-1825, 0],
            rule="a window [a, b] holds the records on days a <= k <= b, day 0 being time zero"),
    )


def _measured(p: str) -> tuple[Key, ...]:
    return (
        Key(f"{p}.measure", "concept", "the measured concept (source measurements, numeric value)", REQUIRED, example="marker"),
        Key(f"{p}.at_day", "integer", "the day after time zero the value is wanted for", REQUIRED, minimum=1, example=365),
        Key(f"{p}.tolerance_days", "integer", "how far from at_day a measurement may lie", 30, minimum=0, example=60,
            rule="the value is the record nearest at_day within [at_day - tolerance_days, at_day + tolerance_days], the earlier on a tie; at_day - tolerance_days must be at least 1 (after time zero); follow_up.max_days must reach at_day + tolerance_days"),
        Key(f"{p}.change_from_baseline", "boolean", "subtract the baseline value (the last value in [-tolerance_days, 0])", False, example=True),
        Key(f"{p}.missing", "choice", "what a person without the measurement means", "censor", ("censor", "complete_case"), example="censor",
            rule="censor: inverse probability of censoring weights from a logistic model of being measured; complete_case: eligibility step outcome_measured"),
    )


_COMPONENTS = ("eligibility", "strategies", "assignment", "time_zero", "follow_up", "outcome", "contrast", "analysis")

KEYS: tuple[Key, ...] = (
    # ------------------------------------------------------------------ study
    Key("study", "mapping", "the study: its id, title, question and the target trial in words", REQUIRED),
    Key("study.id", "text", "the study's id", REQUIRED, pattern=r"^[a-z0-9-]+$", example="demo-second-line",
        rule="names the folders results/<id>/ and reports/<id>/"),
    Key("study.title", "text", "the report's title", "", example="Kestrel versus plover and heart-failure admission"),
    Key("study.question", "text", "the question the emulated trial answers, in words", "", example="Does starting kestrel rather than plover change the risk of admission?"),
    Key("study.target_trial", "mapping", "the target trial in words, one text per component, shown beside its emulation in the report", {}),
    *(Key(f"study.target_trial.{k}", "text", f"the target trial's {k.replace('_', ' ')}, in words", "", example="…") for k in _COMPONENTS),
    # ------------------------------------------------------------------ concepts
    Key("concepts", "names", "named code lists over the extract's event sources; 'death' is built in (the deaths table)", REQUIRED,
        example={"kestrel": {"source": "dispensings", "codes": ["KS1"]}}),
    Key("concepts.*", "mapping", "one concept (letters, digits and underscores, starting with a letter)", example={"source": "diagnoses", "codes": ["HF5"], "where": {"setting": "inpatient"}}),
    Key("concepts.*.source", "text", "the extract table the codes are looked up in (an event source: not persons, coverage or deaths)", REQUIRED, example="diagnoses"),
    Key("concepts.*.codes", "codes", "a list of codes, or a CSV file with a `code` column (optional `description`), relative to the protocol's folder", REQUIRED,
        example="../codelists/kestrel.csv"),
    Key("concepts.*.match", "choice", "how a code matches the extract's codes", "prefix", ("prefix", "exact"), example="exact",
        rule="prefix: HF5 matches HF5, HF5.9 and HF59; exact: the code alone"),
    Key("concepts.*.where", "names", "further conditions on other columns of the source: {column: value or list of values}", {}, example={"setting": "inpatient"}),
    Key("concepts.*.where.*", "values", "the allowed values of one column", example="inpatient"),
    # ------------------------------------------------------------------ eligibility
    Key("eligibility", "mapping", "who enters the trial, tested in a fixed order of steps (one row each of attrition.csv)", REQUIRED),
    Key("eligibility.entry", "mapping", "the calendar window time zero must fall in", REQUIRED, example={"start": "2017-01-01", "end": "2021-12-31"}),
    Key("eligibility.entry.start", "date", "first possible time zero (YYYY-MM-DD)", REQUIRED, example="2017-01-01", rule="step initiated: time zero is the first record of any arm's concept inside the entry window"),
    Key("eligibility.entry.end", "date", "last possible time zero (YYYY-MM-DD)", REQUIRED, example="2021-12-31"),
    Key("eligibility.age", "mapping", "age limits at time zero", {}),
    Key("eligibility.age.min", "integer", "youngest age, in completed years at time zero", None, minimum=0, example=40, rule="step age: completed years at time zero (birthday rule) within [min, max]"),
    Key("eligibility.age.max", "integer", "oldest age, in completed years at time zero", None, minimum=0, example=85, rule="step age"),
    Key("eligibility.coverage_before_days", "integer", "days of continuous coverage needed up to time zero", 365, minimum=0, example=365,
        rule="step coverage_before: one merged coverage period spans day -coverage_before_days to day 0"),
    Key("eligibility.require", "list", "concepts that must have a record in their window", [], example=[{"concept": "cmd", "window": [-1825, 0]}],
        rule="steps require:<concept>, in order"),
    *_criterion("eligibility.require", "requirement"),
    Key("eligibility.exclude", "list", "concepts that must have no record in their window", [], example=[{"concept": "heart_failure", "window": [-1825, 0]}],
        rule="steps exclude:<concept>, in order"),
    *_criterion("eligibility.exclude", "exclusion"),
    # ------------------------------------------------------------------ strategies
    Key("strategies", "mapping", "the treatment strategies compared", REQUIRED),
    Key("strategies.design", "choice", "how time zero and the arms are found", "initiators", DESIGNS, example="clone",
        rule="initiators: time zero is the first initiation, the arm its concept (two starting arms); sequential: a trial starts every trial_every_days, "
             "one starting arm against one 'none' arm; clone: time zero is the index event, every eligible person is cloned into every arm "
             "(contrasts [per_protocol] and estimands [ATE] only: clones have no assignment at time zero)"),
    Key("strategies.index", "mapping", "design clone: the index event whose first record inside the entry window is time zero (required there, only there)", None,
        example={"concept": "acute_event"}),
    Key("strategies.index.concept", "concept", "the index event's concept", REQUIRED, example="acute_event",
        rule="step indexed: a record of the concept inside the entry window, tested once, at the first"),
    Key("strategies.arms", "names", "the arms, in order (exactly two); each name letters, digits and underscores", REQUIRED,
        example={"kestrel": {"initiate": "kestrel"}, "plover": {"initiate": "plover"}}),
    Key("strategies.arms.*", "mapping", "one arm", example={"initiate": "kestrel"}),
    Key("strategies.arms.*.initiate", "concept", "the concept whose first record starts the arm, or none: the arm's strategy is to start no other arm's concept (designs sequential and clone)", REQUIRED, example="kestrel",
        rule="step initiated: the arm is the one whose concept has the first record in the entry window; a 'none' arm deviates on its first record of another arm's concept (started)"),
    Key("strategies.arms.*.start_within", "days", "design clone: the grace window, days after time zero in which the arm's concept must start (required on every clone arm that starts a concept)", None,
        example=[0, 90],
        rule="s the first day >= 0 with a record of the concept: the clone deviates on day s when s < a (started_early), on day b + 1 when no s <= b (not_started)"),
    Key("strategies.arms.*.sustain", "mapping", "what staying on the arm's strategy means (needed on every starting arm by contrast per_protocol in designs initiators and sequential; optional on a clone arm)", None,
        example={"gap_days": 60}),
    Key("strategies.arms.*.sustain.gap_days", "integer", "the longest gap in supply, in days, before the person counts as stopped", REQUIRED, minimum=0, example=60,
        rule="supply: each dispensing of the initiating concept supplies days_supply days (30 when absent), refills carried over; the person stops on day c + gap_days + 1, c the last covered day before a longer gap"),
    Key("strategies.arms.*.sustain.switch", "list", "concepts whose record counts as switching away from the arm", None, example=["plover"],
        default_note="the other arms' initiating concepts",
        rule="the person switches on the first day >= 1 with a record of a switch concept; deviation_day is the earlier of stop and switch"),
    Key("strategies.arms.*.sustain.switch[]", "concept", "one switch concept (not the arm's own initiating concept)", example="plover"),
    Key("strategies.treated", "text", "the arm whose members define the ATT (one of the arms)", None, example="kestrel",
        default_note="required in design initiators; sequential: the starting arm; clone: the first arm"),
    Key("strategies.washout_days", "integer", "new users: no record of any arm's concept this many days before time zero", 365, minimum=0, example=365,
        rule="step washout: no record of any arm's concept in [-washout_days, -1]"),
    Key("strategies.same_day", "choice", "what to do when both arms start on the same day (design initiators)", "exclude", ("exclude", "first_listed"), example="exclude",
        rule="step same_day: exclude leaves such persons out; first_listed puts them in the arm listed first"),
    Key("strategies.trial_every_days", "integer", "design sequential: days between the starts of consecutive trials (only there)", 30, minimum=1, example=30,
        default_note="30 in design sequential; not set in the other designs",
        rule="trial j starts on entry.start + j * trial_every_days while on or before entry.end; a candidate who starts the concept in days 0 .. trial_every_days - 1 is in the starting arm"),
    Key("strategies.noninitiator_sample", "number", "design sequential: the share (0 < share <= 1) of each trial's non-initiators kept (only there)", 1.0, example=0.25,
        default_note="1.0 in design sequential; not set in the other designs",
        rule="a kept non-initiator carries the weight 1/share; the sample is drawn from the bootstrap seed"),
    # ------------------------------------------------------------------ follow_up
    Key("follow_up", "mapping", "how long persons are followed", {}),
    Key("follow_up.max_days", "integer", "the longest follow-up, in days", 1095, minimum=1, example=1095,
        rule="follow-up ends at the first of: outcome, competing event, coverage end, administrative end, max_days"),
    Key("follow_up.administrative_end", "date", "the last day any person is followed (YYYY-MM-DD)", None, example="2022-12-31",
        rule="end reason administrative_end; check warns when a source's last record is earlier"),
    # ------------------------------------------------------------------ outcomes
    Key("outcomes", "mapping", "the outcomes", REQUIRED),
    Key("outcomes.primary", "outcome", "the primary outcome: an event concept (time to event) or a measured outcome (a mapping)", REQUIRED, example="hf_admission",
        rule="time to event: counted from day 1 (day 0 is baseline)"),
    *_measured("outcomes.primary"),
    Key("outcomes.competing", "list", "a competing event (at most one; 'death' is the deaths table)", [], example=["death"],
        rule="end reason competing; risks by Aalen–Johansen"),
    Key("outcomes.competing[]", "concept", "a competing event's concept", example="death"),
    Key("outcomes.secondary", "list", "further outcomes, estimated like the primary", [], example=[{"measure": "marker", "at_day": 365}]),
    Key("outcomes.secondary[]", "outcome", "an event concept or a measured outcome", example="hf_admission"),
    *_measured("outcomes.secondary[]"),
    Key("outcomes.negative_controls", "list", "outcomes the strategies should not affect, estimated like the primary", [], example=["lens_opacity"]),
    Key("outcomes.negative_controls[]", "concept", "a negative-control outcome's concept", example="lens_opacity"),
    # ------------------------------------------------------------------ covariates
    Key("covariates", "list", "the adjustment set, measured at baseline", [], example=[{"name": "age", "builtin": "age"}]),
    Key("covariates[]", "mapping", "one covariate: exactly one of builtin, attribute, concept, source", example={"name": "prior_cv", "concept": "cardio_event", "window": [-1825, -1], "summary": "any"}),
    Key("covariates[].name", "text", "the covariate's name (letters, digits and underscores, starting with a letter)", REQUIRED, pattern=r"^[A-Za-z_][A-Za-z0-9_]*$", example="prior_cv"),
    Key("covariates[].builtin", "choice", "a covariate computed by emulant", None, BUILTINS, example="age",
        rule="age: completed years at time zero; calendar_year: the year of time zero; sex: from persons"),
    Key("covariates[].attribute", "text", "a column of the persons table", None, example="region"),
    Key("covariates[].concept", "concept", "a concept summarised over the window", None, example="cardio_event"),
    Key("covariates[].source", "text", "a whole extract source summarised over the window", None, example="dispensings"),
    Key("covariates[].window", "window", "days relative to time zero (concept and source covariates); must end on or before day 0", None, example=[-365, -1]),
    Key("covariates[].summary", "choice", "how the window's records become one value", None, SUMMARIES, example="any",
        default_note="any for a concept or source covariate",
        rule="any 0/1; count and distinct_codes 0 without a record; last (latest day, largest value on a tie), mean, min, max need numeric values and are missing without a record"),
    Key("covariates[].kind", "choice", "how the covariate enters the models", None, KINDS, example="categorical",
        default_note="from the data: categorical for sex and text, binary for any, continuous for values and counts"),
    Key("covariates[].missing", "choice", "what a missing value does", "indicator", ("indicator", "exclude"), example="indicator",
        rule="indicator: adds <name>_missing and fills the cohort median (a level missing for a categorical); exclude: eligibility step covariate:<name>"),
    # ------------------------------------------------------------------ time_varying
    Key("time_varying", "list", "covariates re-measured on the first day of every period of analysis.period_days days", [],
        example=[{"name": "marker_now", "concept": "marker", "window": [-180, 0], "summary": "last"}],
        rule="period k holds days k*P .. (k+1)*P - 1; the window is relative to the period's first day"),
    Key("time_varying[]", "mapping", "one time-varying covariate: exactly one of concept, source (names differ from the baseline covariates')",
        example={"name": "cv_recent", "concept": "cardio_event", "window": [-90, 0], "summary": "any"}),
    Key("time_varying[].name", "text", "the covariate's name (letters, digits and underscores, starting with a letter)", REQUIRED, pattern=r"^[A-Za-z_][A-Za-z0-9_]*$", example="marker_now"),
    Key("time_varying[].concept", "concept", "a concept summarised over the window", None, example="marker"),
    Key("time_varying[].source", "text", "a whole extract source summarised over the window", None, example="dispensings"),
    Key("time_varying[].window", "window", "days relative to the period's first day; must end on or before day 0", None, example=[-180, 0],
        rule="a record after the day it describes would let the future decide the past"),
    Key("time_varying[].summary", "choice", "how the window's records become one value", None, SUMMARIES, example="last", default_note="any"),
    Key("time_varying[].kind", "choice", "how the covariate enters the models", None, KINDS, example="continuous",
        default_note="binary for any, continuous otherwise"),
    Key("time_varying[].missing", "choice", "what a missing value does (an indicator column)", "indicator", ("indicator",), example="indicator"),
    # ------------------------------------------------------------------ estimands, contrasts
    Key("estimands", "list", "the populations the effect is estimated for", ["ATE", "ATT"], example=["ATE", "ATT"],
        default_note="[ATE, ATT]; design clone: [ATE]"),
    Key("estimands[]", "choice", "ATE: everyone eligible; ATT: those who started the treated arm; ATO: overlap weights", None, ESTIMANDS, example="ATE"),
    Key("contrasts", "list", "the causal contrasts", ["intention_to_treat"], example=["intention_to_treat"],
        default_note="[intention_to_treat]; design clone: [per_protocol]"),
    Key("contrasts[]", "choice", "one contrast: intention_to_treat (as assigned at time zero) or per_protocol (follow-up ends when a person deviates; needs sustain on every arm)", None, CONTRASTS, example="intention_to_treat"),
    # ------------------------------------------------------------------ analysis
    Key("analysis", "mapping", "the analysis plan", {}),
    Key("analysis.propensity", "mapping", "the propensity-score model", {}),
    Key("analysis.propensity.model", "choice", "the model family", "logistic", ("logistic",), example="logistic"),
    Key("analysis.propensity.continuous", "choice", "how continuous covariates enter the model", "spline", ("spline", "quadratic", "linear"), example="spline"),
    Key("analysis.weights", "mapping", "the inverse probability weights", {}),
    Key("analysis.weights.stabilize", "boolean", "stabilise the weights by the arm's share", True, example=True),
    Key("analysis.weights.truncate", "quantiles", "winsorise each estimand's weights at these quantiles of the whole cohort (never ATO); IPW only: doubly robust estimates use the untruncated propensity", None, example=[0.01, 0.99]),
    Key("analysis.horizons_days", "list", "days at which risks are reported", [365, 730, 1095], example=[365, 730, 1095],
        rule="each horizon at most follow_up.max_days"),
    Key("analysis.horizons_days[]", "integer", "one horizon, in days", None, minimum=1, example=365),
    Key("analysis.methods", "list", "the adjusted estimators ('unadjusted' is always reported)", ["ipw", "standardization", "doubly_robust"], example=["ipw", "doubly_robust"]),
    Key("analysis.methods[]", "choice", "one estimator (gformula: the parametric g-formula, per_protocol only)", None, METHODS, example="ipw",
        rule="gformula needs per_protocol in contrasts; the other contrasts skip it"),
    Key("analysis.hazard_ratio", "boolean", "also report a Cox hazard ratio (cause-specific with a competing event)", True, example=True),
    Key("analysis.period_days", "integer", "period length of the time basis of the pooled logistic models (daily hazards, constant within a period, on the exact day-level risk set)", 30, minimum=1, example=30),
    Key("analysis.censoring_weights", "boolean", "inverse probability of censoring weights for coverage-end censoring (time to event)", False, example=False),
    Key("analysis.bootstrap", "mapping", "the bootstrap of the whole analysis", {}),
    Key("analysis.bootstrap.replicates", "integer", "number of replicates (0: none, no intervals)", 200, minimum=0, example=200),
    Key("analysis.bootstrap.seed", "integer", "the random seed", 20261201, minimum=0, example=20261201),
    Key("analysis.bootstrap.interval", "choice", "how intervals are formed", "wald", ("wald", "percentile"), example="wald",
        rule="wald: estimate ± 1.96 bootstrap SE (log scale for ratios); percentile: 2.5% and 97.5% quantiles"),
    Key("analysis.bootstrap.kind", "choice", "how a replicate weights persons", "multinomial", BOOTSTRAP_KINDS, example="bayesian",
        rule="multinomial: counts Multinomial(n, 1/n, ..., 1/n) (Efron); bayesian: n times Dirichlet(1, ..., 1) weights (Rubin 1981), so shares of replicates are posterior probabilities"),
    Key("analysis.gformula", "mapping", "the Monte Carlo of the parametric g-formula (method gformula, per_protocol only)", {}),
    Key("analysis.gformula.simulated_persons", "integer", "persons drawn (with replacement) from the estimand's population and simulated under each strategy and the natural course", 10000, minimum=100, example=10000),
    Key("analysis.gformula.seed", "integer", "the random seed of the draws (the same in every bootstrap replicate)", 20261202, minimum=0, example=20261202),
    Key("analysis.variance", "choice", "how standard errors and intervals are formed", "bootstrap", VARIANCES, example="influence",
        rule="bootstrap: from analysis.bootstrap's replicates; influence: Wald intervals from M-estimation (sandwich) standard errors that account for the estimated propensity, for the rows docs/results.md lists (unadjusted and ipw risks, rates and means, doubly robust means); every other row keeps its bootstrap interval, and no replicate is run when no row needs one"),
    Key("analysis.balance", "mapping", "covariate balance", {}),
    Key("analysis.balance.smd_threshold", "number", "an absolute standardised mean difference above this is flagged", 0.1, example=0.1),
    Key("analysis.primary", "mapping", "the pre-specified primary estimate the report leads with (at a glance, marked in the forest plot)", {}),
    Key("analysis.primary.method", "choice", "its estimator: one of analysis.methods", None, tuple(m for m in METHODS if m != "unadjusted"), example="ipw",
        default_note="the first of analysis.methods"),
    Key("analysis.primary.estimand", "choice", "its estimand: one of estimands", None, ESTIMANDS, example="ATE",
        default_note="the first of estimands"),
    Key("analysis.primary.horizon_day", "integer", "its horizon: one of analysis.horizons_days (ignored for a measured primary outcome)", None, minimum=1, example=1095,
        default_note="the last of analysis.horizons_days"),
    # ------------------------------------------------------------------ report
    Key("report", "mapping", "the report", {}),
    Key("report.min_cell", "integer", "the smallest count shown; counts 1 .. min_cell-1 are shown as '<min_cell'", 5, minimum=1, example=5),
    # ------------------------------------------------------------------ decision, subgroups
    Key("decision", "mapping", "the decision summary: expected loss per strategy at one horizon (decision.csv)", None,
        example={"horizon_day": 1095, "loss": {"hf_admission": 1.0, "death": 2.5}},
        rule="expected loss of a strategy = sum over the named outcomes of loss x risk at the horizon under it, plus its strategy_loss"),
    Key("decision.horizon_day", "integer", "the horizon of the decision: one of analysis.horizons_days", REQUIRED, minimum=1, example=1095),
    Key("decision.loss", "names", "loss per event of each time-to-event outcome (not a negative control) or death", REQUIRED,
        example={"hf_admission": 1.0, "death": 2.5},
        rule="each outcome's risk counts its first event by the horizon; death (all causes, counted from day 0) is then estimated as an outcome of its own"),
    Key("decision.loss.*", "number", "the loss of one event of this outcome (a finite number)", example=1.0),
    Key("decision.strategy_loss", "names", "the loss of following each strategy itself", {}, example={"kestrel": 0.0},
        default_note="none: following a strategy carries no loss of its own"),
    Key("decision.strategy_loss.*", "number", "the loss of following this arm (a finite number)", example=0.0),
    Key("subgroups", "list", "covariates whose levels each get the whole analysis rerun within them", [],
        example=[{"covariate": "sex"}, {"covariate": "age", "cut": [75]}],
        rule="propensity refitted within each level; estimates.csv rows carry subgroup (sex=F, age<75, age>=75) and the difference between levels of each absolute effect"),
    Key("subgroups[]", "mapping", "one subgroup: a baseline covariate", example={"covariate": "sex"}),
    Key("subgroups[].covariate", "text", "the name of a covariate of the covariates list", REQUIRED, example="sex"),
    Key("subgroups[].cut", "list", "cut points of a continuous covariate (levels x < c1, c1 <= x < c2, ..., x >= ck)", [], example=[75]),
    Key("subgroups[].cut[]", "number", "one cut point, increasing", example=75),
    # ------------------------------------------------------------------ extract_columns
    Key("extract_columns", "names", "column renames per table: {table: {contract column: column in the file}}", {}, example={"dispensings": {"code": "atc"}}),
    Key("extract_columns.*", "names", "one table's renames", example={"code": "atc"}),
    Key("extract_columns.*.*", "text", "the column's name in the file", example="atc"),
)

BY_PATH: dict[str, Key] = {k.path: k for k in KEYS}


def parent(path: str) -> str:
    """``a.b.c`` -> ``a.b``; ``a[]`` -> ``a``; ``a[].b`` -> ``a[]``; top-level keys -> ``""``."""
    if path.endswith("[]"):
        return path[:-2]
    return path.rsplit(".", 1)[0] if "." in path else ""


def children(path: str) -> tuple[Key, ...]:
    """The rows directly below ``path`` (``""`` is the top level), in table order."""
    return tuple(k for k in KEYS if parent(k.path) == path and not k.path.endswith("[]") and k.name != "*")


def known(path: str) -> tuple[str, ...]:
    """The keys a mapping at ``path`` accepts (what the readers pass to ``Collector.mapping``)."""
    return tuple(k.name for k in children(path))


def required(path: str) -> tuple[str, ...]:
    """The keys a mapping at ``path`` must have."""
    return tuple(k.name for k in children(path) if k.required)


def table_path(reader_key: str) -> str:
    """The table path of a key path as the readers report it (``covariates[2] (age).kind`` ->
    ``covariates[].kind``, ``concepts.kestrel.match`` -> ``concepts.*.match``)."""
    key = re.sub(r" \([^)]*\)", "", reader_key)
    key = re.sub(r"\[\d+\]", "[]", key)
    out = ""
    for part in key.split("."):
        if not part:
            continue
        name, brackets = re.match(r"^(.*?)((?:\[\])*)$", part).groups()
        node = BY_PATH.get(out)
        if node is not None and node.type == "names":
            name = "*"
        out = (f"{out}.{name}" if out else name) + brackets
    return out
