"""Benchmark: the demo protocol at 250,000, 500,000 and 1,000,000 persons, with a profile of
where one bootstrap replicate spends its time.

For each size, in a fresh child process (so each peak memory belongs to that size alone): the
synthetic extract is written once under ``bench/out/`` (reused), then ``check_extract``,
``build_cohort``, ``fit_weights``, the point estimate and one bootstrap replicate (replicate 0,
one BLAS thread, its hazard models started from the point estimate's coefficients, as a worker
runs it) are timed. The point estimate and the replicate are
broken down by outcome into the propensity refit and weights (``build_sample``), each pooled
logistic model (seconds and Newton iterations), the g-formula curves, the censoring
probabilities, the Aalen–Johansen curves and the Cox model (functions wrapped with timers for
the benchmark only). For the largest size it also times one Newton pass of the outcome model
(log-likelihood, gradient, information) against one read of a float64 array the size of the
implicit person-period table (persons x periods): the memory-bandwidth floor of an iteration.

Printed targets (issue 12), as ratios and absolute times on this machine:
* one replicate <= 0.7 x the point estimate;
* the demo protocol at 1,000,000 persons with 200 replicates end to end <= 10 minutes on 2
  cores, projected as check + cohort + weights + point + 200 replicates / 2 workers (measured
  parts; the workflow adds a few seconds per job), peak memory <= 6 GiB (the largest child);
* cost linear in persons: seconds per 100,000 persons at each size.

``BENCH_SCALE_SIZES=250000,1000000`` picks other sizes.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from collections import defaultdict
from pathlib import Path

from bench.bench_cohort import SETTINGS, _peak_gib, ensure_extract

SIZES = tuple(int(s) for s in os.environ.get("BENCH_SCALE_SIZES", "250000,500000,1000000").split(","))
OUT = Path(__file__).resolve().parent / "out"
REPLICATES, WORKERS = 200, 2
TARGET_RATIO, TARGET_MIN, TARGET_GIB = 0.7, 10.0, 6.0


class Timers:
    """Wrap module functions with timers, by outcome (``self.outcome``) and part."""

    def __init__(self):
        self.t: dict[tuple[str, str], float] = defaultdict(float)
        self.iters: dict[tuple[str, str], int] = defaultdict(int)
        self.outcome = "-"

    def wrap(self, module, name: str, part: str | None = None):
        real = getattr(module, name)

        def timed(*args, **kwargs):
            t0 = time.perf_counter()
            try:
                return real(*args, **kwargs)
            finally:
                self.t[(self.outcome, part or name)] += time.perf_counter() - t0

        setattr(module, name, timed)

    def wrap_fit(self, pl):
        real = pl.PooledLogistic.fit
        timers = self

        def fit(self, basis, X, a, days, event, *args, **kwargs):
            kind = getattr(timers, "kind", "model")
            t0 = time.perf_counter()
            out = real(self, basis, X, a, days, event, *args, **kwargs)
            timers.t[(timers.outcome, f"pooled logistic: {kind}")] += time.perf_counter() - t0
            timers.iters[(timers.outcome, f"pooled logistic: {kind}")] += out.n_iter_
            return out

        pl.PooledLogistic.fit = fit
        real_days = pl.days_at_risk

        def days_at_risk(time_, status, model, lost=None):
            timers.kind = model
            return real_days(time_, status, model, lost)

        pl.days_at_risk = days_at_risk


def _instrument() -> Timers:
    from emulant.estimation import effects, pooled_logistic, tte

    T = Timers()
    T.wrap(effects, "build_sample", "propensity refit and weights (build_sample)")
    T.wrap_fit(pooled_logistic)
    T.wrap(tte, "gformula_incidence", "g-formula curves")
    T.wrap(tte, "censoring_at", "censoring probabilities")
    T.wrap(tte, "aalen_johansen", "Aalen-Johansen curves")
    T.wrap(tte, "cox_hazard_ratio", "Cox hazard ratio")
    real_tte = effects.time_to_event_estimates
    real_measured = effects.measured_outcome_rows

    def per_outcome(real, name_of):
        def run(sample, outcome):
            T.outcome = name_of(outcome)
            t0 = time.perf_counter()
            try:
                return real(sample, outcome)
            finally:
                T.t[(T.outcome, "all of this outcome")] += time.perf_counter() - t0
                T.outcome = "-"
        return run

    effects.time_to_event_estimates = per_outcome(real_tte, str)
    effects.measured_outcome_rows = per_outcome(real_measured, lambda o: o.name)
    return T


def _child(persons: int) -> dict:
    import numpy as np
    import pandas as pd
    from threadpoolctl import threadpool_limits

    from emulant.cohort import build_cohort
    from emulant.estimation.bootstrap import replicate_freq
    from emulant.extract import check_extract, open_extract
    from emulant.models.weights import fit_weights
    from emulant.protocol import load_protocol

    folder = OUT / f"extract_{persons // 1000}k"
    ensure_extract(folder, persons)
    protocol = load_protocol(folder / "protocol.yaml")
    sec: dict[str, float] = {}
    t0 = time.perf_counter()
    check_extract(folder, protocol, SETTINGS)
    sec["check_extract"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    cohort = build_cohort(open_extract(folder, protocol, SETTINGS), protocol).cohort
    sec["build_cohort"] = time.perf_counter() - t0
    cohort = pd.DataFrame(cohort)
    t0 = time.perf_counter()
    fit_weights(cohort, protocol)
    sec["fit_weights"] = time.perf_counter() - t0

    from emulant.estimation import effects

    T = _instrument()
    design, X = effects._prepare(cohort, protocol)
    t0 = time.perf_counter()
    point = effects.point_estimate(cohort, protocol)
    sec["point estimate"] = time.perf_counter() - t0
    parts_point = dict(T.t)
    iters_point = dict(T.iters)
    T.t.clear()
    T.iters.clear()
    freq = replicate_freq(len(cohort), protocol.analysis.bootstrap.seed, 0)
    starts = {o: {k: np.asarray(c, dtype=float) for k, c in m.items()}
              for o, m in point.starts.items()}  # as bootstrap_replicates passes them
    with threadpool_limits(limits=1):
        t0 = time.perf_counter()
        effects.replicate_estimates(cohort, protocol, design, X, freq, starts=starts)
        sec["one replicate"] = time.perf_counter() - t0
    out = {"persons": persons, "cohort": len(cohort), "seconds": sec,
           "point": {f"{o} | {p}": v for (o, p), v in parts_point.items()},
           "replicate": {f"{o} | {p}": v for (o, p), v in T.t.items()},
           "iters_point": {f"{o} | {p}": v for (o, p), v in iters_point.items()},
           "iters_replicate": {f"{o} | {p}": v for (o, p), v in T.iters.items()},
           "rows": len(point.rows)}
    if persons == max(SIZES):
        out["newton"] = _newton_pass(cohort, protocol, design, X)
    out["peak_gib"] = _peak_gib()
    return out


def _newton_pass(cohort, protocol, design, X) -> dict:
    """One pass of the primary outcome's model against one read of a persons x periods array."""
    import numpy as np
    from threadpoolctl import threadpool_limits

    from emulant.estimation import pooled_logistic as pl
    from emulant.estimation.tte import outcome_arrays

    o = protocol.outcomes.primary
    name = o if isinstance(o, str) else getattr(o, "name", str(o))
    t, s = outcome_arrays(cohort, name)
    P, max_days = protocol.analysis.period_days, protocol.follow_up.max_days
    K = max(1, -(-int(max_days) // P))
    B = pl.time_basis(K)
    a = cohort["treated"].to_numpy(dtype=float)
    days, event = pl.days_at_risk(np.minimum(t, max_days), s, "outcome")
    days = np.minimum(days, K * P)
    sd = X.std(axis=0)
    Z = (X - X.mean(axis=0)) / np.where(sd > 0, sd, 1.0)
    ev = np.asarray(event, bool)
    last = (np.ceil(np.maximum(days, 1) / P) - 1).astype(int)
    data = pl._Data(B, Z, a, np.ones(a.size), days, P, np.flatnonzero(ev), last[ev],
                    np.ones(int(ev.sum())))
    params = np.zeros(2 * B.shape[1] + Z.shape[1])
    with threadpool_limits(limits=1, user_api="blas"):  # as the fit runs it
        best = min(_timed(lambda: data.pass_(params)) for _ in range(3))
    M = np.random.default_rng(0).random((a.size, K))
    floor = min(_timed(lambda: M.sum()) for _ in range(3))
    return {"persons": int(a.size), "periods": int(K), "columns": int(Z.shape[1]),
            "pass_s": best, "floor_s": floor}


def _timed(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def run_size(persons: int) -> dict:
    cmd = [sys.executable, "-m", "bench.bench_scale", "--child", str(persons)]
    root = Path(__file__).resolve().parent.parent
    done = subprocess.run(cmd, cwd=root, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise RuntimeError(f"size {persons} failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def _load() -> str:
    try:
        return "load average {:.1f} {:.1f} {:.1f}".format(*os.getloadavg())
    except OSError:
        return "load average unknown"


def main() -> dict:
    print(f"machine: {os.cpu_count()} cores, {_load()} at the start", flush=True)
    figs = {n: run_size(n) for n in SIZES}
    for n, f in figs.items():
        s = f["seconds"]
        print(f"\n{n:,} persons ({f['cohort']:,} in the cohort), peak {f['peak_gib']:.2f} GiB:")
        for k, v in s.items():
            print(f"  {k:<16} {v:8.2f} s   {v / n * 1e5:6.3f} s per 100,000 persons")
    big = figs[max(SIZES)]
    s = big["seconds"]
    print(f"\nwhere the time goes at {max(SIZES):,} persons (point estimate / one replicate, "
          "seconds; Newton iterations):")
    keys = sorted(set(big["point"]) | set(big["replicate"]))
    for k in keys:
        it_p, it_r = big["iters_point"].get(k), big["iters_replicate"].get(k)
        its = f"  ({it_p} / {it_r} iterations)" if it_p is not None else ""
        print(f"  {k:<62} {big['point'].get(k, 0):7.2f} / {big['replicate'].get(k, 0):7.2f}{its}")
    nw = big.get("newton")
    if nw:
        print(f"one Newton pass of the outcome model ({nw['persons']:,} persons x {nw['periods']} "
              f"periods, {nw['columns']} columns): {nw['pass_s']:.3f} s; one read of a "
              f"{nw['persons']:,} x {nw['periods']} float64 array (the floor): {nw['floor_s']:.3f} s; "
              f"ratio {nw['pass_s'] / nw['floor_s']:.1f}")
    ratio = s["one replicate"] / s["point estimate"]
    before = s["check_extract"] + s["build_cohort"] + s["fit_weights"] + s["point estimate"]
    total = before + REPLICATES * s["one replicate"] / WORKERS
    peak = max(f["peak_gib"] for f in figs.values())
    print(f"\ntarget: one replicate / point estimate = {s['one replicate']:.2f} s / "
          f"{s['point estimate']:.2f} s = {ratio:.2f} (target <= {TARGET_RATIO}): "
          f"{'met' if ratio <= TARGET_RATIO else 'NOT met'}")
    print(f"target: {max(SIZES):,} persons, {REPLICATES} replicates on {WORKERS} workers, projected "
          f"end to end {total / 60:.1f} min = {total / 60 / TARGET_MIN:.2f} x the {TARGET_MIN:.0f}-min "
          f"target ({before:.0f} s before the bootstrap + {REPLICATES} x {s['one replicate']:.1f} s / "
          f"{WORKERS}): {'met' if total <= TARGET_MIN * 60 else 'NOT met'}")
    print(f"target: peak memory {peak:.2f} GiB = {peak / TARGET_GIB:.2f} x the {TARGET_GIB:.0f} GiB "
          f"target (one process; a chunk job's 2 forked workers share the cohort's pages)")
    lo, hi = figs[min(SIZES)], big
    for k in ("build_cohort", "point estimate", "one replicate"):
        per_lo = lo["seconds"][k] / lo["persons"]
        per_hi = hi["seconds"][k] / hi["persons"]
        print(f"linearity: {k} per person at {hi['persons']:,} / at {lo['persons']:,} = "
              f"{per_hi / per_lo:.2f} (1.00 is linear)")
    print(f"measured under {_load()} at the end")
    return figs


if __name__ == "__main__":
    if len(sys.argv) == 3 and sys.argv[1] == "--child":
        print(json.dumps(_child(int(sys.argv[2]))))
    else:
        main()
