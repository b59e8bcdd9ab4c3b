"""Weights over time (emulant.models.treatment_process) against a published sequentially
randomised example and hand computations."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from emulant.models.treatment_process import (
    TreatmentProcessError,
    adherence_weights,
    cumulative_through,
    person_periods,
    weight_summary,
)
from emulant.models.weights import estimand_weights

P = 30

# Hernán & Robins, "Causal Inference: What If" (2020), Table 21.1: a sequentially randomised
# trial with treatment A0, a covariate L1 affected by A0, treatment A1 depending on L1, and mean
# outcome Y. Figures from memory: (A0, L1, A1, N, mean Y). The book's answer: E[Y^{a0=1,a1=1}] =
# E[Y^{a0=0,a1=0}] = 60 by IPW and by the g-formula (no effect), while the naive comparison of
# the persons who followed each strategy is not 0.
TABLE_21_1 = [(0, 0, 0, 2400, 84), (0, 0, 1, 1600, 84), (0, 1, 0, 2400, 52), (0, 1, 1, 9600, 52),
              (1, 0, 0, 4800, 76), (1, 0, 1, 3200, 76), (1, 1, 0, 1600, 44), (1, 1, 1, 6400, 44)]


def table_21_1():
    """The table as a per-protocol problem: arm = A0 in period 0; L1 measured on the first day
    of period 1, when A1 is taken (A1 != A0 is a deviation); Y follows, in period 2."""
    t = pd.DataFrame(TABLE_21_1, columns=["a0", "l1", "a1", "n", "y"])
    t["person_id"] = np.arange(len(t))
    t["deviation_day"] = np.where(t.a1 != t.a0, float(P), np.nan)
    periods = pd.DataFrame({"person_id": np.repeat(t.person_id, 3), "period": np.tile([0, 1, 2], 8)})
    periods["start_day"] = periods.period * P
    periods["l_now"] = np.where(periods.period >= 1, np.repeat(t.l1.to_numpy(), 3), 0)
    pp = person_periods(t, periods, P, time_varying=["l_now"], kinds={"l_now": "binary"})
    return t, pp


@pytest.mark.parametrize("stabilize", [True, False])
def test_table_21_1_ipw_gives_60_for_both_sustained_strategies(stabilize):
    t, pp = table_21_1()
    a, f = t.a0.to_numpy(float), t.n.to_numpy(float)
    # A0 is randomised with probability 1/2: the baseline (ATE) weight is 1 stabilised, 2 not
    w0 = estimand_weights(a, np.full(8, 0.5), "ATE", stabilize=stabilize, sample_weight=f)
    aw = adherence_weights(pp, a, np.empty((8, 0)), f, {"ATE": w0}, stabilize=stabilize)
    assert aw.problems == ()
    last = (pp.period == 2) & pp.on_protocol
    w, person = aw.weights["ATE"][last], pp.person[last]
    for g in (1, 0):
        m = a[person] == g
        ipw = np.average(t.y.to_numpy()[person[m]], weights=(f[person] * w)[m])
        naive = np.average(t.y.to_numpy()[person[m]], weights=f[person][m])
        assert ipw == pytest.approx(60.0, abs=1e-6)
        assert abs(naive - 60.0) > 5  # 54.7 always treated, 68 never treated
    # hand computation, always treated: P(A1=1 | A0=1) = 0.6, P(A1=1 | A0=1, L1) = 0.4, 0.8
    row = {(int(t.l1[p]), int(t.a0[p])): w for p, w in zip(person, w, strict=True)}
    scale = 1.0 if stabilize else 2.0 / 0.6
    assert row[(0, 1)] == pytest.approx(scale * 0.6 / 0.4)
    assert row[(1, 1)] == pytest.approx(scale * 0.6 / 0.8)


def test_cumulative_through_is_a_product_over_earlier_periods_of_each_person():
    cohort = pd.DataFrame({"person_id": ["b", "a"], "deviation_day": [np.nan, np.nan]})
    periods = pd.DataFrame({"person_id": ["a", "b", "a", "b", "b"], "period": [1, 0, 0, 2, 1]})
    periods["start_day"] = periods.period * P
    pp = person_periods(cohort, periods, P)
    # sorted by the cohort's rows: b0, b1, b2, a0, a1
    np.testing.assert_array_equal(pp.person, [0, 0, 0, 1, 1])
    np.testing.assert_array_equal(pp.period, [0, 1, 2, 0, 1])
    got = cumulative_through(pp, np.array([2.0, 3.0, 5.0, 7.0, 11.0]))
    np.testing.assert_allclose(got, [2, 6, 30, 7, 77])


def test_deviation_marks_the_period_holding_the_day_and_ends_on_protocol():
    cohort = pd.DataFrame({"person_id": [1, 2], "deviation_day": [59.0, 60.0]})
    periods = pd.DataFrame({"person_id": [1] * 3 + [2] * 3, "period": [0, 1, 2] * 2})
    periods["start_day"] = periods.period * P
    pp = person_periods(cohort, periods, P)
    np.testing.assert_array_equal(pp.deviates, [0, 1, 0, 0, 0, 1])
    np.testing.assert_array_equal(pp.on_protocol, [1, 1, 0, 1, 1, 1])


def test_truncation_winsorises_weights_on_protocol_and_summary_counts():
    t, pp = table_21_1()
    a, f = t.a0.to_numpy(float), t.n.to_numpy(float)
    w0 = np.ones(8)
    full = adherence_weights(pp, a, np.empty((8, 0)), f, {"ATE": w0})
    cut = adherence_weights(pp, a, np.empty((8, 0)), f, {"ATE": w0}, truncate=(0.3, 0.7))
    on = pp.on_protocol
    # reference: numpy's quantiles of the person-periods on protocol, each repeated N times
    repeated = np.repeat(full.weights["ATE"][on], f[pp.person][on].astype(int))
    lo, hi = np.quantile(repeated, [0.3, 0.7])
    assert lo > repeated.min() or hi < repeated.max()  # the truncation bites
    np.testing.assert_allclose(cut.weights["ATE"][on], np.clip(full.weights["ATE"][on], lo, hi))
    s = weight_summary(pp, a, {1: "treated", 0: "comparator"}, full.weights)
    row = s[(s.arm == "treated") & (s.period == 1)].iloc[0]
    assert (row.persons, row.on_protocol, row.deviating) == (4, 4, 2)


def test_periods_of_an_unknown_person_are_an_error_naming_the_row():
    cohort = pd.DataFrame({"person_id": [1], "deviation_day": [np.nan]})
    periods = pd.DataFrame({"person_id": [1, 9], "period": [0, 0], "start_day": [0, 0]})
    with pytest.raises(TreatmentProcessError, match="row 1: person_id 9"):
        person_periods(cohort, periods, P)
    gap = pd.DataFrame({"person_id": [1, 1], "period": [0, 2], "start_day": [0, 60]})
    with pytest.raises(TreatmentProcessError, match="without gaps"):
        person_periods(cohort, gap, P)
