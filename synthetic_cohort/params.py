"""Parameters of the invented registry's data-generating process (all values invented).

Every hazard is constant in time (per year, converted to per day), so the true cumulative
incidence of each outcome with death as a competing event has a closed form (see
:func:`synthetic_cohort.truth.cumulative_incidence`). Linear predictors use the covariates *as the
protocol measures them* from the extract, so that the measured covariates are a sufficient
adjustment set (no unmeasured confounding by construction).
"""

from __future__ import annotations

import datetime as dt

EPOCH = dt.date(1970, 1, 1)


def day(text: str) -> int:
    """Days since 1970-01-01 of an ISO date."""
    return (dt.date.fromisoformat(text) - EPOCH).days


REGISTRY_START = day("2008-01-01")  # first day any record can carry
ENTRY_START = day("2017-01-01")  # the protocol's entry window (keep in step with the template)
ENTRY_END = day("2021-12-31")
DATA_END = day("2023-06-30")  # last day of the extract (later than the administrative end)

ARMS = ("kestrel", "plover")  # invented second-line drug classes; kestrel is the treated arm
TREATED = "kestrel"
REGIONS = ("north", "south", "east", "west", "coast")
REGION_PROBS = (0.30, 0.25, 0.20, 0.15, 0.10)
AREA_TYPES = ("urban", "rural")  # a person attribute the protocol does not use

# -- codes (invented). Prefix matching: a list code matches itself and every code below it.
ARM_CODES = {"kestrel": ("RXK1", "RXK1A", "RXK2"), "plover": ("RXP1", "RXP2", "RXP2B")}
ARM_CODE_PROBS = {"kestrel": (0.6, 0.1, 0.3), "plover": (0.5, 0.3, 0.2)}
FIRST_LINE_CODES = ("RXF1", "RXF2", "RXF3")
OTHER_DRUG_CODES = tuple(f"RXO{i:02d}" for i in range(1, 41))
CMD_CODES = ("CMD1", "CMD2.1")  # the chronic condition (required diagnosis)
CV_CODES = ("CVE1", "CVE2")  # prior cardiovascular event
KIDNEY_CODES = ("KDN3",)
HF_CODES = ("HFX", "HFX.1")  # heart failure: prior record excludes; inpatient = the outcome
LENS_CODES = ("LNS2",)  # lens opacity: the negative-control outcome
NOISE_DX_CODES = tuple(f"ZZ{i:02d}" for i in range(1, 31))
MARKER_CODE, MARKER_UNIT = "LBM1", "mmol/mol"  # the metabolic marker (baseline lab and outcome)
OTHER_LAB_CODE, OTHER_LAB_UNIT = "LBQ2", "g/L"

# -- person mix: design types (probabilities). The eligible cohort is decided by the rules, not
# by these labels; the labels only make sure every kind of ineligible person is present.
DESIGNS = {
    "candidate": 0.68,
    "prevalent_user": 0.04,
    "initiated_before_window": 0.025,
    "initiated_after_window": 0.025,
    "too_young": 0.03,
    "too_old": 0.025,
    "short_coverage": 0.03,
    "coverage_gap": 0.02,
    "prior_heart_failure": 0.03,
    "no_condition_record": 0.03,
    "same_day_both": 0.01,
    "never_initiates": 0.03,
    "arm_record_after_death": 0.005,
    "boundary": 0.02,
}
BOUNDARY_CASES = (
    "age_min_birthday",  # time zero on the 40th birthday: age 40, eligible
    "age_min_eve",  # the day before: age 39
    "age_max_last_day",  # the day before the 86th birthday: age 85, eligible
    "age_max_birthday",  # the 86th birthday: age 86
    "coverage_touching",  # two periods, next start = previous end + 1: merged
    "coverage_one_day_gap",  # next start = previous end + 2: not merged
    "coverage_exact",  # coverage starts on day -365
    "coverage_one_short",  # coverage starts on day -364
    "washout_edge_in",  # an arm record on day -365
    "washout_edge_out",  # an arm record on day -366 (before the entry window)
    "require_edge_in",  # the only condition record on day -1825
    "require_edge_out",  # the only condition record on day -1826
    "exclude_edge_in",  # a heart-failure record on day -1825
    "exclude_edge_out",  # a heart-failure record on day -1826
    "exclude_day0",  # a heart-failure record on day 0
    "entry_first_day",  # time zero on the entry window's first day
    "entry_last_day",  # time zero on its last day
    "entry_day_before",  # the only arm records start the day before the window
)

AGE_MEAN, AGE_SD = 63.0, 10.0
MALE_PROB = 0.52

# -- baseline covariates (design values; the protocol re-measures them from the records)
PRIOR_CV = {"intercept": -1.8, "age10": 0.5, "male": 0.4}
KIDNEY = {"intercept": -2.4, "age10": 0.4}
LAB_MEAN, LAB_SD = 55.0, 9.0
LAB_REGION = (0.0, 2.0, -1.5, 3.0, -2.0)
LAB_MEASURED = {"intercept": 1.3, "age10": -0.25, "region": (0.0, -0.4, 0.3, -0.8, 0.5)}
OTHER_DRUGS = {"intercept": 1.1, "cv": 0.8, "kidney": 0.5, "age10": 0.2}  # Poisson mean
FIRST_LINE_PROB = 0.9

# -- treatment choice: logit P(kestrel) (confounding by indication: sicker persons get kestrel)
TREATMENT = {"intercept": -0.45, "age10": 0.35, "male": 0.1, "cv": 0.9, "kidney": 0.6,
             "lab10": 0.5, "lab_missing": 0.3, "drugs": 0.18,
             "region": (0.0, 0.3, -0.3, 0.5, -0.5)}

# -- follow-up hazards per year; covariates as measured: age (completed years), male,
# prior_cv, kidney, lab (last baseline value; 55 when missing) with its missing indicator,
# n_drugs (distinct codes), region.
# the primary outcome: this baseline part times the tone and treatment-taken terms below
PRIMARY = {"rate": 0.035, "age10": 0.45, "male": 0.25, "cv": 0.7, "kidney": 0.4, "lab10": 0.25,
           "lab_missing": 0.2, "drugs": 0.12, "region": (0.0, 0.15, -0.1, 0.25, -0.2),
           "hazard_ratio": {"kestrel": 1.0, "plover": 1.0}}
NEGATIVE_CONTROL = {"rate": 0.02, "age10": 0.6, "male": -0.2, "cv": 0.5, "kidney": 0.5,
                    "lab10": 0.4, "lab_missing": 0.3, "drugs": 0.15,
                    "region": (0.0, 0.1, 0.0, 0.2, -0.1),
                    "hazard_ratio": {"kestrel": 1.0, "plover": 1.0}}
DEATH = {"rate": 0.02, "age10": 0.9, "male": 0.2, "cv": 0.5, "kidney": 0.6, "lab10": 0.1,
         "lab_missing": 0.1, "drugs": 0.05, "region": (0.0, 0.0, 0.1, 0.1, 0.0),
         "hazard_ratio": {"kestrel": 1.0, "plover": 1.0}}
# coverage ends (moving away, leaving the scheme) depend on the arm only: censoring is then
# independent of the outcomes within each arm, so weighting by the propensity alone (no
# censoring weights) recovers the truth
COVERAGE_END = {"rate": 0.12, "age10": 0.0, "male": 0.0, "cv": 0.0, "kidney": 0.0, "lab10": 0.0,
                "lab_missing": 0.0, "drugs": 0.0, "region": (0.0, 0.0, 0.0, 0.0, 0.0),
                "hazard_ratio": {"kestrel": 1.1, "plover": 1.0}}
COVERAGE_RESUME_PROB = 0.5  # after a coverage end, a new period starts after a gap
OUTPATIENT_HF_RATE = 0.03  # outpatient heart-failure records in follow-up (not the outcome)

# -- the measured outcome: the marker near day 365 (no change from baseline)
MARKER_OUTCOME = {"intercept": 52.0, "lab": 0.5, "lab_missing": 3.0, "age10": 0.8, "cv": 1.5,
                  "kidney": 1.0, "drugs": 0.3, "male": 0.5,
                  "region": (0.0, 1.0, -0.5, 1.5, -1.0), "sd": 5.0,
                  "effect": {"kestrel": -4.0, "plover": 0.0}}
MARKER_AT_DAY, MARKER_TOLERANCE = 365, 60
MARKER_JITTER = 45  # the outcome measurement falls on day 365 +- U{0..45}
# logit P(measured near day 365 | alive, covered) -- depends on measured covariates and arm only
MARKER_MEASURED = {"intercept": 1.0, "lab_measured": 0.9, "age10": -0.15, "kestrel": 0.3,
                   "region": (0.0, -0.3, 0.2, -0.5, 0.3)}

# -- staying on the strategy (CONTRACTS §5b) and a time-varying marker it changes. The "tone"
# marker (invented, code LBT1) is measured on the first day of every 30-day period k >= 1 while
# the person is alive, covered and on their strategy (up to the deviation day). Its true value
# moves each period a share RATE of the way to the target of the treatment taken in the period
# before (kestrel 43, plover 46, none 54). At each measurement a person still on their strategy
# switches to the other class, or stops (no further supply; possible once day 30k >= first supply
# + SUSTAIN_GAP), with logit probabilities rising with the recorded value: the marker is a
# time-varying confounder affected by prior treatment. The dispensings are written so that the
# §5b reading with gap SUSTAIN_GAP dates each deviation on that measurement day exactly (refills
# on time or up to 5 days early, a last part-supply ending SUSTAIN_GAP + 1 days before the stop).
# The drug acts until that day.
PERIOD_DAYS = 30
N_PERIODS = 37  # 37 periods of 30 days cover max_days 1095
SUSTAIN_GAP = 60  # the demo protocol's sustain.gap_days (keep in step with the template)
TONE_CODE, TONE_UNIT = "LBT1", "index"
TONE = {"mean0": 50.0, "sd0": 8.0, "rate": 0.25, "noise": 1.5,
        "target": {"kestrel": 43.0, "plover": 46.0, "none": 54.0}}
SWITCH = {"intercept": -3.8, "tone5": 0.8}  # logit P(switch at a measurement | on strategy)
STOP = {"intercept": -3.2, "tone5": 1.0}  # logit P(stop at a measurement | on strategy, possible)
# the primary outcome's hazard also depends on the tone in each period (per 10 units above 50)
# and on the treatment taken in it: a direct hazard ratio per class (none: 1), for women and, a
# weaker one, for men (effect modification by sex: the subgroup analyses' truth)
PRIMARY_TONE10 = 0.9
PRIMARY_TAKEN = {"kestrel": 0.75, "plover": 1.0, "none": 1.0}
PRIMARY_TAKEN_MALE = {"kestrel": 1.05, "plover": 1.0, "none": 1.0}
