"""Build the report's context from the results files, the protocol and the lead's dicts.

Every value handed to the template is a string (or a list or dict of strings) made in Python;
the template only places them. Sections whose results file is absent carry ``None`` and render
as "not produced in this run".
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from emulant.protocol import Protocol, outcome_name
from emulant.protocol.as_input import as_input_yaml
from emulant.report import (
    adherence,
    clones,
    decision,
    figures,
    fmt,
    narrative,
    results,
    tables,
    target,
)
from emulant.report import disclosure as dc
from emulant.report import gformula as gformula_part
from emulant.report.compact import compact_tables
from emulant.report.curve_steps import curve_rule_text
from emulant.report.forest import forest_figure, forest_rows
from emulant.report.glance import glance
from emulant.report.load import read_results
from emulant.report.trials import trials_section

SECTIONS = (
    ("question", "The question"),
    ("glance", "At a glance"),
    ("warnings", "Warnings"),
    ("decision", "Decision summary"),
    ("disclosure", "How counts are shown"),
    ("target-trial", "Target trial and emulation"),
    ("provenance", "Data provenance"),
    ("attrition", "Flow of persons through eligibility"),
    ("baseline", "Baseline characteristics"),
    ("positivity", "Propensity overlap and weights"),
    ("results", "Results"),
    ("subgroups", "Effects by subgroup"),
    ("per-protocol", "Per protocol: staying on the strategies"),
    ("assumptions", "Assumptions"),
    ("target-checklist", "TARGET checklist"),
    ("since-previous", "Since the previous run"),
    ("manifest", "Run manifest"),
    ("protocol", "Appendix: the protocol as parsed"),
    ("codelists", "Appendix: code lists"),
)
DESIGN_OMITS = {"results", "per-protocol", "since-previous", "decision", "subgroups"}


def comparison_context(cmp: dict, protocol: Protocol) -> dict:
    """The "since the previous run" section: changed files, attrition then and now, shifts."""
    att = [{"step": fmt.text(r.get("step")), "previous": fmt.text(r.get("previous")),
            "current": fmt.text(r.get("current")), "change": fmt.text(r.get("change"))}
           for r in cmp.get("attrition") or []]  # already in shown form (disclosure.count_changes)
    est = []
    for r in cmp.get("estimates") or []:
        arms = fmt.text(r.get("arm")) + (f" vs {r['comparator']}" if r.get("comparator") else "")
        est.append({"outcome": fmt.text(r.get("outcome")),
                    "estimand": fmt.text(r.get("estimand")) or "unadjusted",
                    "method": results.METHOD_LABEL.get(r.get("method"), fmt.text(r.get("method"))),
                    "measure": results.measure_label(fmt.text(r.get("measure")), protocol),
                    "horizon": fmt.integer(r.get("horizon_day")), "arms": arms,
                    "previous": fmt.sig(r.get("previous")), "current": fmt.sig(r.get("current")),
                    "shift": fmt.sig(r.get("shift")), "shift_se": fmt.num(r.get("shift_in_se"), 2)})
    return {"previous_stamp": fmt.text(cmp.get("previous_stamp")),
            "changed_inputs": [{"name": fmt.text(c.get("name")),
                                "previous": fmt.text(c.get("previous_sha256")),
                                "current": fmt.text(c.get("sha256"))}
                               for c in cmp.get("changed_inputs") or []],
            "attrition": att, "estimates": est,
            "protocol_diff": cmp.get("protocol_diff") or None}


def manifest_context(man: dict) -> dict:
    """The manifest as rows of text."""
    seeds = man.get("seeds")
    seeds_txt = (", ".join(f"{k}: {v}" for k, v in seeds.items()) if isinstance(seeds, dict)
                 else fmt.text(seeds))
    return {"rows": [("run stamp", fmt.text(man.get("stamp"))),
                     ("study", fmt.text(man.get("study_id"))),
                     ("started", fmt.text(man.get("started"))),
                     ("finished", fmt.text(man.get("finished"))),
                     ("code version", fmt.text(man.get("code_version"))),
                     ("protocol SHA-256", fmt.text(man.get("protocol_sha256"))),
                     ("seeds", seeds_txt),
                     ("previous run", fmt.text(man.get("previous_stamp")) or "none")],
            "packages": sorted((str(k), str(v)) for k, v in (man.get("packages") or {}).items()),
            "inputs": [(fmt.text(i.get("path")), fmt.text(i.get("sha256")))
                       for i in man.get("inputs") or []]}


def codelists(p: Protocol) -> list[dict]:
    """Every concept's codes, with descriptions from its CSV code list where given."""
    out = []
    for name, c in p.concepts.items():
        desc = dict(c.descriptions)
        out.append({"name": name, "source": c.source, "match": c.match,
                    "file": c.codes_file or "",
                    "where": "; ".join(f"{k} in {', '.join(v)}" for k, v in c.where),
                    "codes": [(code, desc.get(code, "")) for code in c.codes]})
    return out


def build_context(results_dir: str | Path, protocol: Protocol, manifest: dict | None = None,
                  comparison: dict | None = None, design: bool = False) -> dict[str, Any]:
    """Everything the template shows, as strings, from the results files and the given dicts."""
    p = protocol
    m = p.report.min_cell
    raw = read_results(results_dir, p, design)
    ctx: dict[str, Any] = {"design": design, "min_cell": m, "rule": dc.rule_text(m),
                           "curve_rule": curve_rule_text(m)}
    ctx["title"] = p.study.title or p.study.id
    ctx["question"] = p.study.question
    ctx["study_id"] = p.study.id
    ctx["stamp"] = fmt.text((manifest or {}).get("stamp")) or "not stamped"
    ctx["arms"] = list(p.strategies.arm_names)
    ctx["treated"] = p.strategies.treated

    ctx["provenance"] = (tables.provenance(raw["extract_check"], m)
                         if raw["extract_check"] is not None else None)
    att = tables.attrition(raw["attrition"], m) if raw["attrition"] is not None else None
    ctx["attrition"] = att
    ctx["attrition_svg"] = figures.attrition_figure(att) if att else None
    ctx["trials"] = trials_section(raw["cohort"], p)  # design sequential only

    base = None
    if raw["cohort"] is not None:
        base = tables.baseline(raw["cohort"], p, raw["balance"])
    elif raw["balance"] is not None:
        base = None
    ctx["baseline"] = base
    ctx["balance_only"] = raw["balance"] is not None and base is None
    ctx["smd_svg"] = (figures.balance_figure(base["dots"], p.analysis.smd_threshold,
                                             base["estimands"])
                      if base and base["dots"] else None)
    ctx["smd_threshold"] = fmt.num(p.analysis.smd_threshold, 2)

    pos = (tables.positivity(raw["positivity"], p, raw["weights"])
           if raw["positivity"] is not None else None)
    ctx["positivity"] = pos
    ctx["overlap_svg"] = (figures.overlap_figure(pos["edges"], pos["hist"], pos["weighted"],
                                                 pos["weighted_title"])
                          if pos and pos["edges"] and all(len(h["heights"]) == len(pos["edges"]) - 1
                                                          for h in pos["hist"]) else None)

    events: dict[str, float] = {}
    if not design:
        est = raw["estimates"]
        ctx["estimates"] = results.estimates(est, p) if est is not None else None
        ctx["compact"] = compact_tables(est, p) if est is not None else None
        ctx["negative_controls"] = results.negative_controls(est, p)
        cv = raw["curves"]
        curves = results.curves(cv, p, raw["cohort"]) if cv is not None else None
        if curves:
            for i, c in enumerate(curves):
                c["svg"] = figures.curves_figure(c["panels"], prefix=f"fig-curves{i}",
                                                  ticks=c["ticks"])
        ctx["curves"] = curves
        ctx["censoring"] = results.censoring(raw["cohort"], p)
        ctx["measured_missing"] = results.measured_missing(raw["cohort"], p)
        ctx["bootstrap"] = results.bootstrap(raw["bootstrap"]) if raw["bootstrap"] else None
        ctx["decision"] = decision.decision_context(raw["decision"], p)
        ctx["subgroups"] = decision.subgroup_context(
            raw["subgroup_estimates"], est, (raw["bootstrap"] or {}).get("subgroups"), p)
        events = results.events_by_arm(raw["cohort"], est, p)
        ctx["comparison"] = comparison_context(comparison, p) if comparison else None
        pp = adherence.section(raw, p)
        if pp is not None:
            pp["gformula"] = gformula_part.section(est, p)
            shown = est if est is None else est[~est["measure"].isin(gformula_part.NATURAL_MEASURES)]
            pp["estimates"] = results.estimates(shown, p, "per_protocol") if est is not None else None
            pp["curves"] = results.curves(cv, p, contrast="per_protocol") if cv is not None else None
            for i, c in enumerate(pp["curves"] or []):
                c["svg"] = figures.curves_figure(c["panels"], prefix=f"fig-pp-curves{i}")
            pp["on_protocol_svg"] = (figures.on_protocol_figure(pp["on_protocol"])
                                     if pp["on_protocol"] else None)
        ctx["pp"] = pp
    else:
        ctx.update(estimates=None, compact=None, negative_controls=[], curves=None, censoring=None,
                   decision=None, subgroups=None,
                   measured_missing=[],
                   bootstrap=None, comparison=None, pp=None)

    ctx["warnings"] = narrative.warnings(p, raw, events, design, ctx["negative_controls"])
    ctx["glance"] = glance(ctx, raw, p, design)
    ctx["forest_svg"] = ctx["nc_forest_svg"] = None
    if not design and raw["estimates"] is not None:
        prim = forest_rows(raw["estimates"], p, [fmt.text(outcome_name(p.outcomes.primary))])
        ctx["forest_svg"] = forest_figure(prim, p.estimands) if prim else None
        ncs = forest_rows(raw["estimates"], p, list(p.outcomes.negative_controls))
        ctx["nc_forest_svg"] = (forest_figure(ncs, p.estimands, prefix="fig-nc-forest")
                                if ncs else None)
    ctx["trial"] = narrative.emulation_rows(p, att, ctx["bootstrap"], design)
    ctx["assumptions"] = narrative.assumptions(p, ctx, design)
    if ctx["pp"] is not None:
        ctx["assumptions"] += adherence.assumptions(p, ctx["pp"])
        ctx["warnings"] += [{"section": "per-protocol", "text": w}
                            for w in ctx["pp"]["weight_warnings"]]
        ctx["assumptions"] += gformula_part.assumptions(p, ctx["pp"].get("gformula"))
        ctx["warnings"] += [{"section": "per-protocol", "text": w}
                            for w in (ctx["pp"].get("gformula") or {}).get("warnings", [])]
        ctx["pp"]["clones"] = clones.section(raw, p, ctx["pp"])
        if ctx["pp"]["clones"] is not None:
            ctx["assumptions"] += clones.assumptions(p, raw.get("cohort"), ctx["pp"])
            ctx["warnings"] += [{"section": "per-protocol", "text": w}
                                for w in ctx["pp"]["clones"]["warnings"]]
    ctx["manifest"] = manifest_context(manifest) if manifest else None
    ctx["protocol_yaml"] = as_input_yaml(p)
    ctx["codelists"] = codelists(p)

    present = {"question", "glance", "target-trial", "assumptions", "manifest", "protocol", "codelists"}
    for sid, key in (("provenance", "provenance"), ("attrition", "attrition"),
                     ("baseline", "baseline"), ("positivity", "positivity")):
        if ctx[key]:
            present.add(sid)
    if not design and (ctx["estimates"] or ctx["curves"]):
        present.add("results")
    if not manifest:
        present.discard("manifest")
    titles = dict(SECTIONS)
    ctx["target"] = target.checklist(present, design)
    for t in ctx["target"]:
        t["title"] = titles.get(t["section"], "")
    ctx["sections"] = [{"id": sid, "title": t} for sid, t in SECTIONS
                       if not (design and sid in DESIGN_OMITS)
                       and not (sid == "since-previous" and not ctx["comparison"])
                       and not (sid in ("decision", "subgroups") and not ctx.get(sid))
                       and not (sid == "per-protocol" and not ctx.get("pp"))]
    return ctx
