"""Benchmark: 1,000,000 persons to ``periods.parquet`` (CONTRACTS §5a, §5b, §5g).

Reuses the 1,000,000-person synthetic extract of :mod:`bench.bench_cohort` (written once under
``bench/out/``) with its demo protocol turned per-protocol: ``sustain: {gap_days: 60}`` on both
arms, ``contrasts: [intention_to_treat, per_protocol]`` and two time-varying covariates (the last
marker in the 180 days before each period, any cardiovascular event in the 90 days before). Each
stage runs in a fresh child process so its peak resident set size is its own:

* ``cohort``: ``build_cohort`` + ``add_deviations`` (supply, stop, switch and deviation days);
* ``periods``: ``build_periods`` from ``cohort.parquet`` (DuckDB reads it and writes the periods
  straight to parquet).

Prints wall time, rows per second, peak memory and the deviations per arm. DuckDB runs with the
workflow's default settings (2 threads, 4 GB memory limit, spilling to ``bench/out/``). The
per-protocol point estimate and its bootstrap replicate are timed by the estimation benchmark.
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

import yaml

from bench.bench_cohort import OUT, PERSONS, _peak_gib, ensure_extract

SETTINGS = {"threads": 2, "memory_limit": "4GB", "temp_directory": str(OUT.parent / "duckdb_tmp")}
WORK = OUT.parent / "person_time"
TARGET_S, TARGET_GIB = 180.0, 8.0  # issue 13: the point estimate within 3 minutes, peak <= 8 GiB


def per_protocol_protocol(folder: Path = OUT) -> Path:
    """The extract's demo protocol with sustain, both contrasts and time-varying covariates."""
    d = yaml.safe_load((folder / "protocol.yaml").read_text(encoding="utf-8"))
    for arm in d["strategies"]["arms"].values():
        arm["sustain"] = {"gap_days": 60}
    d["contrasts"] = ["intention_to_treat", "per_protocol"]
    d["time_varying"] = [
        {"name": "marker_now", "concept": "marker", "window": [-180, 0], "summary": "last"},
        {"name": "cv_recent", "concept": "cardio_event", "window": [-90, 0], "summary": "any"},
    ]
    out = folder / "protocol_per_protocol.yaml"
    out.write_text(yaml.safe_dump(d, sort_keys=False), encoding="utf-8")
    return out


def _child(stage: str, folder: Path) -> dict:
    from emulant.cohort import build_cohort
    from emulant.cohort.person_time import add_deviations, build_periods, deviation_counts
    from emulant.extract import open_extract
    from emulant.protocol import load_protocol

    protocol = load_protocol(folder / "protocol_per_protocol.yaml")
    WORK.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    if stage == "cohort":
        ex = open_extract(folder, protocol, SETTINGS)
        cohort = build_cohort(ex, protocol).cohort
        t1 = time.perf_counter()
        cohort = add_deviations(ex, protocol, cohort)
        extra = {"persons": int(len(cohort)), "deviations_seconds": time.perf_counter() - t1,
                 "counts": deviation_counts(cohort, protocol).to_dict(orient="records")}
        cohort.to_parquet(WORK / "cohort.parquet", index=False)
    else:
        rows = build_periods(open_extract(folder, protocol, SETTINGS), protocol,
                             WORK / "cohort.parquet", WORK / "periods.parquet")
        extra = {"rows": rows, "bytes": (WORK / "periods.parquet").stat().st_size}
    return {"seconds": time.perf_counter() - t0, "peak_gib": _peak_gib(), **extra}


def run_stage(stage: str, folder: Path = OUT) -> dict:
    cmd = [sys.executable, "-m", "bench.bench_person_time", "--child", stage, str(folder)]
    root = Path(__file__).resolve().parent.parent
    done = subprocess.run(cmd, cwd=root, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise RuntimeError(f"stage {stage} failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> dict:
    gen = ensure_extract()
    print(f"extract: {PERSONS:,} persons at {OUT}" + (f" (written in {gen:.1f} s)" if gen else
                                                       " (reused)"), flush=True)
    per_protocol_protocol()
    c = run_stage("cohort")
    print(f" cohort: {c['persons']:,} persons, {c['seconds']:.1f} s wall (of which deviations "
          f"{c['deviations_seconds']:.1f} s, {c['persons'] / c['deviations_seconds']:,.0f} "
          f"persons/s), peak {c['peak_gib']:.2f} GiB", flush=True)
    for r in c["counts"]:
        print(f"         {r['arm']}: {r['persons']:,} persons, {r['stopped']:,} stopped, "
              f"{r['switched']:,} switched, {r['on_protocol_throughout']:,} on protocol throughout")
    p = run_stage("periods")
    print(f"periods: {p['rows']:,} person-periods ({p['bytes'] / 2**20:.0f} MiB parquet), "
          f"{p['seconds']:.1f} s wall, {p['rows'] / p['seconds']:,.0f} rows/s, "
          f"peak {p['peak_gib']:.2f} GiB")
    total, peak = c["seconds"] + p["seconds"], max(c["peak_gib"], p["peak_gib"])
    ok = total < TARGET_S and peak < TARGET_GIB
    print(f"extract to periods.parquet: {total:.1f} s, peak {peak:.2f} GiB (budget of the whole "
          f"point estimate: < {TARGET_S:.0f} s, < {TARGET_GIB:.0f} GiB): "
          f"{'within' if ok else 'NOT within'}")
    return {"cohort": c, "periods": p}


if __name__ == "__main__":
    if len(sys.argv) == 4 and sys.argv[1] == "--child":
        print(json.dumps(_child(sys.argv[2], Path(sys.argv[3]))))
    else:
        main()
