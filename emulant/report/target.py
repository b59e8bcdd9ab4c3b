"""A checklist after the TARGET reporting guideline for target trial emulation.

Source: Cashin AG et al., 2025, the TARGET guideline ("Transparent reporting of observational
studies emulating a target trial"). The items below are written in our own words FROM MEMORY of
its structure (title and abstract, introduction, methods per protocol component, results,
discussion, other information); they are not the guideline's text, and their number and order
may differ from the published list. Each item names the report section that answers it, or
"not reported" where a run of this program cannot answer it.
"""

from __future__ import annotations

# (item, section id or None, note). Section ids are the report's stable anchors.
ITEMS: tuple[tuple[str, str | None, str], ...] = (
    ("Identify the study as an emulation of a target trial in the title", "question", ""),
    ("Structured summary of design, data, estimands and results", None,
     "a report is not a paper; the sections below are the summary"),
    ("Background and rationale for the causal question", None, "outside the run"),
    ("The causal question and the target trial that would answer it", "question", ""),
    ("Data sources, their coverage, and how records were linked", "provenance", ""),
    ("Eligibility criteria of the target trial and how they were emulated", "target-trial", ""),
    ("Treatment strategies and how they were identified in the data", "target-trial", ""),
    ("Assignment procedure and how randomisation was emulated", "target-trial", ""),
    ("Start (time zero) and end of follow-up, aligned with eligibility and assignment",
     "target-trial", ""),
    ("Outcomes and how they were ascertained", "target-trial", ""),
    ("Causal contrasts and estimands", "target-trial", ""),
    ("Identifying assumptions", "assumptions", ""),
    ("Statistical analysis: confounding adjustment, missing data, censoring, precision",
     "target-trial", "with the models in the assumptions and the protocol appendix"),
    ("Differences between the target trial and its emulation", "target-trial", ""),
    ("Flow of persons through eligibility", "attrition", ""),
    ("Baseline characteristics by strategy, before and after adjustment", "baseline", ""),
    ("Follow-up and censoring by strategy", "assumptions", "end-of-follow-up reasons"),
    ("Effect estimates with precision for each estimand, absolute and relative", "results", ""),
    ("Additional analyses: negative controls, sensitivity to unmeasured confounding",
     "results", "E-values in the estimates; negative controls under exchangeability"),
    ("Interpretation and limitations", None, "for the authors; the assumptions section lists "
     "what this run supports or threatens"),
    ("Protocol registration, code and data availability, versions", "manifest", ""),
    ("Funding and conflicts of interest", None, "outside the run"),
)

OUTCOME_SECTIONS = {"results"}


def checklist(present: set[str], design: bool) -> list[dict]:
    """Each item with the section answering it, or ``not reported`` (with the reason)."""
    out = []
    for i, (item, sec, note) in enumerate(ITEMS, start=1):
        where = sec if sec in present else None
        why = note
        if sec and design and sec in OUTCOME_SECTIONS:
            where, why = None, "outcome-blind design report"
        elif sec and sec not in present:
            why = "its results file was not produced in this run"
        out.append({"number": i, "item": item, "section": where, "note": why})
    return out
