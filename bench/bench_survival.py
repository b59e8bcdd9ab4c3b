"""Benchmark of the time-to-event estimates on a 200,000-person simulated cohort.

Times the weighted Aalen–Johansen curves, the Cox hazard ratio, the pooled logistic g-formula
and a whole point estimate (`time_to_event_estimates`: unadjusted, IPW, standardization and
doubly robust for ATE and ATT), then two bootstrap replicates (multinomial frequency weights),
extrapolated to 200 replicates, beside lifelines' weighted Kaplan–Meier time on the same data.
The cohort is simulated arrays (invented), not the demo extract.
"""

from __future__ import annotations

import time
import warnings

import numpy as np
import pandas as pd

from emulant import columns
from emulant.estimation.cox import cox_hazard_ratio
from emulant.estimation.pooled_logistic import gformula_incidence, hazard_models
from emulant.estimation.sample import AnalysisSample
from emulant.estimation.survival import aalen_johansen, km
from emulant.estimation.tte import outcome_arrays, time_to_event_estimates
from emulant.protocol import parse_protocol

N = 200_000
P_COVARIATES = 10
MAX_DAYS = 1095
REPLICATES = 200


def _protocol(censoring_weights: bool = False):
    return parse_protocol({
        "study": {"id": "bench"},
        "concepts": {"drug_a": {"source": "dispensings", "codes": ["XA1"]},
                     "drug_b": {"source": "dispensings", "codes": ["XB1"]},
                     "event": {"source": "diagnoses", "codes": ["EV1"]}},
        "eligibility": {"entry": {"start": "2016-01-01", "end": "2021-12-31"}},
        "strategies": {"arms": {"drug_a": {"initiate": "drug_a"},
                                "drug_b": {"initiate": "drug_b"}}, "treated": "drug_a"},
        "follow_up": {"max_days": MAX_DAYS},
        "outcomes": {"primary": "event", "competing": ["death"]},
        "covariates": [],
        "estimands": ["ATE", "ATT"],
        "analysis": {"horizons_days": [365, 730, 1095], "period_days": 30,
                     "censoring_weights": censoring_weights}})


def simulate(n: int = N, seed: int = 1):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, P_COVARIATES))
    lin = X[:, :3] @ np.array([0.5, -0.3, 0.2])
    e = 1 / (1 + np.exp(-lin))
    a = (rng.uniform(size=n) < e).astype(int)
    t1 = np.ceil(rng.exponential(1 / (0.0004 * np.exp(0.6 * X[:, 0] - 0.4 * a))))
    t2 = np.ceil(rng.exponential(1 / (0.0002 * np.exp(0.4 * X[:, 1]))))
    c = rng.integers(30, 1500, n).astype(float)
    end = np.minimum.reduce([t1, t2, c, np.full(n, float(MAX_DAYS))])
    reason = np.select([t1 == end, t2 == end, c == end], ["outcome", "competing", "coverage_end"],
                       "max_follow_up")
    cohort = pd.DataFrame({"treated": a, columns.end_day("event"): end,
                           columns.end_reason("event"): reason})
    return cohort, X, a, e


def _sample(cohort, X, a, e, protocol, freq):
    w = {"ATE": np.where(a == 1, 1 / e, 1 / (1 - e)), "ATT": np.where(a == 1, 1.0, e / (1 - e))}
    return AnalysisSample(cohort, protocol, X, tuple(f"x{i}" for i in range(X.shape[1])),
                          a.astype(float), freq, e, w)


def _timed(fn, *args, **kwargs):
    t0 = time.perf_counter()
    out = fn(*args, **kwargs)
    return out, time.perf_counter() - t0


def main() -> None:
    cohort, X, a, e = simulate()
    t, s = outcome_arrays(cohort, "event")
    f = np.ones(N)
    print(f"cohort: {N:,} persons, {P_COVARIATES} covariates, {int((s == 1).sum()):,} outcomes, "
          f"{int((s == 2).sum()):,} competing events")
    _, dt = _timed(lambda: [aalen_johansen(t[a == g], s[a == g], f[a == g]) for g in (0, 1)])
    print(f"Aalen–Johansen curves, both arms: {dt:.3f} s")
    _, dt = _timed(km, t, s == 1, f)
    from lifelines import KaplanMeierFitter

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        _, dt_ll = _timed(KaplanMeierFitter().fit, t, s == 1, weights=f * 1.5)
    print(f"weighted Kaplan–Meier: ours {dt:.3f} s, lifelines {dt_ll:.3f} s")
    hr, dt = _timed(cox_hazard_ratio, t, s, a, 1 / np.where(a == 1, e, 1 - e))
    print(f"weighted Cox hazard ratio (ours, Efron ties): {dt:.3f} s (HR {hr.hr:.3f})")
    models, dt = _timed(hazard_models, t, s, a, X, f, 30, 1095, True)
    iters = {k: m.n_iter_ for k, m in models.items()}
    print(f"pooled logistic hazards (outcome, competing; 37 periods): {dt:.2f} s, "
          f"iterations {iters}")
    _, dt = _timed(gformula_incidence, models, X, np.arange(0, 1096, 30))
    print(f"g-formula cumulative incidence, both arms: {dt:.2f} s")
    for cw in (False, True):
        protocol = _protocol(cw)
        (rows, curves), dt = _timed(time_to_event_estimates, _sample(cohort, X, a, e, protocol, f),
                                    "event")
        rng = np.random.default_rng(7)
        reps = []
        for _ in range(2):
            freq = rng.multinomial(N, np.full(N, 1 / N)).astype(float)
            _, dr = _timed(time_to_event_estimates, _sample(cohort, X, a, e, protocol, freq),
                           "event")
            reps.append(dr)
        per = float(np.mean(reps))
        print(f"time_to_event_estimates (censoring_weights={cw}): point {dt:.1f} s "
              f"({len(rows)} rows, {len(curves)} curve rows); replicate {per:.1f} s; "
              f"{REPLICATES} replicates ~ {per * REPLICATES / 60:.1f} min on one core")


if __name__ == "__main__":
    main()
