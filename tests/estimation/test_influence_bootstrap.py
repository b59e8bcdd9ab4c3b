"""Influence-function standard errors against the bootstrap, on the synthetic registry.

Both are consistent for the same sampling variance (the nonparametric bootstrap and the
empirical sandwich of the stacked estimating equations; Efron & Tibshirani 1993, ch. 21;
Stefanski & Boos 2002), so their ratio must be near 1 in a cohort of a few thousand. With R
bootstrap replicates the bootstrap SE has a Monte Carlo relative error of about
:math:`1/\\sqrt{2R}` (Efron & Tibshirani 1993, §6.4): R = 500 gives about 3%, so the
0.9–1.1 band asked of the contrasts (risk and mean differences) sits at about 3 Monte Carlo
standard errors (a common-practice tolerance). The band 0.85–1.15 for every other row (arm
risks, ratios, rates, curves) allows for rows with few events. A larger version is
``bench/bench_influence.py``.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from emulant.cohort import build_cohort
from emulant.estimation.effects import estimate_effects
from emulant.estimation.influence_rows import FALLBACK, NO_INTERVAL, NOTE
from emulant.extract import open_extract
from emulant.protocol import load_protocol

generate = pytest.importorskip("synthetic_cohort.generate")

REPLICATES = 500


@pytest.fixture(scope="module")
def registry(tmp_path_factory):
    out = tmp_path_factory.mktemp("influence")
    generate.write_synthetic(out, 3000, 5, "parquet")
    protocol = load_protocol(out / "protocol.yaml")
    return protocol, build_cohort(open_extract(out, protocol), protocol).cohort


def _variant(protocol, outcome, methods, variance, replicates=0):
    an = protocol.analysis
    outcomes = dataclasses.replace(protocol.outcomes, primary=outcome, secondary=(),
                                   negative_controls=(), for_decision=())
    an = dataclasses.replace(an, methods=methods, hazard_ratio=False, variance=variance,
                             primary=dataclasses.replace(an.primary, method=methods[0]),
                             bootstrap=dataclasses.replace(an.bootstrap, replicates=replicates))
    return dataclasses.replace(protocol, outcomes=outcomes, analysis=an, decision=None,
                               contrasts=("intention_to_treat",),
                               subgroups=(), estimands=("ATE", "ATT"))


def _compare(registry, outcome, methods, contrasts):
    protocol, cohort = registry
    infl = estimate_effects(cohort, _variant(protocol, outcome, methods, "influence"),
                            workers=2, progress=False)
    boot = estimate_effects(cohort, _variant(protocol, outcome, methods, "bootstrap", REPLICATES),
                            workers=2, progress=False)
    # every interval from the influence function: no replicate was run
    assert infl.bootstrap["requested"] == 0 and infl.bootstrap["variance"] == "influence"
    a = infl.estimates[infl.estimates.measure != "e_value"]  # E-values follow the intervals
    b = boot.estimates[boot.estimates.measure != "e_value"]
    assert infl.bootstrap["influence_rows"] == len(a)
    assert a["note"].str.contains(NOTE, regex=False).all()
    assert list(a.estimate) == pytest.approx(list(b.estimate), rel=1e-12, nan_ok=True)
    ok = a.se.notna() & b.se.notna()
    ratio = (a.se / b.se)[ok]
    main = a.measure[ok].isin(contrasts)
    assert ok.sum() >= 0.9 * len(a)
    assert ratio[main].between(0.9, 1.1).all(), a[ok][main].assign(ratio=ratio[main])
    assert ratio.between(0.85, 1.15).all(), a[ok].assign(ratio=ratio)
    assert 0.95 < float(np.median(ratio)) < 1.05
    c, d = infl.curves, boot.curves
    width = ((c.ci_high - c.ci_low) / (d.ci_high - d.ci_low))[(d.ci_high - d.ci_low) > 1e-3]
    assert len(width) == 0 or 0.9 < float(np.median(width)) < 1.1
    return a[ok].assign(ratio=ratio)


def test_time_to_event_ipw_risks_match_the_bootstrap(registry):
    protocol, _ = registry
    _compare(registry, protocol.outcomes.primary, ("ipw",), ("risk_difference",))


def test_measured_ipw_and_doubly_robust_means_match_the_bootstrap(registry):
    protocol, _ = registry
    (marker,) = protocol.outcomes.measured()
    _compare(registry, marker, ("ipw", "doubly_robust"), ("mean_difference",))


def test_rows_without_an_influence_function_keep_the_bootstrap(registry):
    # standardization has none: its rows keep bootstrap intervals, and say so
    protocol, cohort = registry
    p = _variant(protocol, protocol.outcomes.primary, ("ipw", "standardization"), "influence", 20)
    res = estimate_effects(cohort, p, workers=1, progress=False)
    est = res.estimates[res.estimates.measure != "e_value"]
    assert res.bootstrap["requested"] == 20 and res.bootstrap["completed"] == 20
    std = est[est.method == "standardization"]
    assert std.note.str.contains(FALLBACK, regex=False).all() and std.se.notna().all()
    ipw = est[est.method == "ipw"]
    assert ipw.note.str.contains(NOTE, regex=False).all()
    assert res.bootstrap["influence_rows"] == len(est) - len(std)


def test_person_trials_get_no_influence_function_and_say_so(registry):
    # influence functions here assume one row per person: person-trials (a trial column) keep
    # the bootstrap; with no replicate run the rows have no interval, and their note says why
    protocol, cohort = registry
    p = _variant(protocol, protocol.outcomes.primary, ("ipw",), "influence")
    res = estimate_effects(cohort.assign(trial=0), p, workers=1, progress=False)
    est = res.estimates[res.estimates.measure != "e_value"]
    assert res.bootstrap["requested"] == 0 and res.bootstrap["influence_rows"] == 0
    assert est.se.isna().all() and est.note.str.contains(NO_INTERVAL, regex=False).all()
