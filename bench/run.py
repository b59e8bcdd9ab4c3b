"""`make bench`: every benchmark module in bench/, in flow order; each prints its own figures."""

from __future__ import annotations

import importlib
import sys
import time

MODULES = ("bench_synth", "bench_cohort", "bench_person_time", "bench_per_protocol", "bench_weights",
           "bench_effects", "bench_survival", "bench_scale", "bench_coverage", "bench_gformula",
           "bench_influence", "bench_sequential")


def main(argv: list[str] | None = None) -> int:
    only = set(argv if argv is not None else sys.argv[1:])
    failed = []
    for name in MODULES:
        if only and name not in only:
            continue
        print(f"\n=== {name} ===", flush=True)
        t0 = time.perf_counter()
        try:
            importlib.import_module(f"bench.{name}").main()
        except Exception as exc:  # noqa: BLE001 - one failing benchmark must not hide the others
            print(f"{name} failed: {type(exc).__name__}: {exc}", flush=True)
            failed.append(name)
        print(f"=== {name}: {time.perf_counter() - t0:.1f} s ===", flush=True)
    return 1 if failed else 0


if __name__ == "__main__":
    raise SystemExit(main())
