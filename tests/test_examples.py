"""Every example protocol under config/protocols/ runs end to end on a small synthetic extract.

The extract is the invented registry (synthetic_cohort/) with 3,000 persons; each example goes
through the extract check, the cohort (and, with per_protocol, the deviations and
periods.parquet), the weights and the estimates with two bootstrap replicates. This checks that the examples are usable as written; the estimators themselves are
checked against outside references and the registry's truth elsewhere.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import pandas as pd
import pytest

from emulant.protocol import load_protocol, outcome_name

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = sorted((ROOT / "config" / "protocols").glob("*.yaml"))


@pytest.fixture(scope="module")
def extract(tmp_path_factory) -> Path:
    from synthetic_cohort.generate import write_synthetic

    out = tmp_path_factory.mktemp("examples")
    write_synthetic(out, persons=3000, seed=11)
    return out


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.stem)
def test_example_runs_on_a_small_extract(path, extract, tmp_path):
    from emulant.cohort import build_cohort
    from emulant.estimation.effects import estimate_effects
    from emulant.extract import check_extract, open_extract
    from emulant.models.weights import fit_weights

    p = load_protocol(path)
    p = dataclasses.replace(p, analysis=dataclasses.replace(
        p.analysis, bootstrap=dataclasses.replace(p.analysis.bootstrap, replicates=2)))
    check_extract(extract, p)
    res = build_cohort(open_extract(extract, p), p)
    assert len(res.cohort) > 100 and set(res.cohort["arm"]) == set(p.strategies.arm_names)
    if p.per_protocol:  # person-time: deviations in the cohort, then periods.parquet
        from emulant.cohort.person_time import add_deviations, build_periods

        cohort = add_deviations(open_extract(extract, p), p, res.cohort)
        if p.strategies.design == "clone":  # one row per person and arm, its deviations built in
            assert cohort["person_id"].nunique() * 2 == len(cohort)
            assert {"not_started", "started"} <= set(cohort["deviation_reason"].dropna())
        else:
            assert cohort["deviation_reason"].isin(["stopped"]).any() and cohort["deviation_reason"].isin(["switched"]).any()
        assert build_periods(open_extract(extract, p), p, cohort, tmp_path / "periods.parquet") > len(cohort)
        periods = pd.read_parquet(tmp_path / "periods.parquet")
    else:
        cohort, periods = res.cohort, None
    fit_weights(res.cohort, p)
    est = estimate_effects(cohort, p, workers=1, periods=periods).estimates
    primary = est[est["outcome"] == outcome_name(p.outcomes.primary)]
    assert set(primary["method"]) >= {"unadjusted", *p.analysis.methods}
    assert all(math.isfinite(x) for x in primary["estimate"])
