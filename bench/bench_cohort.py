"""Benchmark: a 1,000,000-person synthetic extract through the extract check and the cohort.

``main()`` writes the extract once under ``bench/out/`` (reused when present), then runs each
stage in a fresh child process, so each peak resident set size (``ru_maxrss``, which covers
DuckDB's own threads and buffers) belongs to that stage alone:

* ``floor``: DuckDB scans every input table once (every column hashed), the least any stage
  reading the extract can cost;
* ``check``: ``emulant.extract.check_extract`` (when it exists);
* ``cohort``: ``open_extract`` + ``build_cohort``; its cohort is compared with the generator's
  truth (eligible persons per arm).

It prints wall time, input rows per second, peak memory and the ratio to the floor. Target
(issue 3): check and cohort under 60 s wall on 2 cores, peak under 4 GiB.
"""

from __future__ import annotations

import json
import resource
import subprocess
import sys
import time
from pathlib import Path

PERSONS = 1_000_000
SEED = 20261201
OUT = Path(__file__).resolve().parent / "out" / f"extract_{PERSONS // 1000}k"
SETTINGS = {"threads": 2, "memory_limit": "3GB", "temp_directory": str(OUT.parent / "duckdb_tmp")}
TARGET_S, TARGET_GIB = 60.0, 4.0


def ensure_extract(out: Path = OUT, persons: int = PERSONS) -> float:
    """Write the synthetic extract unless it is already there; returns the seconds spent."""
    if (out / "protocol.yaml").is_file() and (out / "persons.parquet").is_file():
        return 0.0
    from synthetic_cohort.generate import write_synthetic

    t0 = time.perf_counter()
    write_synthetic(out, persons, SEED, "parquet")
    return time.perf_counter() - t0


def _peak_gib() -> float:
    """This process's peak resident set size in GiB: ``VmHWM`` from /proc (Linux), which a new
    program starts afresh, unlike ``ru_maxrss``, which Linux carries over from the parent across
    ``execve``; ``ru_maxrss`` (KiB) where /proc is absent."""
    status = Path("/proc/self/status")
    if status.is_file():
        for line in status.read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 2**20
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20


def _child(stage: str, folder: Path) -> dict:
    """Run one stage in this (fresh) process and return its figures."""
    from emulant.extract import connect, find_tables, raw_relation
    from emulant.protocol import load_protocol

    protocol = load_protocol(folder / "protocol.yaml")
    t0 = time.perf_counter()
    if stage == "floor":
        con = connect(SETTINGS)
        rows = 0
        for f in find_tables(folder).values():
            rel = raw_relation(con, f)
            cols = [r[0] for r in con.execute(f"DESCRIBE SELECT * FROM {rel}").fetchall()]
            q = ", ".join('"' + c + '"' for c in cols)
            rows += con.execute(f"SELECT count(*), sum(hash({q})) FROM {rel}").fetchone()[0]
        extra = {"rows": rows}
    elif stage == "check":
        try:
            from emulant.extract import check_extract
        except ImportError:
            return {"skipped": "emulant.extract.check_extract does not exist yet"}
        check_extract(folder, protocol, SETTINGS)
        extra = {}
    else:
        from emulant.cohort import build_cohort
        from emulant.extract import open_extract

        res = build_cohort(open_extract(folder, protocol, SETTINGS), protocol)
        extra = {"cohort": int(len(res.cohort)), "columns": int(res.cohort.shape[1]),
                 "by_arm": {str(k): int(v) for k, v in res.cohort.arm.value_counts().items()}}
    return {"seconds": time.perf_counter() - t0, "peak_gib": _peak_gib(), **extra}


def run_stage(stage: str, folder: Path = OUT) -> dict:
    cmd = [sys.executable, "-m", "bench.bench_cohort", "--child", stage, str(folder)]
    root = Path(__file__).resolve().parent.parent
    done = subprocess.run(cmd, cwd=root, capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise RuntimeError(f"stage {stage} failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> dict:
    gen = ensure_extract()
    print(f"extract: {PERSONS:,} persons at {OUT}" + (f" (written in {gen:.1f} s)" if gen else
                                                       " (reused)"), flush=True)
    figures = {stage: run_stage(stage) for stage in ("floor", "check", "cohort")}
    rows = figures["floor"]["rows"]
    floor = figures["floor"]["seconds"]
    print(f"input rows (all tables): {rows:,}")
    for stage, f in figures.items():
        if "skipped" in f:
            print(f"{stage:>7}: skipped ({f['skipped']})")
            continue
        print(f"{stage:>7}: {f['seconds']:6.1f} s wall, {rows / f['seconds']:>12,.0f} rows/s, "
              f"peak {f['peak_gib']:.2f} GiB, {f['seconds'] / floor:5.1f} x floor")
    c = figures["cohort"]
    truth = json.loads((OUT / "truth.json").read_text())["eligible"]["by_arm"]
    same = c["by_arm"] == {k: int(v) for k, v in truth.items()}
    print(f"cohort: {c['cohort']:,} persons x {c['columns']} columns; per arm {c['by_arm']} "
          f"({'equals' if same else 'DIFFERS from'} the generator's truth {truth})")
    total = sum(f.get("seconds", 0.0) for s, f in figures.items() if s != "floor")
    peak = max(f.get("peak_gib", 0.0) for f in figures.values())
    ok = total < TARGET_S and peak < TARGET_GIB
    print(f"check + cohort: {total:.1f} s (target < {TARGET_S:.0f} s), peak {peak:.2f} GiB "
          f"(target < {TARGET_GIB:.0f} GiB): {'met' if ok else 'NOT met'}")
    return figures


if __name__ == "__main__":
    if len(sys.argv) == 4 and sys.argv[1] == "--child":
        print(json.dumps(_child(sys.argv[2], Path(sys.argv[3]))))
    else:
        main()
