"""Benchmark: propensity design, fit, weights and balance for a 200,000-person cohort.

Uses the synthetic generator and the cohort builder when both are present; otherwise an
invented cohort table built directly in numpy (same columns as cohort.parquet). Prints our
fit beside statsmodels' own Logit on the same design matrix, and the cost of bootstrap refits.
"""

from __future__ import annotations

import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

N = 200_000
SEED = 20261201
REFITS = 10  # bootstrap-style refits timed (multinomial frequency weights)


def _protocol_dict() -> dict:
    return {
        "study": {"id": "bench-weights"},
        "concepts": {"drug_a": {"source": "dispensings", "codes": ["RXA1"]},
                     "drug_b": {"source": "dispensings", "codes": ["RXB1"]},
                     "event": {"source": "diagnoses", "codes": ["EV1"]},
                     "mi": {"source": "diagnoses", "codes": ["MI1"]},
                     "lab": {"source": "measurements", "codes": ["LAB7"]}},
        "eligibility": {"entry": {"start": "2016-01-01", "end": "2021-12-31"}},
        "strategies": {"arms": {"drug_a": {"initiate": "drug_a"},
                                "drug_b": {"initiate": "drug_b"}}, "treated": "drug_a"},
        "outcomes": {"primary": "event"},
        "covariates": [
            {"name": "age", "builtin": "age"},
            {"name": "sex", "builtin": "sex"},
            {"name": "entry_year", "builtin": "calendar_year", "kind": "categorical"},
            {"name": "region", "attribute": "region", "kind": "categorical"},
            {"name": "prior_mi", "concept": "mi", "window": [-1825, -1], "summary": "any"},
            {"name": "lab", "concept": "lab", "window": [-365, 0], "summary": "last"},
            {"name": "n_drugs", "source": "dispensings", "window": [-365, -1],
             "summary": "distinct_codes"},
        ],
        "estimands": ["ATE", "ATT", "ATO"],
        "analysis": {"weights": {"truncate": [0.01, 0.99]}},
    }


def invented_cohort(n: int = N, seed: int = SEED) -> pd.DataFrame:
    """An invented cohort table (cohort.parquet columns used by the weights stage)."""
    rng = np.random.default_rng(seed)
    age = np.clip(rng.normal(64, 10, n).round(), 40, 85)
    sex = rng.choice(["F", "M"], n, p=[0.45, 0.55])
    year = rng.integers(2016, 2022, n)
    region = rng.choice(["north", "south", "east", "west", "centre"], n,
                        p=[0.3, 0.25, 0.2, 0.15, 0.1])
    prior_mi = (rng.random(n) < 0.12).astype(int)
    lab = rng.normal(7.4, 1.1, n)
    lab_missing = (rng.random(n) < 0.15).astype(int)
    lab = np.where(lab_missing == 1, np.median(lab[lab_missing == 0]), lab)
    n_drugs = rng.poisson(2.5, n)
    lin = (-0.4 + 0.03 * (age - 64) - 0.0008 * (age - 64) ** 2 + 0.2 * (sex == "M")
           + 0.08 * (year - 2018) + 0.3 * (region == "east") + 0.5 * prior_mi
           + 0.25 * (lab - 7.4) - 0.3 * lab_missing + 0.1 * np.sqrt(n_drugs))
    treated = (rng.random(n) < 1 / (1 + np.exp(-lin))).astype(int)
    return pd.DataFrame({"person_id": np.arange(n), "treated": treated,
                         "arm": np.where(treated == 1, "drug_a", "drug_b"), "age": age,
                         "sex": sex, "entry_year": year, "region": region, "prior_mi": prior_mi,
                         "lab": lab, "lab_missing": lab_missing, "n_drugs": n_drugs})


def _generated_cohort(n: int) -> tuple[pd.DataFrame, object] | None:
    """Synthetic generator + cohort builder, when both exist."""
    try:
        from emulant.cohort import build_cohort
        from emulant.extract import open_extract
        from emulant.protocol import load_protocol
        from synthetic_cohort.generate import write_synthetic
    except ImportError:
        return None
    tmp = Path(tempfile.mkdtemp(prefix="bench_weights_"))
    # about 70% of the generated persons are eligible: generate enough for n in the cohort
    write_synthetic(tmp, persons=int(n * 1.45), seed=SEED, fmt="parquet")
    persons = sorted(tmp.rglob("persons.*"))
    protocols = sorted(tmp.rglob("*.yaml"))
    if not persons or not protocols:
        return None
    protocol = load_protocol(protocols[0])
    return build_cohort(open_extract(persons[0].parent, protocol), protocol).cohort, protocol


def _timed(label: str, fn, *args, **kw):
    """Run ``fn``, print its wall-clock and CPU seconds (CPU: all threads of this process)."""
    t0, c0 = time.perf_counter(), time.process_time()
    out = fn(*args, **kw)
    print(f"  {label:<48s} {time.perf_counter() - t0:7.3f} s wall "
          f"{time.process_time() - c0:7.3f} s cpu", flush=True)
    return out


def main() -> None:
    import statsmodels.api as sm

    from emulant.models.balance import balance_table
    from emulant.models.positivity import positivity_of
    from emulant.models.propensity import PropensityModel
    from emulant.models.weights import design_for, estimand_weights, fit_weights, treated_indicator
    from emulant.protocol import parse_protocol

    t0 = time.perf_counter()
    got = _generated_cohort(N)
    if got is not None:
        cohort, protocol = got
        print(f"cohort: synthetic generator + build_cohort, {len(cohort):,} persons "
              f"({time.perf_counter() - t0:.1f} s to generate and build)")
    else:
        cohort, protocol = invented_cohort(), parse_protocol(_protocol_dict())
        print(f"cohort: invented in numpy (generator not available), {len(cohort):,} persons")
    design = _timed("design (build_design)", design_for, cohort, protocol)
    X = _timed("design (transform)", design.transform, cohort)
    a = treated_indicator(cohort)
    print(f"  design: {X.shape[0]:,} x {X.shape[1]} columns")
    ours = _timed("propensity fit, ours (Newton/IRLS)", PropensityModel().fit, X, a)
    Xc = sm.add_constant(X)
    ref = _timed("propensity fit, statsmodels Logit (newton)",
                 lambda: sm.Logit(a, Xc).fit(disp=0, method="newton", tol=1e-10))
    diff = np.max(np.abs(ours.predict(X) - ref.predict(Xc)))
    print(f"  max |e_ours - e_statsmodels| = {diff:.2e}; iterations ours {ours.n_iter_}")
    fit = _timed("fit_weights (design, fit, weights)", fit_weights, cohort, protocol)
    pos = _timed("positivity_of", positivity_of, fit, protocol)
    wdf = fit.table
    _timed("balance_table", balance_table, cohort, wdf, protocol)
    rng = np.random.default_rng(SEED)
    model = PropensityModel(warm_start=True).fit(X, a)
    def refits() -> None:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            for _ in range(REFITS):
                f = rng.multinomial(len(a), np.full(len(a), 1 / len(a))).astype(float)
                e = model.fit(X, a, sample_weight=f).predict(X)
                for est in protocol.estimands:
                    estimand_weights(a, e, est, protocol.analysis.weights.stabilize,
                                     protocol.analysis.weights.truncate, sample_weight=f)

    _timed(f"{REFITS} bootstrap refits + weights (warm start)", refits)
    print(f"  (a bootstrap of 200 replicates costs 200/{REFITS} times that)")
    print(f"  c-statistic {pos['c_statistic']:.3f}; ESS (ATE) {pos['weights']['ATE']['ess']}")


if __name__ == "__main__":
    main()
