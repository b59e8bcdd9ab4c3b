"""The report's flow of a sequence of trials and its target-trial words (CONTRACTS §5c).

Hand-counted expectations on an invented cohort of person-trials.
"""

from __future__ import annotations

import pandas as pd

from emulant.protocol import parse_protocol
from emulant.report import narrative
from emulant.report.trials import trials_section

PROTOCOL = {
    "study": {"id": "trials-report"},
    "concepts": {"kestrel": {"source": "dispensings", "codes": ["KST"]},
                 "hf": {"source": "diagnoses", "codes": ["HF5"]}},
    "eligibility": {"entry": {"start": "2018-01-01", "end": "2018-03-31"}},
    "strategies": {"design": "sequential", "trial_every_days": 30, "noninitiator_sample": 0.5,
                   "arms": {"kestrel": {"initiate": "kestrel"}, "no_kestrel": {"initiate": "none"}}},
    "outcomes": {"primary": "hf"},
    "report": {"min_cell": 2},
}


def _cohort() -> pd.DataFrame:
    # persons 1..3 non-initiators in trials 0 and 1; person 1 starts in trial 2; person 4 only
    # in trial 2 (a non-initiator)
    rows = [(1, 0, "no_kestrel"), (2, 0, "no_kestrel"), (3, 0, "no_kestrel"),
            (1, 1, "no_kestrel"), (2, 1, "no_kestrel"), (3, 1, "no_kestrel"),
            (1, 2, "kestrel"), (4, 2, "no_kestrel")]
    df = pd.DataFrame(rows, columns=["person_id", "trial", "arm"])
    df["time_zero"] = pd.Timestamp("2018-01-01") + pd.to_timedelta(df["trial"] * 30, unit="D")
    df["sample_weight"] = (df["arm"] == "no_kestrel") * 1.0 + 1.0
    return df


def test_trials_section_counts_by_hand():
    p = parse_protocol(PROTOCOL)
    t = trials_section(_cohort(), p)
    assert t["n_trials"] == 3 and t["arms"] == ["kestrel", "no_kestrel"]
    assert [(r["trial"], r["month"]) for r in t["rows"]] == [(0, "2018-01"), (1, "2018-01"),
                                                            (2, "2018-03")]
    # min_cell 2: counts of 1 are hidden
    assert [r["cells"] for r in t["rows"]] == [["0", "3"], ["0", "3"], ["<2", "<2"]]
    assert (t["person_trials"], t["persons"], t["several"]) == ("8", "4", "3")
    assert t["most"] is None and t["sampled"]  # one person in three trials: below min_cell
    assert trials_section(_cohort().drop(columns=["trial"]), p) is None


def test_target_trial_table_states_the_design_and_time_zero():
    p = parse_protocol(PROTOCOL)
    att = [{"remaining": "12"}, {"remaining": "8"}]
    rows = {r["component"] if "component" in r else i: r
            for i, r in enumerate(narrative.emulation_rows(p, att, None, False))}
    text = " ".join(str(v) for r in rows.values() for v in r.values())
    assert "Design sequential: a trial starts every 30 days" in text
    assert "The start of each trial: 2018-01-01 and every 30 days after it up to 2018-03-31" in text
    assert "sampled at a share of 0.5 (weight 2)" in text
    assert "8 of 12 person-trials were eligible" in text
    assert "the trial's calendar time" in text


def test_distinct_persons_are_suppressed_as_a_chain():
    from emulant.audit.shareable import shareable_attrition
    from emulant.report.tables import attrition

    # one person leaves at 'alive' (20 -> 19): two shown neighbours would reveal that 1
    att = pd.DataFrame({"step": ["person_trials", "alive", "age"], "description": ["", "", ""],
                        "remaining": [200, 180, 160], "excluded": [0, 20, 20],
                        "persons": [20, 19, 19]})
    shown = [r["persons"] for r in attrition(att, 5)]
    shared = shareable_attrition(att, 5)["persons"].tolist()
    assert shown == shared
    assert not (shown[0].isdigit() and shown[1].isdigit())
    assert shown[0] == "20" or shown[1] == "19"  # only what is needed is hidden
