"""decision.csv (CONTRACTS §5f) against hand computation.

Sources: expected loss as the criterion of a decision (Berger, "Statistical Decision Theory and
Bayesian Analysis", 1985, ch. 1); the number needed to treat as the inverse of the risk reduction
(Laupacis, Sackett & Roberts 1988, N Engl J Med 318:1728); its interval through infinity when the
difference's interval includes no effect, written "NNTB x to ∞ to NNTH y" (Altman 1998, BMJ
317:1309). Every expected value below is a hand computation written beside it.
"""

from __future__ import annotations

import numpy as np
import pytest
from decision_example import PROTOCOL, REPS, ROWS, _row
from two_arm import two_arm_protocol

from emulant.estimation.decision import decision_table, nnt, probability_lowest
from emulant.estimation.intervals import Z_975


def _get(df, measure, arm=None, outcome=None):
    hit = df[(df.measure == measure) & ((df.arm == arm) if arm else True)
             & ((df.outcome == outcome) if outcome else True)]
    assert len(hit) == 1, hit
    return hit.iloc[0]


def test_expected_loss_difference_and_probability_by_hand():
    df = decision_table(ROWS, REPS, PROTOCOL, "wald")
    a = _get(df, "expected_loss", "drug_a")
    b = _get(df, "expected_loss", "drug_b")
    assert a.estimate == pytest.approx(0.10 + 2.5 * 0.05 + 0.01)  # 0.235
    assert b.estimate == pytest.approx(0.15 + 2.5 * 0.04)  # 0.25
    sd_a = np.std([0.235, 0.28, 0.20, 0.245], ddof=1)
    assert a.ci_low == pytest.approx(0.235 - Z_975 * sd_a)
    assert a.ci_high == pytest.approx(0.235 + Z_975 * sd_a)
    d = _get(df, "expected_loss_difference", "drug_a")
    assert d.comparator == "drug_b" and d.estimate == pytest.approx(-0.015)
    sd_d = np.std([0.235 - 0.26, 0.28 - 0.24, 0.20 - 0.275, 0.245 - 0.23], ddof=1)
    assert d.ci_high == pytest.approx(-0.015 + Z_975 * sd_d)
    assert _get(df, "probability_lowest_loss", "drug_a").estimate == pytest.approx(0.5)
    assert _get(df, "probability_lowest_loss", "drug_b").estimate == pytest.approx(0.5)
    assert set(df.estimand) == {"ATE"} and set(df.method) == {"ipw"}


def test_numbers_needed_to_treat_by_hand():
    df = decision_table(ROWS, REPS, PROTOCOL, "percentile")
    ev = _get(df, "number_needed_to_treat", outcome="event")
    # risk reduction 0.05 (0.02 to 0.08): NNTB 20 (12.5 to 50)
    assert (ev.estimate, ev.ci_low, ev.ci_high) == pytest.approx((20, 12.5, 50))
    de = _get(df, "number_needed_to_treat", outcome="death")
    # difference +0.01 (-0.01 to 0.03) crosses 0: NNTH 100; NNTB 100 to ∞ to NNTH 33.3
    assert (de.estimate, de.ci_low, de.ci_high) == pytest.approx((-100, 100, -100 / 3))
    assert de.ci_low > de.ci_high  # the sign of an interval through infinity


def test_nnt_edges():
    assert nnt(0.0, -0.01, 0.01)[0] == np.inf
    assert np.isnan(nnt(float("nan"), None, None)).all()
    # harm on both ends: difference 0.02 to 0.05 -> NNTH 50 to 20, negative, in order
    assert nnt(0.035, 0.02, 0.05)[1:] == pytest.approx((-50, -20))


def test_ties_are_shared_and_incomplete_replicates_left_out():
    p = probability_lowest([np.array([1.0, 2.0, 3.0, np.nan]), np.array([1.0, 1.0, 4.0, 0.0])])
    # replicate 1 ties (half each), 2: second arm, 3: first arm, 4: left out
    assert p == pytest.approx([0.5, 0.5])


def test_no_decision_gives_the_header_only():
    df = decision_table(ROWS, REPS, two_arm_protocol("plain"), "wald")
    assert df.empty and list(df.columns)[:4] == ["contrast", "estimand", "method", "measure"]


def test_a_method_missing_a_risk_is_left_out():
    rows = ROWS + [_row("event", "risk", "drug_a", None, 0.1, method="standardization")]
    reps = np.column_stack([REPS, REPS[:, 0]])
    df = decision_table(rows, reps, PROTOCOL, "wald")
    assert set(df.method) == {"ipw"}
