"""Parameters of the invented "designs" scenario (all values and codes invented).

Persons have an acute *flare* (the index diagnosis); afterwards a tone marker is recorded every 30
days, kestrel may be started at those visits with a probability that rises with the last recorded
tone (confounding by indication through a time-varying marker that treatment lowers), and the
hazards of a *crisis* (the outcome) and of death follow the current tone and the treatment taken.
See ``synthetic_cohort/README.md`` ("Scenario designs") for the full description.
"""

from __future__ import annotations

from synthetic_cohort.params import day

DATA_END = day("2023-06-30")  # last day of the extract
INDEX_FIRST, INDEX_LAST = day("2017-06-01"), day("2021-03-31")  # index dates are drawn here
ENTRY_START, ENTRY_END = day("2018-01-01"), day("2020-12-31")  # the clone protocols' entry window
TRIALS_START, TRIALS_END = day("2019-01-01"), day("2019-12-31")  # the sequential protocol's
TRIAL_EVERY = 30  # trial_every_days of the sequential protocol
REQUIRE_FLARE = (-1095, -1)  # sequential: the index flare in this window before each trial start
AGE_MIN, AGE_MAX = 40, 90  # eligibility (completed years at time zero)
COVERAGE_BEFORE = 365
WASHOUT = 365
HORIZONS = (365, 730)  # the truths' horizons (days after time zero)

# -- the example strategies whose truths truth.json holds (keep in step with designs/*.yaml)
WINDOW = (0, 89)  # clone: "start kestrel within 90 days of the flare"
THRESHOLDS = (55.0, 60.0, 65.0)  # dynamic: "start within 30 days of the tone rising above x"
WITHIN_DAYS = 30

# -- codes (invented)
FLARE_CODES = ("FLR1", "FLR2")  # the acute flare (inpatient): the index diagnosis
CRISIS_CODES = ("CRS1",)  # the outcome (inpatient)
KESTREL_CODES = ("RXK1", "RXK2")
TONE_CODE, TONE_UNIT = "LBT1", "index"

# -- persons
AGE_MEAN, AGE_SD, AGE_LO, AGE_HI = 63.0, 11.0, 32.0, 92.0  # age at the flare (years)
MALE_PROB = 0.5
PREVALENT_PROB = 0.07  # on kestrel since before the flare (fail the washout)
SHORT_COVERAGE_PROB = 0.05  # coverage from 30..300 days before the flare only
COVERAGE_BEFORE_DAYS = (400, 2500)  # everyone else: coverage starts this many days before
COVERAGE_END_RATE = 0.05  # per year after the flare: loss of coverage (independent of all else)

# -- the tone marker: a routine value on day -30, a rise at the flare, then every 30 days
PERIOD = 30
TONE_BEFORE = {"mean": 52.0, "age10": 1.5, "sd": 6.0}  # L_-1 on day -30
TONE_FLARE = {"rise": 4.0, "sd": 3.0}  # L_0 = L_-1 + rise + N(0, sd^2) on day 0
TONE_STEP = {"rate": 0.2, "sd": 2.0, "target": {"none": 58.0, "kestrel": 47.0}}
# L_{k+1} = L_k + rate * (target(treatment in period k) - L_k) + N(0, sd^2), rounded to 0.1

# -- starting kestrel at visit k (day 30k), decided on the previous visit's tone L_{k-1}:
# logit p_k = intercept + early * exp(-k / early_scale) + tone5 * (L_{k-1} - 55) / 5
#             + age10 * (age_k - 63) / 10
START = {"intercept": -3.6, "early": 2.5, "early_scale": 3.0, "tone5": 0.7, "age10": 0.25}

# -- hazards per year in period k (constant within it; the clock starts at day 1):
# h = rate * exp(age10 * (age_k - 63) / 10 + male * m + tone10 * (L_k - 55) / 10) * hr^(on kestrel)
CRISIS = {"rate": 0.10, "age10": 0.3, "male": 0.2, "tone10": 0.9, "hr": 0.7}
DEATH = {"rate": 0.03, "age10": 0.9, "male": 0.25, "tone10": 0.4, "hr": 0.85}
