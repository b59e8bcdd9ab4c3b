"""Benchmark: write the invented registry with 1,000,000 persons (target: under 2 minutes).

Prints persons per second, wall time, rows per table and the process's peak resident memory.
"""

from __future__ import annotations

import resource
import sys
import tempfile
import time
from pathlib import Path

import pyarrow.parquet as pq

from synthetic_cohort.generate import TABLES, write_synthetic

PERSONS = 1_000_000


def main(persons: int = PERSONS) -> dict:
    with tempfile.TemporaryDirectory(prefix="bench_synth_") as tmp:
        t0 = time.perf_counter()
        truth = write_synthetic(tmp, persons=persons, seed=20261201)
        wall = time.perf_counter() - t0
        rows = {t: pq.ParquetFile(Path(tmp) / f"{t}.parquet").metadata.num_rows for t in TABLES}
        size = sum(f.stat().st_size for f in Path(tmp).glob("*.parquet"))
    peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
    out = {"persons": persons, "seconds": round(wall, 1), "persons_per_second": round(persons / wall),
           "peak_memory_mib": round(peak_kib / 1024), "parquet_mib": round(size / 2**20, 1),
           "eligible": truth["eligible"]["n"], "rows": rows}
    print(f"synthetic registry: {persons:,} persons in {wall:.1f} s "
          f"({persons / wall:,.0f} persons/s), peak memory {peak_kib / 1024:,.0f} MiB, "
          f"{size / 2**20:,.1f} MiB of Parquet, {truth['eligible']['n']:,} eligible")
    print("  rows: " + ", ".join(f"{k} {v:,}" for k, v in rows.items()))
    print(f"  target: under 120 s -> {'met' if wall < 120 else 'NOT met'}")
    return out


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else PERSONS)
