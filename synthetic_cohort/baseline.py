"""Step 1 of the generator: persons, their records up to the planned index date, coverage starts.

Every person gets a *design* (see :data:`synthetic_cohort.params.DESIGNS`): most are candidates
for the cohort, the others are built to fail one eligibility rule each, or to sit exactly on a
rule's boundary. All draws are vectorised over persons.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from synthetic_cohort import params as P
from synthetic_cohort.records import NONE, Rows

VOCAB = (*P.ARM_CODES["kestrel"], *P.ARM_CODES["plover"], *P.FIRST_LINE_CODES,
         *P.OTHER_DRUG_CODES, *P.CMD_CODES, *P.CV_CODES, *P.KIDNEY_CODES, *P.HF_CODES,
         *P.LENS_CODES, *P.NOISE_DX_CODES, P.MARKER_CODE, P.OTHER_LAB_CODE, P.TONE_CODE)
CODE = {c: i for i, c in enumerate(VOCAB)}
UNITS = (P.MARKER_UNIT, P.OTHER_LAB_UNIT, P.TONE_UNIT)
INPATIENT, OUTPATIENT = 0, 1


def logistic(x: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-x))


def uniform_days(rng: np.random.Generator, lo, hi, size: int) -> np.ndarray:
    """Whole days uniform on ``lo..hi`` (both included)."""
    return rng.integers(lo, np.asarray(hi) + 1, size=size)


def minus_years(days: np.ndarray, years: int) -> np.ndarray:
    """The same calendar day ``years`` earlier (the day must not be 29 February)."""
    d = np.asarray(days).astype("datetime64[D]")
    month = d.astype("datetime64[M]")
    dom = d - month.astype("datetime64[D]")
    return ((month - np.timedelta64(12 * years, "M")).astype("datetime64[D]") + dom).astype(
        np.int64)


def _month_day(days: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    d = np.asarray(days).astype("datetime64[D]")
    m = d.astype("datetime64[M]")
    return ((m - d.astype("datetime64[Y]").astype("datetime64[M]")).astype(np.int64) + 1,
            (d - m.astype("datetime64[D]")).astype(np.int64) + 1)


def arm_codes(rng: np.random.Generator, arm: np.ndarray) -> np.ndarray:
    """A code of the arm's class for each person (arm 0 kestrel, 1 plover)."""
    out = np.empty(len(arm), np.int64)
    for i, name in enumerate(P.ARMS):
        m = arm == i
        out[m] = rng.choice([CODE[c] for c in P.ARM_CODES[name]], size=int(m.sum()),
                            p=P.ARM_CODE_PROBS[name])
    return out


@dataclass
class Baseline:
    """Design values per person and the rows written so far."""

    design: np.ndarray  # index into DESIGNS
    case: np.ndarray  # index into BOUNDARY_CASES, -1 when not a boundary person
    t0p: np.ndarray  # planned index date
    birth: np.ndarray
    sex: np.ndarray
    region: np.ndarray
    area: np.ndarray
    arm: np.ndarray  # planned arm of the index dispensing
    arm_code: np.ndarray
    days_supply: np.ndarray
    first_line: np.ndarray
    death: np.ndarray
    cov: Rows  # coverage rows; the first n rows are each person's open (last) period
    disp: Rows
    diag: Rows
    meas: Rows
    tone0: np.ndarray  # the true tone on day 0 (NaN until follow-up is drawn)

    def is_design(self, name: str) -> np.ndarray:
        return self.design == list(P.DESIGNS).index(name)

    def is_case(self, name: str) -> np.ndarray:
        return self.case == P.BOUNDARY_CASES.index(name)


def _index_dates(rng, n, design, case) -> np.ndarray:
    names = list(P.DESIGNS)
    t0p = uniform_days(rng, P.ENTRY_START, P.ENTRY_END, n)

    def put(mask, values):
        t0p[mask] = values if np.ndim(values) == 0 else values[mask]

    put(design == names.index("prevalent_user"), uniform_days(rng, P.ENTRY_START, P.ENTRY_START + 60, n))
    put(design == names.index("initiated_before_window"),
        uniform_days(rng, P.ENTRY_START - 900, P.ENTRY_START - 100, n))
    put(design == names.index("initiated_after_window"),
        uniform_days(rng, P.ENTRY_END + 1, P.ENTRY_END + 300, n))
    cases = P.BOUNDARY_CASES
    put(np.isin(case, [cases.index("washout_edge_in"), cases.index("washout_edge_out")]),
        uniform_days(rng, P.ENTRY_START, P.ENTRY_START + 300, n))
    put(case == cases.index("entry_first_day"), P.ENTRY_START)
    put(case == cases.index("entry_last_day"), P.ENTRY_END)
    put(case == cases.index("entry_day_before"), P.ENTRY_START - 1)
    m, d = _month_day(t0p)  # boundary persons: keep day 0 and day 1 off 29 February
    shift = (case >= 0) & (m == 2) & (d >= 28) & (t0p != P.ENTRY_END)
    t0p[shift] -= 2
    return t0p


def _births(rng, n, design, case, t0p) -> tuple[np.ndarray, np.ndarray]:
    names, cases = list(P.DESIGNS), P.BOUNDARY_CASES
    age = np.clip(rng.normal(P.AGE_MEAN, P.AGE_SD, n), 40.1, 85.9)
    young, old = design == names.index("too_young"), design == names.index("too_old")
    age[young] = rng.uniform(25.0, 39.9, int(young.sum()))
    age[old] = rng.uniform(86.1, 97.0, int(old.sum()))
    birth = t0p - np.round(age * 365.25).astype(np.int64)
    m, d = _month_day(birth)
    birth[(m == 2) & (d == 29)] -= 1  # no 29 February births: the birthday rule stays unambiguous
    for name, shift, years in (("age_min_birthday", 0, 40), ("age_min_eve", 1, 40),
                               ("age_max_last_day", 1, 86), ("age_max_birthday", 0, 86)):
        sel = case == cases.index(name)
        birth[sel] = minus_years(t0p[sel] + shift, years)
        age[sel] = (t0p[sel] - birth[sel]) / 365.25
    return birth, age


def baseline(rng: np.random.Generator, n: int) -> Baseline:
    """Draw persons and every record up to (and on) each person's planned index date."""
    names = list(P.DESIGNS)
    design = rng.choice(len(names), size=n, p=np.asarray(list(P.DESIGNS.values())))
    case = np.where(design == names.index("boundary"),
                    rng.integers(0, len(P.BOUNDARY_CASES), n), -1)
    t0p = _index_dates(rng, n, design, case)
    birth, age = _births(rng, n, design, case, t0p)
    sex = (rng.random(n) < P.MALE_PROB).astype(np.int64)  # 1 = M
    region = rng.choice(len(P.REGIONS), size=n, p=P.REGION_PROBS)
    area = (rng.random(n) < 0.35).astype(np.int64)
    age10 = (age - P.AGE_MEAN) / 10

    cv = rng.random(n) < logistic(P.PRIOR_CV["intercept"] + P.PRIOR_CV["age10"] * age10
                                  + P.PRIOR_CV["male"] * sex)
    kidney = rng.random(n) < logistic(P.KIDNEY["intercept"] + P.KIDNEY["age10"] * age10)
    lab = rng.normal(P.LAB_MEAN + np.asarray(P.LAB_REGION)[region] + 1.5 * kidney, P.LAB_SD)
    lab_measured = rng.random(n) < logistic(P.LAB_MEASURED["intercept"]
                                            + P.LAB_MEASURED["age10"] * age10
                                            + np.asarray(P.LAB_MEASURED["region"])[region])
    od = P.OTHER_DRUGS
    n_other = np.minimum(rng.poisson(np.maximum(0.1, od["intercept"] + od["cv"] * cv
                                                + od["kidney"] * kidney + od["age10"] * age10)), 8)
    first_line = rng.random(n) < P.FIRST_LINE_PROB
    tr = P.TREATMENT
    lab10 = np.where(lab_measured, (lab - P.LAB_MEAN) / 10, 0.0)
    logit = (tr["intercept"] + tr["age10"] * age10 + tr["male"] * sex + tr["cv"] * cv
             + tr["kidney"] * kidney + tr["lab10"] * lab10 + tr["lab_missing"] * ~lab_measured
             + tr["drugs"] * (n_other + first_line - 2) + np.asarray(tr["region"])[region])
    arm = np.where(rng.random(n) < logistic(logit), 0, 1)
    b = Baseline(design, case, t0p, birth, sex, region, area, arm, arm_codes(rng, arm),
                 rng.choice([30, 90], size=n, p=[0.6, 0.4]), first_line,
                 np.full(n, NONE, np.int64), Rows({"end_date": np.int64}),
                 Rows({"code": np.int64, "days_supply": np.int64}),
                 Rows({"code": np.int64, "setting": np.int64}),
                 Rows({"code": np.int64, "value": np.float64, "unit": np.int64}),
                 np.full(n, np.nan))
    _coverage(rng, b)
    _dispensings(rng, b, n_other)
    _diagnoses(rng, b, cv, kidney)
    _measurements(rng, b, lab, lab_measured)
    return b


def _coverage(rng, b: Baseline) -> None:
    n, t0p = len(b.t0p), b.t0p
    start = t0p - 365 - np.floor(rng.exponential(1800.0, n)).astype(np.int64)
    short = b.is_design("short_coverage")
    start[short] = t0p[short] - uniform_days(rng, 30, 364, n)[short]
    gap = b.is_design("coverage_gap")
    start[gap] = t0p[gap] - uniform_days(rng, 30, 300, n)[gap]
    for name, s in (("coverage_touching", 199), ("coverage_one_day_gap", 198),
                    ("coverage_exact", 365), ("coverage_one_short", 364)):
        sel = b.is_case(name)
        start[sel] = t0p[sel] - s
    start = np.maximum(start, P.REGISTRY_START)
    # the open period; its end is set after time zero is known (placeholder: the data end)
    b.cov.add(np.arange(n), start, end_date=np.full(n, P.DATA_END))
    # earlier periods: before a gap (coverage_gap), touching / one day apart (boundary cases)
    earlier = gap.copy()
    end = start - uniform_days(rng, 2, 60, n)
    for name, e in (("coverage_touching", 200), ("coverage_one_day_gap", 200)):
        sel = b.is_case(name)
        earlier |= sel
        end[sel] = t0p[sel] - e
    extra = (b.is_design("candidate") & (rng.random(n) < 0.10))
    end[extra] = (start - uniform_days(rng, 2, 300, n))[extra]
    earlier |= extra
    first = np.maximum(end - uniform_days(rng, 100, 1500, n), P.REGISTRY_START)
    keep = np.flatnonzero(earlier & (first <= end))
    b.cov.add(keep, first[keep], end_date=end[keep])
    # overlapping duplicates, merged away by the rules
    dup = np.flatnonzero(b.is_design("candidate") & (rng.random(n) < 0.05))
    s = start[dup] + uniform_days(rng, 0, 100, len(dup))
    e = np.minimum(start[dup] + uniform_days(rng, 200, 600, len(dup)), t0p[dup] - 30)
    b.cov.add(dup, s, end_date=np.maximum(e, s))


def _dispensings(rng, b: Baseline, n_other: np.ndarray) -> None:
    n, t0p, d = len(b.t0p), b.t0p, b.disp
    no_index = b.is_design("never_initiates")
    after_death = b.is_design("arm_record_after_death")  # died before the only arm records
    b.death[after_death] = t0p[after_death] - uniform_days(rng, 1, 60, n)[after_death]
    idx = np.flatnonzero(~no_index)
    d.add(idx, t0p[idx], code=b.arm_code[idx], days_supply=b.days_supply[idx])
    both = np.flatnonzero(b.is_design("same_day_both"))
    d.add(both, t0p[both], code=arm_codes(rng, 1 - b.arm[both]), days_supply=30)
    # refills of those who started before the window, stopped before it
    pre = np.flatnonzero(b.is_design("initiated_before_window"))
    k = rng.integers(0, 6, len(pre))
    rep = np.repeat(pre, k)
    j = np.arange(len(rep)) - np.repeat(np.cumsum(k) - k, k) + 1
    day = t0p[rep] + j * (b.days_supply[rep] + 7) + rng.integers(0, 8, len(rep))
    ok = day < P.ENTRY_START
    d.add(rep[ok], day[ok], code=b.arm_code[rep[ok]], days_supply=b.days_supply[rep[ok]])
    # prevalent users: earlier use of either class before the window, within 365 days
    prev = np.flatnonzero(b.is_design("prevalent_user"))
    k = rng.integers(1, 4, len(prev))
    rep = np.repeat(prev, k)
    other = rng.random(len(rep)) < 0.3
    code = np.where(other, arm_codes(rng, 1 - b.arm[rep]), b.arm_code[rep])
    d.add(rep, P.ENTRY_START - uniform_days(rng, 1, 300, len(rep)), code=code, days_supply=30)
    for name, back in (("washout_edge_in", 365), ("washout_edge_out", 366)):
        sel = np.flatnonzero(b.is_case(name))
        d.add(sel, t0p[sel] - back, code=b.arm_code[sel], days_supply=30)
    # the first-line drug and other drugs (n_drugs counts distinct codes in days -365..-1)
    fl = np.flatnonzero(b.first_line)
    fcode = rng.integers(0, len(P.FIRST_LINE_CODES), n) + CODE[P.FIRST_LINE_CODES[0]]
    for lo, hi in ((1, 120), (121, 365), (366, 700)):
        d.add(fl, t0p[fl] - uniform_days(rng, lo, hi, len(fl)), code=fcode[fl], days_supply=90)
    rep = np.repeat(np.arange(n), n_other)
    j = np.arange(len(rep)) - np.repeat(np.cumsum(n_other) - n_other, n_other)
    start = rng.integers(0, len(P.OTHER_DRUG_CODES), n)
    code = CODE[P.OTHER_DRUG_CODES[0]] + (start[rep] + j) % len(P.OTHER_DRUG_CODES)
    d.add(rep, t0p[rep] - uniform_days(rng, 1, 365, len(rep)), code=code, days_supply=30)
    old = np.flatnonzero(rng.random(n) < 0.4)
    d.add(old, t0p[old] - uniform_days(rng, 366, 900, len(old)),
          code=CODE[P.OTHER_DRUG_CODES[0]] + rng.integers(0, 40, len(old)), days_supply=30)


def _diagnoses(rng, b: Baseline, cv: np.ndarray, kidney: np.ndarray) -> None:
    n, t0p, g = len(b.t0p), b.t0p, b.diag
    cmd = rng.integers(0, len(P.CMD_CODES), n) + CODE[P.CMD_CODES[0]]
    none = b.is_design("no_condition_record")
    edge_in, edge_out = b.is_case("require_edge_in"), b.is_case("require_edge_out")
    usual = np.flatnonzero(~none & ~edge_in & ~edge_out)
    g.add(usual, t0p[usual] - uniform_days(rng, 0, 1825, len(usual)), code=cmd[usual],
          setting=OUTPATIENT)
    k = rng.poisson(1.5, len(usual))
    rep = np.repeat(usual, k)
    g.add(rep, t0p[rep] - uniform_days(rng, 0, 3000, len(rep)), code=cmd[rep], setting=OUTPATIENT)
    old = np.flatnonzero(none & (rng.random(n) < 0.5))
    g.add(old, t0p[old] - uniform_days(rng, 1826, 3500, len(old)), code=cmd[old],
          setting=OUTPATIENT)
    for sel, back in ((edge_in, 1825), (edge_out, 1826)):
        sel = np.flatnonzero(sel)
        g.add(sel, t0p[sel] - back, code=cmd[sel], setting=OUTPATIENT)
    cvc = rng.integers(0, len(P.CV_CODES), n) + CODE[P.CV_CODES[0]]
    sel = np.flatnonzero(cv)
    g.add(sel, t0p[sel] - uniform_days(rng, 1, 1825, len(sel)), code=cvc[sel], setting=INPATIENT)
    u = rng.random(n)
    sel = np.flatnonzero(~cv & (u < 0.03))  # only long ago: outside the covariate's window
    g.add(sel, t0p[sel] - uniform_days(rng, 1826, 3000, len(sel)), code=cvc[sel],
          setting=INPATIENT)
    sel = np.flatnonzero(~cv & (u > 0.99))  # on day 0: outside the window [-1825, -1]
    g.add(sel, t0p[sel], code=cvc[sel], setting=INPATIENT)
    sel = np.flatnonzero(kidney)
    g.add(sel, t0p[sel] - uniform_days(rng, 1, 1825, len(sel)), code=CODE["KDN3"],
          setting=OUTPATIENT)
    hf = rng.integers(0, len(P.HF_CODES), n) + CODE[P.HF_CODES[0]]
    setting = rng.integers(0, 2, n)
    sel = np.flatnonzero(b.is_design("prior_heart_failure"))
    g.add(sel, t0p[sel] - uniform_days(rng, 0, 1825, len(sel)), code=hf[sel], setting=setting[sel])
    for name, back in (("exclude_edge_in", 1825), ("exclude_edge_out", 1826), ("exclude_day0", 0)):
        sel = np.flatnonzero(b.is_case(name))
        g.add(sel, t0p[sel] - back, code=hf[sel], setting=setting[sel])
    sel = np.flatnonzero(rng.random(n) < 0.05)  # earlier lens opacity: not an outcome event
    g.add(sel, t0p[sel] - uniform_days(rng, 1, 2000, len(sel)), code=CODE["LNS2"],
          setting=OUTPATIENT)
    k = rng.poisson(2.0, n)
    rep = np.repeat(np.arange(n), k)
    g.add(rep, t0p[rep] - uniform_days(rng, 0, 2000, len(rep)),
          code=CODE[P.NOISE_DX_CODES[0]] + rng.integers(0, len(P.NOISE_DX_CODES), len(rep)),
          setting=np.where(rng.random(len(rep)) < 0.2, INPATIENT, OUTPATIENT))
    sel = np.flatnonzero(rng.random(n) < 0.001)  # implausible: dated before birth
    g.add(sel, b.birth[sel] - uniform_days(rng, 1, 100, len(sel)), code=CODE["ZZ01"],
          setting=OUTPATIENT)


def _measurements(rng, b: Baseline, lab: np.ndarray, measured: np.ndarray) -> None:
    n, t0p, m = len(b.t0p), b.t0p, b.meas
    sel = np.flatnonzero(measured)
    for lo, hi, share in ((0, 200, 1.0), (201, 365, 0.5), (400, 900, 0.3)):
        s = sel[rng.random(len(sel)) < share]
        value = np.round(lab[s] + rng.normal(0.0, 1.5, len(s)), 1)
        m.add(s, t0p[s] - uniform_days(rng, lo, hi, len(s)), code=CODE[P.MARKER_CODE],
              value=value, unit=0)
    m.add(np.arange(n), t0p - uniform_days(rng, 0, 365, n), code=CODE[P.OTHER_LAB_CODE],
          value=np.round(rng.normal(140.0, 10.0, n)), unit=1)
