"""A hand-computed decision example (invented numbers): two arms, an event and all-cause death
at one horizon; the expected values are written beside the rows in tests/estimation/test_decision.py."""

from __future__ import annotations

import numpy as np
from two_arm import two_arm_protocol

H = 365
PROTOCOL = two_arm_protocol(
    "decide", outcomes={"primary": "event", "competing": ["death"]},
    decision={"horizon_day": H, "loss": {"event": 1.0, "death": 2.5},
              "strategy_loss": {"drug_a": 0.01}})


def _row(outcome, measure, arm, comparator, estimate, lo=None, hi=None, method="ipw"):
    return {"outcome": outcome, "contrast": "intention_to_treat", "estimand": "ATE",
            "method": method, "measure": measure, "horizon_day": H, "arm": arm,
            "comparator": comparator, "estimate": estimate, "ci_low": lo, "ci_high": hi}


ROWS = [
    _row("event", "risk", "drug_a", None, 0.10),
    _row("event", "risk", "drug_b", None, 0.15),
    _row("event", "risk_difference", "drug_a", "drug_b", -0.05, -0.08, -0.02),
    _row("death", "risk", "drug_a", None, 0.05),
    _row("death", "risk", "drug_b", None, 0.04),
    _row("death", "risk_difference", "drug_a", "drug_b", 0.01, -0.01, 0.03),
]
# four replicates of the six rows (the differences' replicates are not used)
REPS = np.array([
    [0.10, 0.16, 0, 0.05, 0.04, 0],  # A: .10+.125+.01=.235  B: .16+.10=.26   A lowest
    [0.12, 0.14, 0, 0.06, 0.04, 0],  # A: .12+.15+.01=.28    B: .14+.10=.24   B lowest
    [0.09, 0.15, 0, 0.04, 0.05, 0],  # A: .09+.10+.01=.20    B: .15+.125=.275 A lowest
    [0.11, 0.13, 0, 0.05, 0.04, 0],  # A: .11+.125+.01=.245  B: .13+.10=.23   B lowest
])
