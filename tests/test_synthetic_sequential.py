"""The sequential design against the synthetic registry's "designs" scenario (CONTRACTS §5c).

Two checks against something computed outside emulant's cohort and estimators:

* the person-trials and their arms, person by person, against the generator's own reading of
  the protocol on its latent arrays (``synthetic_cohort.designs.sequential_candidates``);
* the intention-to-treat risks of "start kestrel in the trial's first interval" and "do not start
  then", against the truth computed by simulating the same person-trials under each strategy
  (``truth.json`` "sequential"): the adjusted estimates cover it, while the naive comparison of
  initiating with non-initiating person-trials (no adjustment for the tone that drives starting)
  is biased by more than 3 of its bootstrap standard errors. That confounding by indication
  biases the unadjusted contrast is a fact of the trade (no single published source).
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest

from emulant.protocol import load_protocol

PERSONS, SEED = 20000, 20261201


@pytest.fixture(scope="module")
def designs(tmp_path_factory):
    from synthetic_cohort.generate import write_synthetic

    out = tmp_path_factory.mktemp("designs")
    write_synthetic(out, persons=PERSONS, seed=SEED, scenario="designs")
    p = load_protocol(out / "sequential.yaml")
    p = dataclasses.replace(p, contrasts=("intention_to_treat",), analysis=dataclasses.replace(
        p.analysis, bootstrap=dataclasses.replace(p.analysis.bootstrap, replicates=40)))
    from emulant.cohort import build_cohort
    from emulant.extract import open_extract

    res = build_cohort(open_extract(out, p), p)
    return p, res, json.loads((out / "truth.json").read_text())["sequential"]


def test_person_trials_person_by_person_against_the_generator(designs):
    from synthetic_cohort import designs as G
    from synthetic_cohort.records import person_ids

    p, res, truth = designs
    tables, lat = G.build(PERSONS, SEED)
    pt = G.sequential_candidates(tables, lat)
    ids = np.asarray(person_ids(PERSONS).to_pylist())
    want = {(ids[i], int(j)): ("kestrel" if s else "no_kestrel")
            for i, j, s in zip(pt.person, pt.trial, pt.initiator, strict=True)}
    got = dict(zip(zip(res.cohort.person_id, res.cohort.trial.astype(int), strict=True),
                   res.cohort.arm, strict=True))
    assert got == want
    assert res.attrition.remaining.tolist() == [a["remaining"] for a in truth["attrition"]]
    assert res.cohort.person_id.nunique() == truth["persons"]


def test_itt_estimates_cover_the_truth_and_the_naive_comparison_does_not(designs):
    from emulant.estimation.effects import estimate_effects

    p, res, truth = designs
    est = estimate_effects(res.cohort, p, workers=2, progress=False).estimates
    rd = est[(est.outcome == "crisis") & (est.measure == "risk_difference")]
    itt = truth["intention_to_treat"]["crisis"]
    for r in rd.itertuples():
        h = str(int(r.horizon_day))
        if r.method == "unadjusted":
            continue
        t = itt[r.estimand]["risk_difference"][h]
        assert r.ci_low <= t <= r.ci_high, (r.estimand, r.method, h, r.estimate, t)
    naive = rd[(rd.method == "unadjusted") & (rd.horizon_day == 730)].iloc[0]
    t = itt["ATE"]["risk_difference"]["730"]
    assert abs(naive.estimate - t) > 3 * naive.se, (naive.estimate, naive.se, t)
