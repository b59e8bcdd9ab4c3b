"""Benchmark: the per-protocol point estimate and one bootstrap replicate at scale (CONTRACTS §5e).

The synthetic extract (``PP_PERSONS`` persons, default 1,000,000; written once under
``bench/out/``) with its demo protocol, which asks for both contrasts (``sustain`` on both arms,
the time-varying tone marker). Each stage runs in a fresh child process so its peak resident set
size is its own:

* ``cohort``: ``build_cohort`` + ``add_deviations``;
* ``periods``: ``build_periods`` (DuckDB, straight to ``person_periods.parquet``);
* ``estimate``: the per-protocol part of the estimation stage for the primary outcome, once
  with unit frequencies (the point estimate) and once with one replicate's multinomial
  frequencies: the propensity and baseline weights, the weights over time
  (``sample_adherence``: six pooled logistic models of staying on protocol), then
  ``per_protocol_estimates`` (unadjusted, ``ipw`` and ``standardization`` for ATE and ATT),
  the replicate starting its hazard fits from the point estimate's coefficients as the
  workflow's replicates do; both with one BLAS thread, as the bootstrap's workers run.

Prints wall time, person-periods per second, peak memory and the replicate / point ratio
against the issue's targets (point <= 3 min, peak <= 8 GiB, replicate <= 1.5 x point). Set
``PP_PERSONS`` to run at another size (e.g. 200000).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path

from bench.bench_cohort import SEED, _peak_gib, ensure_extract

PERSONS = int(os.environ.get("PP_PERSONS", 1_000_000))
OUT = Path(__file__).resolve().parent / "out" / f"extract_{PERSONS // 1000}k"
WORK = OUT.parent / f"per_protocol_{PERSONS // 1000}k"
SETTINGS = {"threads": 2, "memory_limit": "4GB", "temp_directory": str(OUT.parent / "duckdb_tmp")}
TARGET_S, TARGET_GIB, TARGET_RATIO = 180.0, 8.0, 1.5  # issue 13


def _protocol(folder: Path):
    import dataclasses

    from emulant.protocol import load_protocol

    p = load_protocol(folder / "protocol.yaml")
    if not p.per_protocol:
        raise RuntimeError(f"{folder / 'protocol.yaml'} does not ask for per_protocol")
    return dataclasses.replace(p, subgroups=(), decision=None, outcomes=dataclasses.replace(
        p.outcomes, secondary=(), negative_controls=()))


def _child(stage: str, folder: Path) -> dict:
    import numpy as np
    import pandas as pd

    from emulant.cohort import build_cohort
    from emulant.cohort.person_time import add_deviations, build_periods
    from emulant.extract import open_extract

    protocol = _protocol(folder)
    WORK.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    if stage == "cohort":
        ex = open_extract(folder, protocol, SETTINGS)
        cohort = add_deviations(ex, protocol, build_cohort(ex, protocol).cohort)
        cohort.to_parquet(WORK / "cohort.parquet", index=False)
        return {"seconds": time.perf_counter() - t0, "peak_gib": _peak_gib(),
                "persons": int(len(cohort))}
    if stage == "periods":
        rows = build_periods(open_extract(folder, protocol, SETTINGS), protocol,
                             WORK / "cohort.parquet", WORK / "person_periods.parquet")
        return {"seconds": time.perf_counter() - t0, "peak_gib": _peak_gib(), "rows": rows}
    from threadpoolctl import threadpool_limits

    from emulant.estimation.bootstrap import replicate_freq
    from emulant.estimation.effects import _prepare, person_time_of
    from emulant.estimation.per_protocol import per_protocol_estimates, sample_adherence
    from emulant.estimation.sample import build_sample

    cohort = pd.read_parquet(WORK / "cohort.parquet")
    periods = pd.read_parquet(WORK / "person_periods.parquet")
    design, X, _, _ = _prepare(cohort, protocol)
    pt = person_time_of(cohort, protocol, periods)
    load = time.perf_counter() - t0
    outcome = protocol.outcomes.primary
    out = {"load_seconds": load, "rows": int(pt.person.size), "persons": int(len(cohort))}
    starts = None
    for name, freq in (("point", None), ("replicate", replicate_freq(len(cohort), SEED, 0))):
        t1 = time.perf_counter()
        with threadpool_limits(limits=1):  # one BLAS thread, as in the bootstrap's workers
            sample = build_sample(cohort, protocol, design, X, freq, starts)
            adherence = sample_adherence(sample, pt)
            rows, _, problems = per_protocol_estimates(sample, pt, adherence, outcome)
        out[name] = time.perf_counter() - t1
        out[f"{name}_problems"] = problems
        rd = [r for r in rows if r["measure"] == "risk_difference" and r["horizon_day"] == 1095]
        out[f"{name}_rd_1095"] = {f"{r['method']}/{r['estimand']}": r["estimate"] for r in rd}
        starts = {k: {m: np.asarray(c) for m, c in v.items()} for k, v in sample.fitted.items()}
    out["peak_gib"] = _peak_gib()
    return out


def run_stage(stage: str, folder: Path = OUT) -> dict:
    cmd = [sys.executable, "-m", "bench.bench_per_protocol", "--child", stage, str(folder)]
    root = Path(__file__).resolve().parent.parent
    done = subprocess.run(cmd, cwd=root, capture_output=True, text=True, check=False,
                          env={**os.environ, "PP_PERSONS": str(PERSONS)})
    if done.returncode != 0:
        raise RuntimeError(f"stage {stage} failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> dict:
    gen = ensure_extract(OUT, PERSONS)
    print(f"extract: {PERSONS:,} persons at {OUT}" + (f" (written in {gen:.1f} s)" if gen else
                                                       " (reused)"), flush=True)
    if (WORK / "person_periods.parquet").is_file():
        print("cohort and person-periods: reused", flush=True)
    else:
        c = run_stage("cohort")
        print(f" cohort + deviations: {c['persons']:,} persons, {c['seconds']:.1f} s, "
              f"peak {c['peak_gib']:.2f} GiB", flush=True)
        p = run_stage("periods")
        print(f" person_periods.parquet: {p['rows']:,} rows, {p['seconds']:.1f} s, "
              f"{p['rows'] / p['seconds']:,.0f} rows/s, peak {p['peak_gib']:.2f} GiB", flush=True)
    e = run_stage("estimate")
    ratio = e["replicate"] / e["point"]
    print(f"per-protocol estimate ({e['persons']:,} persons, {e['rows']:,} person-periods; "
          f"read and aligned in {e['load_seconds']:.1f} s):")
    print(f"  point estimate {e['point']:.1f} s ({e['rows'] / e['point']:,.0f} person-periods/s), "
          f"one replicate {e['replicate']:.1f} s, replicate / point {ratio:.2f}, "
          f"peak {e['peak_gib']:.2f} GiB")
    print("  risk differences at 1095 days (point): "
          + ", ".join(f"{k} {v:+.4f}" for k, v in e["point_rd_1095"].items()))
    ok = e["point"] <= TARGET_S and e["peak_gib"] <= TARGET_GIB and ratio <= TARGET_RATIO
    print(f"  targets (point <= {TARGET_S:.0f} s, peak <= {TARGET_GIB:.0f} GiB, replicate <= "
          f"{TARGET_RATIO} x point): {'met' if ok else 'NOT met'}")
    return e


if __name__ == "__main__":
    if len(sys.argv) == 4 and sys.argv[1] == "--child":
        print(json.dumps(_child(sys.argv[2], Path(sys.argv[3]))))
    else:
        main()
