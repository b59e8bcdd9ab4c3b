"""Benchmark: influence-function SEs (``analysis.variance: influence``) against the bootstrap.

``main()`` writes a synthetic extract of ``PERSONS`` persons under ``bench/out/`` (reused when
present), builds its cohort and runs, for the primary time-to-event outcome (``ipw``) and the
measured outcome (``ipw``, ``doubly_robust``), estimates ATE, ATT and ATO:

* with ``analysis.variance: influence`` (the point estimate alone: no replicate runs), timed;
* with the bootstrap, ``REPLICATES`` replicates, timed;

and prints the ratio of the standard errors (influence / bootstrap) per measure: its median,
range and the share of rows within 0.9–1.1 (the Monte Carlo error of a bootstrap SE with R
replicates is about 1/sqrt(2R), 2.5% at R = 800), and the time of each. The smaller version
with the tolerances is ``tests/estimation/test_influence_bootstrap.py``.
"""

from __future__ import annotations

import dataclasses
import time
from pathlib import Path

import numpy as np

PERSONS = 20_000
REPLICATES = 800
SEED = 20261201
OUT = Path(__file__).resolve().parent / "out" / f"extract_influence_{PERSONS // 1000}k"


def _variant(protocol, outcome, methods, variance, replicates=0):
    an = protocol.analysis
    outcomes = dataclasses.replace(protocol.outcomes, primary=outcome, secondary=(),
                                   negative_controls=(), for_decision=())
    an = dataclasses.replace(an, methods=methods, hazard_ratio=False, variance=variance,
                             primary=dataclasses.replace(an.primary, method=methods[0]),
                             bootstrap=dataclasses.replace(an.bootstrap, replicates=replicates))
    return dataclasses.replace(protocol, outcomes=outcomes, analysis=an, decision=None,
                               subgroups=(), estimands=("ATE", "ATT", "ATO"))


def main() -> None:
    from emulant.cohort import build_cohort
    from emulant.estimation.effects import estimate_effects
    from emulant.extract import open_extract
    from emulant.protocol import load_protocol
    from synthetic_cohort.generate import write_synthetic

    if not (OUT / "protocol.yaml").is_file():
        write_synthetic(OUT, PERSONS, SEED, "parquet")
    protocol = load_protocol(OUT / "protocol.yaml")
    cohort = build_cohort(open_extract(OUT, protocol), protocol).cohort
    print(f"{len(cohort):,} eligible persons of {PERSONS:,}; {REPLICATES} bootstrap replicates")
    (marker,) = protocol.outcomes.measured()
    for outcome, methods in ((protocol.outcomes.primary, ("ipw",)),
                             (marker, ("ipw", "doubly_robust"))):
        t0 = time.perf_counter()
        a = estimate_effects(cohort, _variant(protocol, outcome, methods, "influence"),
                             workers=2, progress=False).estimates
        t_inf = time.perf_counter() - t0
        t0 = time.perf_counter()
        b = estimate_effects(cohort, _variant(protocol, outcome, methods, "bootstrap", REPLICATES),
                             workers=2, progress=False).estimates
        t_boot = time.perf_counter() - t0
        a, b = a[a.measure != "e_value"], b[b.measure != "e_value"]
        ratio = (a.se / b.se).where(a.se.notna() & b.se.notna())
        name = getattr(outcome, "measure", outcome)
        print(f"\n{name} ({', '.join(methods)}): influence {t_inf:.1f} s, bootstrap {t_boot:.1f} s")
        for measure, r in ratio.groupby(a.measure):
            r = r.dropna()
            print(f"  {measure:16s} rows {len(r):3d}  SE ratio median {np.median(r):.3f}  "
                  f"range {r.min():.3f}-{r.max():.3f}  within 0.9-1.1: {r.between(0.9, 1.1).mean():.0%}")


if __name__ == "__main__":
    main()
