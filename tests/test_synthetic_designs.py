"""Tests of the invented registry's "designs" scenario (index flare, marker-driven starts) and
of its truths for window, dynamic and sequential-trial strategies.

What these can show is limited to the generator itself: that its truths are reproducible from
the seed, that its closed-form risks agree with the textbook formula for constant hazards
(Kalbfleisch and Prentice, *The Statistical Analysis of Failure Time Data*, 2nd ed., 2002, ch. 8),
that simulating the natural course reproduces the drawn data within Monte-Carlo error, that the
strategy rules follow CONTRACTS §5c/§5d on hand-written cases, and that the naive "classify by
later treatment, follow from the flare" comparison is visibly biased (immortal time and
confounding by indication: a fact of the trade, no single published source). The demo
scenario's files are pinned by hash, so this scenario cannot change them.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pytest
import yaml

from synthetic_cohort import designs as G
from synthetic_cohort import designs_params as D
from synthetic_cohort import designs_process as S
from synthetic_cohort import truth_designs as T
from synthetic_cohort.generate import write_synthetic

SEED = 20261201
HERE = Path(__file__).resolve().parents[1] / "synthetic_cohort" / "designs"


@pytest.fixture(scope="module")
def small():
    tables, lat = G.build(4000, SEED)
    return tables, lat


@pytest.fixture(scope="module")
def full():
    return G.build(20000, SEED)  # the demo size


@pytest.fixture(scope="module")
def clone_small(small):
    return T.clone_truths(*small, SEED, paths=40_000)


def test_demo_scenario_files_unchanged(tmp_path):
    # Pinned SHA-256 of the demo scenario (300 persons, seed 11, CSV) as written before the
    # designs scenario existed: the new scenario must leave the demo's persons and truths alone.
    write_synthetic(tmp_path, persons=300, seed=11, fmt="csv")
    pinned = {
        "coverage.csv": "2144b952f29289419287f942b3bbd4b3beb2e04f91614e988d32dd4a0aa63b2e",
        "deaths.csv": "1714d6ccf7afbf49af260e808f151831d9ce494b1624bef59938ffe241a439ae",
        "diagnoses.csv": "19119b81361981043287033494451739465c5b75c34aef1cd03475ffe397a737",
        "dispensings.csv": "f5cd2a6f5cf06f54f14d329bc76f7ebdc8f2a6fc439d6a5d92731b5a05c8ab62",
        "measurements.csv": "45d7344c4f4f204bd5ff8a8ca5a4ced90246aed1566b25dce9acac9585f27164",
        "persons.csv": "0fb959c1be032e741beb4d6f86ccac2f61933542b56250b42eeeb797deb369bb",
        "truth.json": "aff3563613cbff0c56842124b9daa84c1fbaad2fbca92681a3e64798fe585896",
    }
    got = {name: hashlib.sha256((tmp_path / name).read_bytes()).hexdigest() for name in pinned}
    assert got == pinned
    assert not list(tmp_path.glob("clone.yaml"))


def test_designs_extract_reproducible_from_seed(tmp_path, monkeypatch):
    monkeypatch.setattr(T, "PATHS", 4000)
    a, b, c = tmp_path / "a", tmp_path / "b", tmp_path / "c"
    ta = write_synthetic(a, persons=600, seed=3, scenario="designs")
    tb = write_synthetic(b, persons=600, seed=3, scenario="designs")
    tc = write_synthetic(c, persons=600, seed=4, scenario="designs")
    files = sorted(p.name for p in a.iterdir())
    assert files == sorted(p.name for p in b.iterdir())
    assert {"persons.parquet", "dispensings.parquet", "measurements.parquet", "clone.yaml",
            "sequential.yaml", "dynamic.yaml", "truth.json"} <= set(files)
    assert not (a / "protocol.yaml").exists()
    for f in files:
        assert (a / f).read_bytes() == (b / f).read_bytes(), f
    assert ta == tb == json.loads((a / "truth.json").read_text())
    assert ta["clone"]["per_protocol"] != tc["clone"]["per_protocol"]


def test_truth_functions_reproducible_and_common_random_numbers(small):
    a = T.clone_truths(*small, SEED, paths=8000)
    b = T.clone_truths(*small, SEED, paths=8000)
    assert a == b
    # the same rule twice under common random numbers gives the same per-person risks
    tables, lat = small
    el, _ = G.clone_cohort(tables, lat)
    e = np.flatnonzero(el)[:200]
    state = {"tone_prev": lat.tone_before[e], "tone": lat.run.L[e, 0], "age0": lat.age0[e],
             "male": lat.male[e], "k0": np.zeros(len(e), np.int64), "s": np.ones(len(e))}
    r = T.strategy_risks(state, {"x": lambda rows: S.Natural(), "y": lambda rows: S.Natural()},
                         (365,), np.random.default_rng(1), 2000)
    assert np.array_equal(r["x"], r["y"])


def test_risks_match_closed_form_for_constant_hazards():
    # Kalbfleisch and Prentice (2002, ch. 8): constant hazards h (event) and d (competing):
    # F(t) = h / (h + d) * (1 - exp(-(h + d) t)); memoryless, so any window [s, s + t) agrees.
    K = 40
    h = np.full((3, K), 0.0004)
    d = np.full((3, K), 0.0001)
    s = np.array([1.0, 17.0, 301.0])
    fy, fd = S.risks(h, d, s, s + 365.0)
    expected = 0.0004 / 0.0005 * -np.expm1(-0.0005 * 365)
    assert np.allclose(fy, expected, rtol=1e-12)
    assert np.allclose(fd, -np.expm1(-0.0001 * 365), rtol=1e-12)


def test_event_times_follow_the_piecewise_hazard():
    # Inversion of a piecewise-constant cumulative hazard: the share with T < 1 + 365 must equal
    # 1 - exp(-H) within binomial error (T counted from day 1).
    rng = np.random.default_rng(2)
    n, K = 200_000, 20
    h = np.tile(np.linspace(0.0002, 0.002, K), (n, 1))
    t = S.event_times(rng, h)
    _, f = S.risks(np.zeros_like(h), h, np.ones(n), np.ones(n) + 365)
    share = np.mean(t < 366)
    assert t.min() >= 1.0
    assert abs(share - f[0]) < 4 * np.sqrt(f[0] * (1 - f[0]) / n)


def _run(rule, tone_path, u, started=False):
    """One person's start visit under ``rule``: the tone steps ``eps`` are chosen so that the
    untreated tone follows ``tone_path`` (after a start the path no longer matters here)."""
    K = len(tone_path)
    L = np.asarray(tone_path, float)
    step = D.TONE_STEP
    eps = np.zeros(K)
    eps[:-1] = (L[1:] - L[:-1] - step["rate"] * (step["target"]["none"] - L[:-1])) / step["sd"]
    run = S.simulate(np.array([50.0]), np.array([L[0]]), np.array([63.0]), np.array([started]),
                     eps[None, :], np.asarray(u, float)[None, :], rule)
    if run.start[0] == K:
        assert np.allclose(run.L[0], L)
    return int(run.start[0])


def test_window_rule_reading_of_contract():
    # CONTRACTS §5d, as estimated: no start before a; natural starts inside; the window's last
    # visit (first day of its last period) forced.
    never_go, always_go = np.ones(8), np.zeros(8)  # u = 1: no natural start; u = 0: starts
    assert _run(S.Window(0, 89), [55] * 8, never_go) == 2  # visits 0, 30, 60: forced on day 60
    assert _run(S.Window(0, 90), [55] * 8, never_go) == 3  # day 90 is inside [0, 90]
    assert _run(S.Window(30, 89), [55] * 8, always_go) == 1  # no start on day 0, before a
    assert _run(S.Window(0, 89), [55] * 8, always_go) == 0
    assert _run(S.Never(), [55] * 8, always_go) == 8  # never: K
    with pytest.raises(ValueError, match="no visit day"):
        S.Window(31, 59)


def test_dynamic_rule_reading_of_contract():
    # §5d `when`: trigger = first visit with tone above x; no start before it; natural starts in
    # [trigger, trigger + g]; the last visit there forced; no trigger, no start.
    never_go, always_go = np.ones(8), np.zeros(8)
    rise = [50, 52, 61, 58, 70, 50, 50, 50]
    assert _run(S.Dynamic(60, 30, 1), rise, never_go) == 3  # trigger day 60, forced on day 90
    assert _run(S.Dynamic(60, 29, 1), rise, never_go) == 2  # window [60, 89]: forced at once
    assert _run(S.Dynamic(60, 30, 1), rise, always_go) == 2  # starts at the trigger visit
    assert _run(S.Dynamic(65, 30, 1), rise, never_go) == 5
    assert _run(S.Dynamic(80, 30, 1), rise, always_go) == 8  # never triggered: never starts


def test_start_probability_rises_with_the_tone(small):
    # confounding by indication through the time-varying marker: more starts at a higher tone
    p = S.start_probability(3, np.array([45.0, 55.0, 65.0]), np.array([63.0] * 3))
    assert p[0] < p[1] < p[2]
    _, lat = small
    started_early = lat.run.start <= 2
    assert lat.tone_before[started_early].mean() > lat.tone_before[~started_early].mean() + 1


def test_natural_course_reproduces_the_drawn_data(clone_small):
    # The same persons simulated under the natural course (fresh paths) against the crude risks
    # of the event times drawn for the extract (no censoring): within 4 binomial SEs.
    for outcome in T.OUTCOMES:
        obs = clone_small["observed_uncensored"][outcome]
        for h in map(str, D.HORIZONS):
            sim = clone_small["natural_course"][outcome]["risk"][h]
            assert abs(sim - obs["risk"][h]) < 4 * obs["se"][h], (outcome, h)


def test_truth_directions(clone_small):
    pp = clone_small["per_protocol"]["crisis"]["ATE"]
    nat = clone_small["natural_course"]["crisis"]["risk"]
    for h in map(str, D.HORIZONS):
        # kestrel lowers the crisis hazard: early start < natural course < never
        assert pp["risk"]["early"][h] < nat[h] < pp["risk"]["never"][h]
        dyn = clone_small["dynamic"]["crisis"]["ATE"]["risk"]
        # a higher threshold treats fewer persons later: risk rises towards "never"
        r = [dyn[f"above_{x:g}"][h] for x in D.THRESHOLDS] + [dyn["never"][h]]
        assert r == sorted(r)
        assert dyn["never"][h] == pp["risk"]["never"][h]  # same persons, same random numbers


def test_naive_comparison_is_biased_at_demo_size(full):
    # "classify by later treatment, follow from the flare" against the per-protocol truth of
    # "start within the window" vs "never": more than 3 SE apart at the demo size (20,000).
    tables, lat = full
    truth = T.clone_truths(tables, lat, SEED, paths=30_000)
    naive = truth["naive"]["crisis"]
    true_rd = truth["per_protocol"]["crisis"]["ATE"]["risk_difference"]
    for h in map(str, D.HORIZONS):
        assert abs(naive["risk_difference"][h] - true_rd[h]) > 3 * naive["se"][h], h


def test_sequential_candidates_follow_the_contract(small):
    tables, lat = small
    pt = G.sequential_candidates(tables, lat)
    starts = G.trial_starts()
    assert len(starts) == 13 and starts[-1] <= D.TRIALS_END
    assert np.all(starts[pt.trial] == pt.t0)
    i = pt.person
    assert np.all(lat.d0[i] < pt.t0) and np.all(lat.d0[i] >= pt.t0 - 1095)  # require: flare
    assert np.all(tables.death[i] >= pt.t0)  # alive
    # an initiator's first kestrel dispensing is in the trial's first 30 days; nobody is a
    # candidate of a later trial after starting (washout), so an initiator's trial is their last
    assert np.all((lat.first_kestrel[i][pt.initiator] >= pt.t0[pt.initiator])
                  & (lat.first_kestrel[i][pt.initiator] <= pt.t0[pt.initiator] + 29))
    assert np.all(lat.first_kestrel[i] >= pt.t0)
    last = {}
    for p, j in zip(i, pt.trial, strict=True):
        last[p] = max(last.get(p, -1), j)
    assert all(last[p] == j for p, j in zip(i[pt.initiator], pt.trial[pt.initiator], strict=True))
    assert max(np.bincount(i)) > 1  # persons in several trials
    steps = [s for s, _ in pt.attrition]
    assert steps == ["person_trials", "alive", "age", "coverage_before", "washout", "require:flare",
                     "exclude:crisis"]
    assert pt.attrition[-1][1] == len(i)


def test_sequential_truth_directions(small):
    seq = T.sequential_truths(*small, SEED, paths=20_000)
    for est in ("ATE", "ATT"):
        pp = seq["per_protocol"]["crisis"][est]["risk"]
        itt = seq["intention_to_treat"]["crisis"][est]["risk"]
        for h in map(str, D.HORIZONS):
            # later natural starts make "do not start now" (ITT) better than never starting
            assert pp["kestrel"][h] < itt["no_kestrel"][h] < pp["no_kestrel"][h]
            assert itt["kestrel"][h] == pp["kestrel"][h]  # nobody stops kestrel


def test_example_protocols_match_the_scenario():
    clone = yaml.safe_load((HERE / "clone.yaml").read_text())
    seq = yaml.safe_load((HERE / "sequential.yaml").read_text())
    dyn = yaml.safe_load((HERE / "dynamic.yaml").read_text())
    day = str
    assert clone["strategies"]["arms"]["early"]["start_within"] == list(D.WINDOW)
    when = dyn["strategies"]["arms"]["when_high"]["when"]
    assert when["above"] == list(D.THRESHOLDS) and when["within_days"] == D.WITHIN_DAYS
    assert seq["strategies"]["trial_every_days"] == D.TRIAL_EVERY
    assert seq["eligibility"]["require"][0]["window"] == list(D.REQUIRE_FLARE)
    for p, (lo, hi) in ((clone, (D.ENTRY_START, D.ENTRY_END)), (dyn, (D.ENTRY_START, D.ENTRY_END)),
                        (seq, (D.TRIALS_START, D.TRIALS_END))):
        entry = p["eligibility"]["entry"]
        assert (day(entry["start"]), day(entry["end"])) == tuple(
            str(np.datetime64(x, "D")) for x in (lo, hi))
        assert p["eligibility"]["age"] == {"min": D.AGE_MIN, "max": D.AGE_MAX}
        assert p["analysis"]["horizons_days"] == list(D.HORIZONS)
        assert p["concepts"]["flare"]["codes"] == list(D.FLARE_CODES)
        assert p["concepts"]["crisis"]["codes"] == list(D.CRISIS_CODES)
        assert p["concepts"]["kestrel"]["codes"] == list(D.KESTREL_CODES)
        assert p["concepts"]["tone"]["codes"] == [D.TONE_CODE]
        assert p["strategies"]["washout_days"] == D.WASHOUT


def test_sequential_natural_course_reproduces_the_drawn_data(full):
    # The person-trials' state at each trial start (visit inside the first interval, the tones
    # before it, the risk window's offset) checked by simulating the natural course from it: the
    # crude risks of the drawn event times of the same person-trials agree within 4 SEs
    # (clustered on persons, who enter several trials). At the demo size a tone 8 units off at
    # the trial start, or risks counted from the flare instead of the trial start, fail it.
    tables, lat = full
    pt = G.sequential_candidates(tables, lat)
    state = T.sequential_state(lat, pt)
    k = state.pop("k")
    r = T.strategy_risks(state, {"nat": lambda rows: S.NaturalAfter(k[rows] - 1)}, D.HORIZONS,
                         np.random.default_rng(5), 40_000)["nat"]
    i, s = pt.person, state["s"]
    for o, name in enumerate(T.OUTCOMES):
        for j, h in enumerate(D.HORIZONS):
            if name == "crisis":
                hit = (lat.t_crisis[i] < lat.t_death[i]) & (lat.t_crisis[i] < s + h)
            else:
                hit = lat.t_death[i] < s + h
            resid = hit - r[o, j]
            per_person = np.bincount(i, resid)
            se = np.sqrt((per_person ** 2).sum()) / len(i)
            assert abs(resid.mean()) < 4 * se, (name, h, resid.mean(), se)


def test_sequential_candidates_agree_with_emulant(tmp_path, monkeypatch):
    # The scenario's own numpy reading of §5c (designs.sequential_candidates) against emulant's
    # DuckDB person-trials on the written extract, person-trial by person-trial: the truth's
    # population is the one the estimators see. The protocol is sequential.yaml read as the
    # initiators design (the `none` arm given a concept with no records) with the plan beside it.
    from emulant.cohort.sequential import TrialPlan, build_sequential
    from emulant.extract import open_extract
    from emulant.protocol import parse_protocol

    monkeypatch.setattr(T, "PATHS", 2000)
    out = tmp_path / "x"
    write_synthetic(out, persons=1500, seed=9, scenario="designs")
    raw = yaml.safe_load((HERE / "sequential.yaml").read_text())
    st = raw["strategies"]
    for key in ("design", "trial_every_days", "noninitiator_sample"):
        st.pop(key)
    st["arms"]["no_kestrel"] = {"initiate": "placeholder"}
    raw["concepts"]["placeholder"] = {"source": "dispensings", "codes": ["ZZZ9"]}
    raw["contrasts"] = ["intention_to_treat"]
    raw.pop("time_varying")
    p = parse_protocol(raw)
    res = build_sequential(open_extract(out, p), p, TrialPlan("kestrel", "no_kestrel", D.TRIAL_EVERY))
    got = {(int(str(r.person_id)[1:]) - 1, int(r.trial)): r.arm for r in res.cohort.itertuples()}
    tables, lat = G.build(1500, 9)
    pt = G.sequential_candidates(tables, lat)
    mine = {(int(i), int(j)): "kestrel" if s else "no_kestrel"
            for i, j, s in zip(pt.person, pt.trial, pt.initiator, strict=True)}
    assert got == mine
    assert list(zip(res.attrition["step"], res.attrition["remaining"], strict=True)) == pt.attrition
