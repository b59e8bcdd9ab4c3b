"""The synthetic registry's treatment process over time (synthetic_cohort.sustain) and its truths.

The per-protocol truth evaluates, along each person's tone path, the cumulative incidence of
piecewise-constant hazards with a competing event (Kalbfleisch & Prentice, *The Statistical
Analysis of Failure Time Data*, 2nd ed., 2002, ch. 8); here that closed form is checked against
event times drawn from the same hazards, and the written dispensings against the deviation days
the process meant (every deviation falls on a tone recording day, a multiple of 30).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import yaml

from emulant.cohort import build_cohort
from emulant.cohort.person_time import add_deviations
from emulant.extract import open_extract
from emulant.protocol import load_protocol
from synthetic_cohort import params as P
from synthetic_cohort import sustain
from synthetic_cohort.generate import write_synthetic


def test_piecewise_risk_equals_simulated_event_times():
    rng = np.random.default_rng(11)
    n = 40_000
    arm = rng.integers(0, 2, n)
    paths = sustain.simulate(rng, rng.normal(50, 8, n), arm, rng.choice([30, 90], n))
    h = np.exp(sustain.log_hazards(np.full(n, math.log(0.08 / 365.25)), arm,
                                   rng.integers(0, 2, n), paths))
    hd = np.full(n, 0.03 / 365.25)
    exact = sustain.cumulative_incidence(h, hd, (200, 365, 1095)).mean(axis=1)
    t_out = sustain.draw_times(rng, h)
    t_death = rng.exponential(1 / hd)
    for i, t in enumerate((200, 365, 1095)):
        empirical = np.mean((t_out <= t) & (t_out < t_death))
        se = math.sqrt(exact[i] * (1 - exact[i]) / n)  # binomial SE, common practice
        assert abs(empirical - exact[i]) < 4 * se, (t, empirical, exact[i])


def test_adherent_paths_never_deviate_and_follow_the_target():
    rng = np.random.default_rng(3)
    arm = np.array([0, 1])
    paths = sustain.simulate(rng, np.array([50.0, 50.0]), arm, np.array([30, 90]), adhere=True)
    assert (paths.taken == sustain.OWN).all() and (paths.kind == -1).all()
    # L_k = target + (L_0 - target) (1 - rate)^k, kestrel target 43, plover 46
    k = np.arange(P.N_PERIODS)
    for i, target in enumerate((43.0, 46.0)):
        assert np.allclose(paths.L[i], target + (50 - target) * (1 - P.TONE["rate"]) ** k)


@pytest.fixture(scope="module")
def registry(tmp_path_factory):
    out = tmp_path_factory.mktemp("sustain")
    truth = write_synthetic(out, persons=4000, seed=17)
    d = yaml.safe_load((out / "protocol.yaml").read_text())
    d["contrasts"] = ["intention_to_treat", "per_protocol"]
    (out / "pp.yaml").write_text(yaml.safe_dump(d, sort_keys=False))
    protocol = load_protocol(out / "pp.yaml")
    ex = open_extract(out, protocol)
    return truth, add_deviations(ex, protocol, build_cohort(ex, protocol).cohort)


def test_deviations_fall_on_tone_recording_days(registry):
    _, cohort = registry
    dev = cohort.dropna(subset=["deviation_day"])
    assert len(dev) > 200 and set(dev["deviation_reason"]) == {"stopped", "switched"}
    assert (dev["deviation_day"] % P.PERIOD_DAYS == 0).all()
    # a stop needs the first supply (30 or 90 days) plus the 60-day gap to run out first
    assert dev.loc[dev["deviation_reason"] == "stopped", "deviation_day"].min() >= 90
    assert dev.loc[dev["deviation_reason"] == "switched", "deviation_day"].min() >= 30


def test_per_protocol_truth(registry):
    truth, _ = registry
    pp = truth["per_protocol"]["hf_admission"]
    itt = truth["time_to_event"]["hf_admission"]
    for est in ("ATE", "ATT"):
        for h in ("365", "730", "1095"):
            # staying on kestrel (lower tone, direct HR 0.9) helps more than starting it
            assert pp[est]["risk_difference"][h] < itt[est]["risk_difference"][h] < 0
            for arm in ("kestrel", "plover"):
                assert 0 < pp[est]["risk"][arm][h] < 1
    # by sex, from the same per-person risks: the direct effect is weaker in men (hazard ratio
    # 1.05 against 0.75 in women), so men's true effects are smaller in size under both contrasts
    for key in ("subgroups", "subgroups_per_protocol"):
        rd = {s: truth[key][f"sex={s}"]["hf_admission"]["ATE"]["risk_difference"]["1095"] for s in "FM"}
        assert rd["F"] < rd["M"] < 0, (key, rd)
    # the negative control is untouched by the tone: its true contrast stays exactly null
    assert all(v == 0 for v in truth["time_to_event"]["lens_opacity"]["ATE"]["risk_difference"].values())
