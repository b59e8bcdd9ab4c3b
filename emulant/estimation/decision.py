r"""The decision summary (CONTRACTS §5f): expected loss per strategy, the probability that each
strategy has the lowest expected loss, and numbers needed to treat.

Statistical decision theory's rule (Berger, *Statistical Decision Theory and Bayesian Analysis*,
1985, ch. 1): describe each strategy by what would happen under it, weigh the outcomes by a stated
loss, prefer the strategy with the smaller expected loss. For arm :math:`a`, estimand and method,

.. math:: L_a = \sum_o \ell_o \, \hat F_{o,a}(h) + s_a

with :math:`\ell_o` the loss per event of outcome :math:`o` (``decision.loss``),
:math:`\hat F_{o,a}(h)` its estimated risk at the decision horizon under strategy :math:`a` (the
``risk`` rows of ``estimates.csv``: each outcome's first event by the horizon, death competing for
every outcome but all-cause death itself) and :math:`s_a` the loss of following the strategy
(``decision.strategy_loss``). The same sum over each bootstrap replicate's risks gives the
interval (as the protocol's interval rule) and the share of replicates in which each arm has the
lowest expected loss (ties shared equally); under the Bayesian bootstrap that share is a posterior
probability under a non-informative prior (Rubin 1981).

Number needed to treat (Laupacis, Sackett & Roberts 1988, N Engl J Med 318:1728):
:math:`1 / (\hat F_{o,c} - \hat F_{o,a})` for arm :math:`a` against comparator :math:`c`,
positive for benefit (NNTB) and negative for harm (NNTH). Its interval inverts the interval of the
risk difference :math:`d = \hat F_{o,a} - \hat F_{o,c}`: ``ci_low`` :math:`= -1/d_{low}`,
``ci_high`` :math:`= -1/d_{high}`. When the difference's interval includes 0 the interval of the
NNT runs through infinity (Altman 1998, BMJ 317:1309: "NNTB ``ci_low`` to ∞ to NNTH
``|ci_high|``"); it is then recognised by ``ci_low > ci_high``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from emulant.estimation.intervals import bootstrap_intervals
from emulant.protocol import Protocol

DECISION_COLUMNS = ("contrast", "estimand", "method", "measure", "arm", "comparator", "outcome",
                    "estimate", "ci_low", "ci_high")


def _key(r: dict) -> tuple:
    return (r.get("contrast"), r.get("estimand"), r.get("method"))


def _risk_index(rows: list[dict], horizon: int) -> dict[tuple, int]:
    """``(contrast, estimand, method, outcome, arm) -> row`` of the risks at the horizon."""
    out = {}
    for i, r in enumerate(rows):
        if r.get("measure") == "risk" and r.get("horizon_day") == horizon:
            out[(*_key(r), r["outcome"], r["arm"])] = i
    return out


def expected_losses(point: np.ndarray, reps: np.ndarray, rows: list[dict],
                    protocol: Protocol) -> dict[tuple, tuple[float, np.ndarray]]:
    """Per ``(contrast, estimand, method)`` and arm: the expected loss and its replicates.

    A combination lacking the risk of some loss outcome in some arm is left out.
    """
    d = protocol.decision
    loss = dict(d.loss)
    strategy = dict(d.strategy_loss)
    idx = _risk_index(rows, d.horizon_day)
    arms = protocol.strategies.arm_names
    out: dict[tuple, tuple[float, np.ndarray]] = {}
    for combo in dict.fromkeys(k[:3] for k in idx):
        cols = {(o, a): idx.get((*combo, o, a)) for o in loss for a in arms}
        if any(i is None for i in cols.values()):
            continue
        for a in arms:
            est = strategy.get(a, 0.0) + sum(w * point[cols[(o, a)]] for o, w in loss.items())
            rep = strategy.get(a, 0.0) + sum(w * reps[:, cols[(o, a)]] for o, w in loss.items())
            out[(*combo, a)] = (float(est), np.asarray(rep, dtype=float).reshape(-1))
    return out


def probability_lowest(reps_by_arm: list[np.ndarray]) -> np.ndarray:
    """Share of replicates in which each arm has the lowest expected loss (ties shared equally;
    replicates with a missing loss left out); NaN when no replicate is complete."""
    m = np.column_stack(reps_by_arm) if reps_by_arm else np.empty((0, 0))
    m = m[np.all(np.isfinite(m), axis=1)] if m.size else m
    if m.shape[0] == 0:
        return np.full(len(reps_by_arm), np.nan)
    low = m == m.min(axis=1, keepdims=True)
    return (low / low.sum(axis=1, keepdims=True)).mean(axis=0)


def nnt(diff: float, lo: float, hi: float) -> tuple[float, float, float]:
    """Number needed to treat from a risk difference (arm minus comparator) and its interval."""
    def inv(x: float) -> float:
        if x is None or not np.isfinite(x):
            return float("nan")
        return float("inf") if x == 0 else -1.0 / x

    return inv(diff), inv(lo), inv(hi)


def decision_table(rows: list[dict], row_reps: np.ndarray, protocol: Protocol,
                   interval: str) -> pd.DataFrame:
    """``decision.csv``: ``rows`` are estimates.csv rows with their intervals, ``row_reps`` the
    bootstrap replicates aligned with them (replicates x rows)."""
    if protocol.decision is None:
        return pd.DataFrame(columns=list(DECISION_COLUMNS))
    reps = np.asarray(row_reps, dtype=float).reshape(-1, len(rows))
    whole = [i for i, r in enumerate(rows) if not r.get("subgroup")]  # the whole cohort's rows
    rows, reps = [rows[i] for i in whole], reps[:, whole]
    point = np.array([np.nan if r.get("estimate") is None else float(r["estimate"]) for r in rows])
    losses = expected_losses(point, reps, rows, protocol)
    arms = protocol.strategies.arm_names
    treated, comparator = protocol.strategies.treated, protocol.strategies.comparator
    out: list[dict] = []

    def add(combo, measure, arm, comp, outcome, est, lo, hi):
        out.append(dict(zip(DECISION_COLUMNS, (*combo, measure, arm, comp, outcome, est, lo, hi),
                            strict=True)))

    for combo in dict.fromkeys(k[:3] for k in losses):
        per_arm = [losses[(*combo, a)] for a in arms]
        ests = np.array([e for e, _ in per_arm])
        mat = np.column_stack([r for _, r in per_arm])
        _, lo, hi = bootstrap_intervals(ests, mat, np.zeros(len(arms), bool), interval)
        for k, a in enumerate(arms):
            add(combo, "expected_loss", a, None, None, ests[k], lo[k], hi[k])
        t, c = arms.index(treated), arms.index(comparator)
        diff = mat[:, t] - mat[:, c]
        _, dlo, dhi = bootstrap_intervals(np.array([ests[t] - ests[c]]), diff[:, None],
                                          np.zeros(1, bool), interval)
        add(combo, "expected_loss_difference", treated, comparator, None, ests[t] - ests[c],
            dlo[0], dhi[0])
        for k, a in enumerate(arms):
            add(combo, "probability_lowest_loss", a, None, None,
                probability_lowest([mat[:, j] for j in range(len(arms))])[k], None, None)
        for o in dict(protocol.decision.loss):
            hit = [r for r in rows if _key(r) == combo and r.get("outcome") == o
                   and r.get("measure") == "risk_difference"
                   and r.get("horizon_day") == protocol.decision.horizon_day
                   and r.get("arm") == treated and r.get("comparator") == comparator]
            if hit:
                r = hit[0]
                add(combo, "number_needed_to_treat", treated, comparator, o,
                    *nnt(r["estimate"], r.get("ci_low"), r.get("ci_high")))
    return pd.DataFrame(out, columns=list(DECISION_COLUMNS))
