"""Benchmark of the parametric g-formula (emulant.estimation.gformula) on simulated person-periods.

A cohort of ``N`` invented persons followed for 12 periods of 30 days, with a continuous marker
measured at each period's start that treatment lowers, that raises the outcome hazard and that
drives stopping (the shape of tests/estimation/test_per_protocol.py). Times, for the point
estimate and for one bootstrap replicate (multinomial frequency weights): fitting every model
on all person-periods, then the Monte Carlo of ``SIMULATED`` persons under both arms and the
natural course. Prints wall time and this process's peak resident memory.

The models are fitted on dense design matrices of all person-periods: memory grows with
persons x periods x design columns (about 1 GiB per 100,000 persons here), so the issue's
1,000,000 persons need a fitter that accumulates the Newton steps block by block (not built).
"""

from __future__ import annotations

import resource
import sys
import time

import numpy as np
import pandas as pd

from emulant import columns
from emulant.estimation.gformula import draw_persons, first_values, fit_models, simulate
from emulant.estimation.per_protocol import per_protocol_arrays
from emulant.estimation.tte import outcome_arrays
from emulant.models.treatment_process import person_periods

N = int(sys.argv[1]) if len(sys.argv) > 1 and __name__ == "__main__" else 200_000
SIMULATED = 10_000
P, K = 30, 12


def _peak_gib() -> float:
    try:
        for line in open("/proc/self/status", encoding="ascii"):
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 2**20
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20


def simulated(n: int, seed: int = 1):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    a = (rng.random(n) < 1 / (1 + np.exp(-0.5 * x))).astype(int)
    L = 0.4 * x + rng.normal(0, 0.8, n)
    end, dev = np.full(n, float(K * P)), np.full(n, np.nan)
    alive, on = np.ones(n, bool), np.ones(n, bool)
    marker = np.zeros((n, K))
    for k in range(K):
        if k:
            L = 0.8 * L + np.where(on, np.where(a == 1, -0.5, -0.1), 0.3) + rng.normal(0, 0.5, n)
        marker[:, k] = L
        ev = alive & (rng.random(n) < 1 / (1 + np.exp(-(-3.6 + 0.8 * L + 0.3 * x))))
        dv = alive & on & ~ev & (rng.random(n) < 1 / (1 + np.exp(-(-2.2 + 1.2 * L))))
        dev[dv] = k * P + rng.integers(1, P, int(dv.sum()))
        end[ev] = k * P + rng.integers(0, P, int(ev.sum()))
        alive &= ~ev
        on &= ~dv
    cohort = pd.DataFrame({"person_id": np.arange(n), "x": x, "a": a, "deviation_day": dev,
                           columns.end_day("event"): end,
                           columns.end_reason("event"): np.where(end < K * P, "outcome", "max_follow_up")})
    stop = np.fmin(end, np.nan_to_num(dev, nan=np.inf))
    last = (np.minimum(stop, K * P - 1) // P).astype(int)
    person = np.repeat(np.arange(n), last + 1)
    k = np.arange(person.size) - np.repeat(np.cumsum(last + 1) - (last + 1), last + 1)
    periods = pd.DataFrame({"person_id": person, "period": k, "start_day": k * P,
                            "marker": marker[person, k]})
    return cohort, periods


def run(pp, cohort, f, seed):
    a, X = cohort.a.to_numpy(float), cohort[["x"]].to_numpy(float)
    time_, status = outcome_arrays(cohort, "event")
    pt, ps = per_protocol_arrays(cohort, "event")
    t0 = time.perf_counter()
    models = fit_models(pp, a, X, f, time_, status, pt, ps, K, False)
    t1 = time.perf_counter()
    rng = np.random.default_rng(seed)
    idx = draw_persons(f, SIMULATED, rng)
    L0 = first_values(pp)[idx]
    risks = [simulate(models, X[idx], L0, np.full(SIMULATED, g), rng, [K * P], P).mean()
             for g in (0, 1)]
    simulate(models, X[idx], L0, a[idx], rng, [K * P], P, natural=True)
    return t1 - t0, time.perf_counter() - t1, risks


def main() -> None:
    cohort, periods = simulated(N)
    pp = person_periods(cohort, periods, P, time_varying=["marker"], kinds={"marker": "continuous"})
    print(f"g-formula: {N:,} persons, {len(periods):,} person-periods, {SIMULATED:,} simulated")
    fit, mc, risks = run(pp, cohort, np.ones(N), 1)
    print(f"  point estimate: models {fit:.1f} s, Monte Carlo {mc:.1f} s "
          f"(risks {risks[1]:.3f} treated, {risks[0]:.3f} comparator); peak {_peak_gib():.2f} GiB")
    f = np.random.default_rng(2).multinomial(N, np.full(N, 1 / N)).astype(float)
    fit, mc, _ = run(pp, cohort, f, 2)
    print(f"  one replicate:  models {fit:.1f} s, Monte Carlo {mc:.1f} s; peak {_peak_gib():.2f} GiB")


if __name__ == "__main__":
    main()
