"""The bootstrap (emulant/bootstrap.py): reproducibility, failures, intervals.

Sources: Efron & Tibshirani, "An Introduction to the Bootstrap" (1993), ch. 6 (the bootstrap
standard error is the SD of the replicates) and ch. 13 (percentile intervals); the Wald interval
of a ratio on the log scale is common practice, no single source. Expected interval values are
hand computations.
"""

from __future__ import annotations

import numpy as np
import pytest
from test_effects import cohort_frame, linear_world, make_protocol

from emulant.estimation import bootstrap as B
from emulant.estimation import intervals as I
from emulant.estimation.effects import estimate_effects

COVS = (("x1", "continuous"), ("x2", "binary"))


def small(n=300, replicates=8, interval="wald", seed=4):
    a, covs, y = linear_world(n=n, seed=seed, noise=1.0)
    y = np.where(np.random.default_rng(2).random(n) < 0.1, np.nan, y)  # censoring weights too
    return cohort_frame(a, covs, y), make_protocol(COVS, replicates=replicates, interval=interval,
                                                   estimands=("ATE", "ATT", "ATO"))


def test_replicate_frequencies():
    f = B.replicate_freq(50, 7, 3)
    assert f.sum() == 50 and f.dtype == float
    assert np.array_equal(f, np.random.default_rng([7, 3]).multinomial(50, np.full(50, 0.02)))
    assert np.array_equal(f, B.replicate_freq(50, 7, 3))
    assert not np.array_equal(f, B.replicate_freq(50, 7, 4))


def test_identical_whatever_the_number_of_workers():
    cohort, protocol = small()
    one = estimate_effects(cohort, protocol, workers=1, progress=False)
    two = estimate_effects(cohort, protocol, workers=2, progress=False)
    for col in ("estimate", "se", "ci_low", "ci_high"):
        assert np.array_equal(one.estimates[col].to_numpy(), two.estimates[col].to_numpy()), col
    assert one.bootstrap["completed"] == two.bootstrap["completed"] == 8
    assert one.bootstrap == two.bootstrap and one.bootstrap["seed"] == 11  # no timing, no workers
    assert one.estimates["se"].gt(0).all()


def test_failed_replicates_are_counted(monkeypatch):
    cohort, protocol = small(replicates=20)
    a = cohort["treated"].to_numpy()
    real = B.replicate_freq

    def no_treated_in(bad):
        def freq(n, seed, r, kind="multinomial"):
            f = real(n, seed, r, kind)
            if r in bad:
                f[a == 1] = 0  # an arm without anyone: the replicate must fail
            return f
        return freq

    monkeypatch.setattr(B, "replicate_freq", no_treated_in({3}))
    res = estimate_effects(cohort, protocol, workers=1, progress=False)
    assert res.bootstrap["completed"] == 19 and res.bootstrap["failed"] == 1
    assert res.bootstrap["failure_reasons"] == {"empty arm": 1}
    monkeypatch.setattr(B, "replicate_freq", no_treated_in({3, 11}))  # 10% > 5%: the run stops
    with pytest.raises(B.BootstrapError, match="2 of 20 replicates failed.*empty arm: 2"):
        estimate_effects(cohort, protocol, workers=1, progress=False)


@pytest.mark.filterwarnings("ignore::UserWarning")  # the point estimate's separated fit
def test_a_fragile_cohort_stops_the_run():
    # Two treated persons among 40: about (1 - 2/40)^40 = 13% of replicates have no treated
    # person (hand computation), far above 5%.
    a, covs, y = linear_world(n=40, seed=1, noise=1.0)
    a = np.zeros(40, dtype=int)
    a[:2] = 1
    protocol = make_protocol(COVS, replicates=40, methods=("ipw",))
    with pytest.raises(B.BootstrapError, match="empty arm"):
        estimate_effects(cohort_frame(a, covs, y), protocol, workers=2, progress=False)


def test_wald_and_percentile_by_hand():
    reps = np.array([[1.0], [2.0], [3.0], [4.0], [5.0]])
    se, lo, hi = I.bootstrap_intervals(np.array([3.0]), reps, np.array([False]), "wald")
    sd = np.sqrt(2.5)  # hand computation: SD of 1..5 with n - 1
    assert se[0] == pytest.approx(sd) and lo[0] == pytest.approx(3 - 1.959964 * sd)
    assert hi[0] == pytest.approx(3 + 1.959964 * sd)
    se, lo, hi = I.bootstrap_intervals(np.array([3.0]), reps, np.array([False]), "percentile")
    # hand computation: linear interpolation, positions 0.1 and 3.9 of the sorted replicates
    assert (lo[0], hi[0]) == pytest.approx((1.1, 4.9)) and se[0] == pytest.approx(sd)


def test_ratios_on_the_log_scale():
    logs = np.log([0.5, 1.0, 2.0, 4.0])
    reps = np.exp(logs)[:, None]
    se, lo, hi = I.bootstrap_intervals(np.array([1.5]), reps, np.array([True]), "wald")
    sd = np.std(logs, ddof=1)
    assert se[0] == pytest.approx(sd)  # reported on the log scale
    assert lo[0] == pytest.approx(1.5 * np.exp(-1.959964 * sd))
    assert hi[0] == pytest.approx(1.5 * np.exp(1.959964 * sd))
    assert lo[0] * hi[0] == pytest.approx(1.5 ** 2)  # symmetric on the log scale


def test_no_replicates_no_intervals():
    cohort, protocol = small(replicates=0)
    res = estimate_effects(cohort, protocol, workers=2, progress=False)
    assert res.estimates[["se", "ci_low", "ci_high"]].isna().all().all()
    assert res.estimates["estimate"].notna().all()
    assert res.bootstrap["requested"] == 0 and res.bootstrap["completed"] == 0


def test_progress_callback_and_curve_intervals():
    seen = []
    cohort, protocol = small(replicates=5)
    estimate_effects(cohort, protocol, workers=1, progress=lambda done, total: seen.append(done))
    assert seen == [1, 2, 3, 4, 5]
    curves = [{"contrast": "intention_to_treat", "estimand": "ATE", "method": "ipw", "arm": "t",
               "day": d, "risk": 0.1 * d, "at_risk": 10} for d in (1, 2)]
    run = B.BootstrapRun(3, 1, "percentile", np.zeros((3, 0)),
                         np.array([[0.1, 0.2], [0.2, 0.3], [0.3, 0.1]]), [0, 1, 2])
    _, out = I.attach_intervals([], curves, run, "percentile")
    assert out[0]["ci_low"] == pytest.approx(0.105) and out[1]["ci_high"] == pytest.approx(0.295)


def test_chunks_through_files_give_the_same_bytes(tmp_path):
    # The workflow's split (point estimate, chunks written to files, gather) against the one-run
    # library call: estimates.csv, curves.csv and bootstrap.json identical byte for byte, for
    # chunkings of 1, 3 and 7 (one replicate each) chunks, with one and two worker processes.
    from emulant import stages
    from emulant.estimation import chunks
    from emulant.estimation.effects import bootstrap_replicates, gather_effects, point_estimate

    cohort, protocol = small(replicates=7)
    whole = estimate_effects(cohort, protocol, workers=1, progress=False)

    def files(res, folder):
        folder.mkdir()
        stages.write_csv(folder / "estimates.csv", res.estimates)
        stages.write_csv(folder / "curves.csv", res.curves)
        stages.write_json(folder / "bootstrap.json", res.bootstrap)
        return {p.name: p.read_bytes() for p in folder.iterdir()}

    expected = files(whole, tmp_path / "whole")
    (tmp_path / "point.json").write_text(chunks.point_to_json(point_estimate(cohort, protocol)))
    point = chunks.read_point(tmp_path / "point.json")
    for k, workers in ((1, 2), (3, 1), ("auto", 2), (7, 1)):
        runs = []
        for j, r in enumerate(chunks.chunk_ranges(7, k)):
            path = tmp_path / f"{k}_{j}.npz"
            with open(path, "wb") as fh:
                chunks.write_run(fh, bootstrap_replicates(cohort, protocol, point, r, workers,
                                                          progress=False))
            runs.append(chunks.read_run(path))
        got = files(gather_effects(point, runs[::-1], protocol), tmp_path / f"chunks{k}")
        assert got == expected, k
    with pytest.raises(B.BootstrapError, match="missing: \\[3, 4\\]"):
        gather_effects(point, runs[:3] + runs[5:], protocol)


def test_chunk_ranges():
    assert chunks_of(200, None) == [(0, 25)] + [(25 * i, 25 * i + 25) for i in range(1, 8)]
    assert chunks_of(10, 3) == [(0, 3), (3, 6), (6, 10)]
    assert chunks_of(2, 5) == [(0, 1), (1, 2)] and chunks_of(0, "auto") == []
    from emulant.estimation.chunks import chunk_name
    assert chunk_name(range(25, 50)) == "replicates_025-049.npz"


def chunks_of(n, k):
    from emulant.estimation.chunks import chunk_ranges
    return [(r.start, r.stop) for r in chunk_ranges(n, k)]


def test_a_hazard_model_that_does_not_converge_fails_its_replicate(tmp_path, monkeypatch):
    # A pooled logistic hazard fit that stops before converging must never give a replicate's
    # value silently: the point estimate warns, each replicate counts as failed, and with every
    # replicate failed the run stops (the 5% rule). Forced here by marking every fit unconverged.
    import dataclasses

    from emulant.cohort import build_cohort
    from emulant.errors import NonConvergenceWarning
    from emulant.estimation import pooled_logistic as gformula
    from emulant.extract import open_extract
    from emulant.protocol import load_protocol

    generate = pytest.importorskip("synthetic_cohort.generate")
    generate.write_synthetic(tmp_path, 1500, 2, "parquet")
    protocol = load_protocol(tmp_path / "protocol.yaml")
    outcomes = dataclasses.replace(protocol.outcomes, secondary=(), negative_controls=())
    boot = dataclasses.replace(protocol.analysis.bootstrap, replicates=4)
    protocol = dataclasses.replace(protocol, outcomes=outcomes, contrasts=("intention_to_treat",),
                                   analysis=dataclasses.replace(protocol.analysis, bootstrap=boot))
    cohort = build_cohort(open_extract(tmp_path, protocol), protocol).cohort
    fit = gformula.PooledLogistic.fit

    def unconverged(self, *args, **kwargs):
        out = fit(self, *args, **kwargs)
        out.converged_ = False
        return out

    monkeypatch.setattr(gformula.PooledLogistic, "fit", unconverged)
    with pytest.warns(NonConvergenceWarning), pytest.raises(B.BootstrapError, match="did not converge"):
        estimate_effects(cohort, protocol, workers=1, progress=False)
