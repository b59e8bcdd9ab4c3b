"""Benchmark of the effect-estimation core on a 200,000-person simulated cohort (measured outcome).

Times the point estimate (propensity, weights for ATE and ATT, censoring model, outcome
regressions; unadjusted, IPW, standardization and doubly robust), one bootstrap replicate in
this process, then 20 replicates on the worker pool (2 processes), extrapolated to 200, and
prints the ratio of one replicate's time to the point estimate's. The cohort is simulated arrays
(invented), not the demo extract; time-to-event outcomes have their own benchmark.
"""

from __future__ import annotations

import time
from functools import partial

import numpy as np
import pandas as pd

from emulant import columns
from emulant.cohort.covariates import covariate_kinds
from emulant.estimation.bootstrap import replicate_freq, run_bootstrap
from emulant.estimation.effects import estimate_sample, replicate_estimates
from emulant.estimation.sample import build_sample
from emulant.models.propensity import build_design
from emulant.protocol import parse_protocol

N = 200_000
REPLICATES = 20
EXTRAPOLATE_TO = 200
WORKERS = 2


def simulated_cohort(n: int = N, seed: int = 1) -> pd.DataFrame:
    """Invented cohort: 4 continuous, 3 binary and 2 categorical covariates, outcome 12% missing."""
    rng = np.random.default_rng(seed)
    cont = rng.normal(size=(n, 4))
    binary = rng.binomial(1, [0.3, 0.5, 0.2], size=(n, 3))
    region = rng.integers(0, 5, n)
    band = rng.integers(0, 3, n)
    age = rng.uniform(40, 85, n).round()
    lin = 0.02 * (age - 60) + cont @ [0.3, -0.2, 0.1, 0.0] + binary @ [0.4, -0.3, 0.2] + 0.1 * region
    a = rng.binomial(1, 1 / (1 + np.exp(-(lin - 0.3))))
    y = 50 + 0.1 * age + cont @ [1.0, 0.5, -0.5, 0.2] + binary @ [1, 2, -1] - 3 * a + rng.normal(0, 5, n)
    seen = rng.random(n) < 1 / (1 + np.exp(-(2.0 + 0.3 * cont[:, 0] - 0.3 * a)))
    df = pd.DataFrame({"person_id": np.arange(n), "arm": np.where(a == 1, "a", "b"), "treated": a,
                       "age": age, "region": region.astype(str), "band": band.astype(str)})
    for j in range(4):
        df[f"c{j}"] = cont[:, j]
    for j in range(3):
        df[f"b{j}"] = binary[:, j]
    df[columns.value("marker")] = np.where(seen, y, np.nan)
    df[columns.measured("marker")] = seen.astype(int)
    return df


def protocol(replicates: int = REPLICATES):
    covs = [{"name": "age", "attribute": "age", "kind": "continuous"},
            {"name": "region", "attribute": "region", "kind": "categorical"},
            {"name": "band", "attribute": "band", "kind": "categorical"}]
    covs += [{"name": f"c{j}", "attribute": f"c{j}", "kind": "continuous"} for j in range(4)]
    covs += [{"name": f"b{j}", "attribute": f"b{j}", "kind": "binary"} for j in range(3)]
    return parse_protocol({
        "study": {"id": "bench-effects"},
        "concepts": {"ca": {"source": "dispensings", "codes": ["RXA9"]},
                     "cb": {"source": "dispensings", "codes": ["RXB9"]},
                     "marker": {"source": "measurements", "codes": ["LAB9"]}},
        "eligibility": {"entry": {"start": "2020-01-01", "end": "2020-12-31"}},
        "strategies": {"arms": {"a": {"initiate": "ca"}, "b": {"initiate": "cb"}}, "treated": "a"},
        "follow_up": {"max_days": 400},
        "outcomes": {"primary": {"measure": "marker", "at_day": 365, "missing": "censor"}},
        "covariates": covs, "estimands": ["ATE", "ATT"],
        "analysis": {"horizons_days": [365], "weights": {"truncate": [0.01, 0.99]},
                     "bootstrap": {"replicates": replicates, "seed": 5}},
    })


def main() -> None:
    cohort, p = simulated_cohort(), protocol()
    t0 = time.perf_counter()
    design = build_design(cohort, p.covariates, covariate_kinds(p, cohort), "spline")
    X = design.transform(cohort)
    t_design = time.perf_counter() - t0
    t0 = time.perf_counter()
    rows, curves = estimate_sample(build_sample(cohort, p, design, X))
    t_point = time.perf_counter() - t0
    t0 = time.perf_counter()
    estimate_sample(build_sample(cohort, p, design, X, replicate_freq(len(cohort), 5, 0)))
    t_one = time.perf_counter() - t0
    t0 = time.perf_counter()
    estimator = partial(replicate_estimates, cohort, p, design, X)
    run = run_bootstrap(estimator, len(cohort), p, rows, curves, workers=WORKERS, progress=False)
    t_boot = time.perf_counter() - t0
    print(f"cohort: {len(cohort):,} persons, {X.shape[1]} design columns, {len(rows)} estimate rows")
    print(f"design (learned once):             {t_design:8.2f} s")
    print(f"point estimate:                    {t_point:8.2f} s")
    print(f"one replicate (this process):      {t_one:8.2f} s")
    print(f"ratio replicate / point estimate:  {t_one / t_point:8.2f}")
    print(f"{REPLICATES} replicates, {WORKERS} workers:      {t_boot:8.2f} s "
          f"({run.completed} completed, {run.failed} failed)")
    print(f"extrapolated to {EXTRAPOLATE_TO} replicates:     "
          f"{t_boot * EXTRAPOLATE_TO / REPLICATES:8.1f} s")


if __name__ == "__main__":
    main()
