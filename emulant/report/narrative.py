"""Words generated from the protocol and the results: the trial-versus-emulation table, the
warnings panel and the assumptions, each tied to this run's evidence."""

from __future__ import annotations

import math
from typing import Any

import pandas as pd

from emulant.protocol import MeasuredOutcome, Protocol
from emulant.report import clones, fmt, trials
from emulant.report import disclosure as dc
from emulant.report.glance import CENSORING_GAP_PP, censoring_gap
from emulant.wording import censoring_assumption, methods_note, variance_note

COMPONENTS = (
    ("eligibility", "Eligibility criteria"),
    ("strategies", "Treatment strategies"),
    ("assignment", "Assignment procedure"),
    ("time_zero", "Time zero (start of follow-up)"),
    ("follow_up", "Follow-up period"),
    ("outcome", "Outcome"),
    ("contrast", "Causal contrast"),
    ("analysis", "Analysis plan"),
)
FEW_EVENTS = 10  # events per arm below which a warning is raised (common practice, no single source)
ESS_SHARE, ESS_MIN = 0.25, 100  # ESS below 25% of the arm's n, or below 100, is small (our choice)
# Positivity warnings need a share that matters, not one person: more than 1% of the cohort with
# an extreme propensity, or the top 1% of weights carrying more than 10% of an estimand's total
# weight (both our choice, common practice has no single threshold)
EXTREME_SHARE, TOP1_SHARE = 0.01, 0.10


def _concept(p: Protocol, name: str) -> str:
    c = p.concepts.get(name)
    if c is None:
        return name
    if not c.codes:
        return f"{name} (the {c.source} table)"
    where = "".join(f", {k} in {{{', '.join(v)}}}" for k, v in c.where)
    return f"{name} ({c.source}: {', '.join(c.codes)}; {c.match} match{where})"


def _outcome(p: Protocol, o: str | MeasuredOutcome) -> str:
    if isinstance(o, MeasuredOutcome):
        chg = ", change from baseline" if o.change_from_baseline else ""
        return (f"{_concept(p, o.measure)} measured at day {o.at_day} ± {o.tolerance_days}{chg}; "
                f"missing values: {o.missing.replace('_', ' ')}")
    return f"{_concept(p, o)}, first record from day 1"


def _per_protocol_text(p: Protocol) -> str:
    """What the per-protocol contrast did: the adherence rules and the weighting."""
    rules = "; ".join(
        f"{a.name}: stops after a supply gap of more than {a.sustain.gap_days} days"
        + (f", switches on a record of {', '.join(a.sustain.switch)}" if a.sustain.switch else "")
        for a in p.strategies.arms if a.sustain is not None)
    tv = ", ".join(c.name for c in p.time_varying) or "none"
    if clones.is_clone(p):
        rules = "starting before the window, not starting by its end, starting in a none arm" + \
            (f"; {rules}" if rules else "")
    return (f" Per protocol: follow-up ends on the day a person deviates ({rules}); the "
            "unadjusted estimate is that artificially censored analysis; ipw and "
            "standardization weight each period by the inverse probability of having stayed on "
            "protocol given the baseline and time-varying covariates "
            f"({tv}; {p.analysis.period_days}-day periods), stabilised.")


def emulation_rows(p: Protocol, attrition: list[dict] | None, bootstrap: dict | None,
                   design: bool) -> list[dict]:
    """One row per trial component: the protocol's free text and what this run did."""
    tt = dict(p.study.target_trial)
    e, s, f, a = p.eligibility, p.strategies, p.follow_up, p.analysis
    age = ""
    if e.age_min is not None or e.age_max is not None:
        age = f"Age {e.age_min if e.age_min is not None else 0}–{e.age_max or 'any'} years at time zero. "
    req = "; ".join(f"Requires {_concept(p, c.concept)} in {fmt.window(c.window)}" for c in e.require)
    exc = "; ".join(f"Excludes {_concept(p, c.concept)} in {fmt.window(c.window)}" for c in e.exclude)
    flow = ""
    if attrition:
        flow = (f" {attrition[-1]['remaining']} of {attrition[0]['remaining']} persons in the "
                f"extract were eligible ({len(attrition)} steps, see the attrition table).")
    arms = "; ".join(clones.arm_words(p, arm, _concept) for arm in s.arms)
    did = {
        "eligibility": (f"Time zero between {e.entry_start} and {e.entry_end}. {age}Continuous coverage "
                        f"for {e.coverage_before_days} days before time zero. "
                        f"{req + '. ' if req else ''}{exc + '. ' if exc else ''}".strip() + flow),
        "strategies": (f"{arms}. New users: no record of either arm's concept in the "
                       f"{s.washout_days} days before time zero. Both started on the same day: "
                       f"{s.same_day.replace('_', ' ')}. Treated arm (defines the ATT): {s.treated}."),
        "assignment": ("Not randomised. Assignment is emulated by adjusting for the baseline "
                       f"covariates {', '.join(c.name for c in p.covariates)} with a "
                       f"{a.propensity.model} propensity model (continuous covariates: "
                       f"{a.propensity.continuous}); weights for {', '.join(p.estimands)}"
                       f"{', stabilized' if a.weights.stabilize else ''}"
                       + (f", truncated at quantiles {a.weights.truncate[0]:g} and "
                          f"{a.weights.truncate[1]:g}" if a.weights.truncate else "") + "."),
        "time_zero": ("The date of the first record of an arm's initiating concept inside the "
                      "entry window: eligibility is assessed, the arm assigned and follow-up "
                      "started on that same day (day 0); a person is tested once, at that date."),
        "follow_up": (f"From day 0 to the first of: the outcome, a competing event, the "
                      f"administrative end ({f.administrative_end or 'none'}), {f.max_days} days "
                      "or the end of coverage (coverage that ends on the administrative end or "
                      "on the last day of follow-up is that planned end, not censoring)."),
        "outcome": ("Primary: " + _outcome(p, p.outcomes.primary) + "."
                    + (" Competing: " + ", ".join(_concept(p, c) for c in p.outcomes.competing)
                       + "." if p.outcomes.competing else "")
                    + (" Secondary: " + "; ".join(_outcome(p, o) for o in p.outcomes.secondary)
                       + "." if p.outcomes.secondary else "")
                    + (" Negative controls: " + ", ".join(p.outcomes.negative_controls) + "."
                       if p.outcomes.negative_controls else "")),
        "contrast": (f"{', '.join(c.replace('_', '-') for c in p.contrasts)} effect of "
                     f"{s.treated} versus {s.comparator}; estimands {', '.join(p.estimands)}."
                     + (_per_protocol_text(p) if p.per_protocol else "")),
        "analysis": (f"Methods: unadjusted, {', '.join(a.methods)}. Horizons: "
                     f"{', '.join(str(h) for h in a.horizons_days)} days."
                     f"{' Hazard ratio: yes.' if a.hazard_ratio else ''} Bootstrap: "
                     f"{a.bootstrap.replicates} replicates, seed {a.bootstrap.seed}, "
                     f"{a.bootstrap.interval} intervals."
                     + (f" {methods_note(p)}" if methods_note(p) else "")
                     + (f" {variance_note(p)}" if variance_note(p) else "")),
    }
    if trials.is_sequential(p):
        did.update(trials.emulation(p, _concept))
        did["assignment"] = did["assignment"].replace(
            " with a ", " and the trial's calendar time (trial, continuous) with a ", 1)
        if attrition:
            did["eligibility"] = did["eligibility"].replace(
                flow, f" {attrition[-1]['remaining']} of {attrition[0]['remaining']} "
                "person-trials were eligible and kept (see the attrition table).")
    if clones.is_clone(p):
        did.update(clones.emulation(p, _concept))
    if design:
        did["analysis"] += " This is the outcome-blind design report: no outcome was analysed."
    elif bootstrap and bootstrap.get("requested") in ("0", 0):
        did["analysis"] += (" This run: no bootstrap replicate (every interval is from the "
                            "influence function).")
    elif bootstrap:
        did["analysis"] += (f" This run: {bootstrap['completed']} of {bootstrap['requested']} "
                            f"replicates completed, {bootstrap['failed']} failed.")
    return [{"id": k, "component": label, "protocol": tt.get(k, ""), "emulation": did[k]}
            for k, label in COMPONENTS]


def warnings(p: Protocol, raw: dict[str, Any], events: dict[str, float], design: bool,
             negative_controls: list[dict] = ()) -> list[dict]:
    """Failed diagnostics, each with the section that shows it; the assumptions' verdicts are
    read from these (:func:`assumptions`), so the panel and the verdicts agree."""
    out: list[dict] = []
    m = p.report.min_cell
    thr = p.analysis.smd_threshold
    bal = raw.get("balance")
    if bal is not None:
        for est, g in bal.groupby(bal["estimand"].astype(str), sort=True):
            v = pd.to_numeric(g["smd_weighted"], errors="coerce").abs()
            over = [f"{r.covariate}" + ("" if fmt.missing(r.level) else f": {r.level}")
                    for r, x in zip(g.itertuples(index=False), v, strict=True) if x > thr]
            if over:
                out.append({"section": "baseline", "text":
                            f"Imbalance after {est} weighting: |SMD| above {thr:g} for "
                            f"{', '.join(over)}."})
    pos = raw.get("positivity")
    if pos:
        ext = pos.get("extreme") or {}
        share = ext.get("share")
        if share is not None and float(share) > EXTREME_SHARE:
            out.append({"section": "positivity", "text":
                        f"Extreme propensity scores: {dc.show_count(ext.get('n'), m)} persons "
                        f"({dc.show_percent(ext.get('n'), sum(float(v) for v in (pos.get('n') or {}).values()), m) or 'a share'}"
                        f", above {EXTREME_SHARE:.0%} of the cohort) below "
                        f"{fmt.sig(ext.get('low'))} or above {fmt.sig(ext.get('high'))}."})
        n = pos.get("n") or {}
        for est, w in (pos.get("weights") or {}).items():
            top = w.get("top1pct_share")
            if top is not None and float(top) > TOP1_SHARE:
                out.append({"section": "positivity", "text":
                            f"Weight concentration under {est} weights: the top 1% of persons "
                            f"carry {fmt.num(100 * float(top), 1)}% of the total weight (above "
                            f"{TOP1_SHARE:.0%})."})
            for arm, ess in (w.get("ess") or {}).items():
                na = n.get(arm)
                if ess is None or na is None:
                    continue
                if float(ess) < ESS_MIN or float(ess) < ESS_SHARE * float(na):
                    out.append({"section": "positivity", "text":
                                f"Small effective sample size under {est} weights in {arm}: "
                                f"{fmt.num(ess, 0)} (below {ESS_MIN} or "
                                f"{ESS_SHARE:.0%} of the arm)."})
        if (pos.get("model") or {}).get("converged") is False:
            out.append({"section": "positivity", "text": "The propensity model did not converge."})
    if not design:
        for arm, ev in events.items():
            if not math.isnan(ev) and ev < FEW_EVENTS:
                out.append({"section": "results", "text":
                            f"Few events: fewer than {FEW_EVENTS} primary-outcome events in "
                            f"{arm}."})
        for nc in negative_controls:
            if nc["includes_null"] is False:
                out.append({"section": "assumptions", "text":
                            f"Negative control {nc['outcome']} ({nc['estimand']}, {nc['method']}, "
                            f"{nc['measure']}): the adjusted interval excludes the null, a sign "
                            "of residual confounding."})
        est = raw.get("estimates")
        if est is not None and "note" in est.columns:
            gone = est[est["estimate"].isna() & est["note"].fillna("").astype(str).str.startswith("not estimable")]
            for (o, note), g in gone.groupby([gone["outcome"].astype(str), gone["note"].astype(str)], sort=True):
                out.append({"section": "results", "text":
                            f"{o}: {len(g)} estimate(s) ({', '.join(sorted(set(g['measure'].astype(str))))}) "
                            f"{note}."})
        gap = censoring_gap(raw.get("cohort"), p)
        if gap and gap[1] > CENSORING_GAP_PP:
            out.append({"section": "assumption-censoring", "text":
                        "Censoring differs between the arms: the shares whose follow-up ended at "
                        f"coverage end differ by more than {CENSORING_GAP_PP:g} percentage points "
                        "(see the end-of-follow-up table)."})
        b = raw.get("bootstrap")
        if b and (b.get("failed") or 0) > 0:
            out.append({"section": "results", "text":
                        f"Bootstrap: {b.get('failed')} of {b.get('requested')} replicates failed."})
    return out


def _missing_outcome(p: Protocol, mm: dict) -> dict:
    """The assumption a measured outcome's missing values rest on, with the counts measured."""
    window = f"day {mm['at_day']} ± {mm['tolerance']}"
    if mm["missing"] == "complete_case":
        statement = ("Persons without a measurement in the window leave the cohort (step "
                     "outcome_measured). The estimate is unbiased for the eligible population only "
                     "if being measured is unrelated to the outcome given arm and the covariates "
                     "and the effect is the same among the measured and the unmeasured; "
                     "otherwise it is the effect among the measured. Persons who died before "
                     f"day {mm['at_day']} have no measurement and leave too: the estimate is "
                     "among survivors, a group the strategies themselves may select.")
        how = "Complete cases: the unmeasured were excluded at the step outcome_measured."
    else:
        statement = ("Values missing in the window are missing at random given arm and the "
                     "covariates: whether a person was measured does not depend on the value "
                     "itself once these are accounted for. Persons who died before day "
                     f"{mm['at_day']} are treated the same way, as missing at random through the "
                     "censoring weights: the estimate is the mean as if no one had died before "
                     "the measurement, a hypothetical in which death is prevented, not the mean "
                     "among survivors.")
        how = ("Inverse probability of being measured weights, from a logistic model of being "
               "measured given arm and the covariates, in every adjusted method (the crude "
               "comparison uses the measured alone).")
    return {"id": f"missing-{mm['outcome']}", "name": f"Missing values of {mm['outcome']}",
            "statement": statement,
            "evidence": [f"Measured outcome {mm['outcome']} at {window}. {how}", *mm["arms"]],
            "threat": False}


def assumptions(p: Protocol, ctx: dict, design: bool) -> list[dict]:
    """The identifying assumptions, each in words with this run's evidence for or against it."""
    thr = p.analysis.smd_threshold
    warn = ctx["warnings"]
    bal_w = [w["text"] for w in warn if w["section"] == "baseline"]
    pos_w = [w["text"] for w in warn if w["section"] == "positivity"]
    nc_w = [w["text"] for w in warn if w["section"] == "assumptions"
            and w["text"].startswith("Negative control")]
    exch = [f"Adjustment set: {', '.join(c.name for c in p.covariates)}."]
    if ctx.get("baseline"):
        exch.append("Balance after weighting: " + (" ".join(bal_w) if bal_w else
                    f"every weighted |SMD| is at most {thr:g}."))
    else:
        exch.append("Balance: not produced in this run.")
    if design:
        exch.append("Negative-control outcomes: not examined in the outcome-blind design report.")
    elif ctx.get("negative_controls"):
        for nc in ctx["negative_controls"]:
            hold = {True: "includes the null", False: "EXCLUDES the null",
                    None: "has no interval"}[nc["includes_null"]]
            exch.append(f"Negative control {nc['outcome']} ({nc['estimand']}, {nc['method']}, "
                        f"{nc['measure']}{', day ' + nc['horizon'] if nc['horizon'] else ''}): "
                        f"{nc['estimate']} ({nc['ci']}) — the interval {hold}.")
    elif p.outcomes.negative_controls:
        exch.append("Negative-control outcomes are named in the protocol but no estimate exists.")
    else:
        exch.append("No negative-control outcome in the protocol.")
    pos = ctx.get("positivity")
    posev = (["Overlap figure and weight summaries in the positivity section; c-statistic "
              f"{pos['c_statistic']}."] + (pos_w or ["No extreme scores and no small effective "
                                                     "sample size flagged."])) if pos else \
        ["Positivity diagnostics: not produced in this run."]
    cens = ctx.get("censoring")
    if design:
        censev = ["Censoring is an outcome-stage quantity: not examined in the design report."]
    elif cens:
        censev = [f"End of follow-up by reason and arm (primary outcome {cens['outcome']}) in the "
                  "table below; coverage end is the censoring that could be informative (coverage "
                  "that ends on a planned end of follow-up is counted as that planned end).",
                  censoring_assumption(p)]
    else:
        censev = ["End-of-follow-up reasons: not produced in this run."]
    a = p.analysis
    return [
        {"id": "exchangeability", "name": "Exchangeability given the named covariates",
         "statement": "Within levels of the adjustment set, the arm a person started is "
                      "independent of the outcome they would have under either strategy.",
         "evidence": exch, "threat": bool(bal_w or nc_w)},
        {"id": "positivity", "name": "Positivity",
         "statement": "Every covariate pattern in the cohort has a non-zero chance of starting "
                      "either arm.", "evidence": posev, "threat": bool(pos_w)},
        {"id": "consistency", "name": "Consistency and well-defined strategies",
         "statement": "The strategies are defined precisely enough that the observed outcome "
                      "under the strategy a person followed is their outcome under it.",
         "evidence": ["Strategies as run: " + "; ".join(
             f"{arm.name} = first record of {_concept(p, arm.initiate)}" for arm in
             p.strategies.arms) + f"; washout {p.strategies.washout_days} days.",
             "Versions of each strategy (dose, product within a code list) are pooled."],
         "threat": False},
        {"id": "no-interference", "name": "No interference",
         "statement": "One person's strategy does not change another person's outcome.",
         "evidence": ["Not testable from the data; plausible for individually taken "
                      "treatments, doubtful for infectious outcomes or shared care."],
         "threat": False},
        {"id": "censoring", "name": "Non-informative censoring",
         "statement": "Leaving follow-up (end of coverage or of the data) is unrelated to the "
                      "outcome given arm and, with censoring weights, the covariates.",
         "evidence": censev,
         "threat": False},
        *[_missing_outcome(p, mm) for mm in ctx.get("measured_missing") or []],
        {"id": "specification", "name": "Correct model specification",
         "statement": "The propensity and outcome models describe the data well enough.",
         "evidence": [f"Propensity: {a.propensity.model} regression, continuous covariates as "
                      f"{a.propensity.continuous}.",
                      f"Outcome methods: {', '.join(a.methods)}; doubly robust estimates stay "
                      "consistent if either model is right."
                      + ("" if not pos or not pos["model"]["warnings"] else
                         " Model warnings: " + "; ".join(pos["model"]["warnings"]))],
         "threat": bool(pos and pos["model"]["converged"] == "no")},
        {"id": "time-zero", "name": "Time zero aligned with eligibility and assignment",
         "statement": "Eligibility, assignment and the start of follow-up coincide, so no "
                      "immortal time or selection after baseline enters.",
         "evidence": ["By construction: all three are the date of the first initiating record "
                      "(day 0); covariates use windows ending at day 0 or before; outcomes count "
                      "from day 1."], "threat": False},
    ]
