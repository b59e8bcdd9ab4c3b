"""The treatment process over time: models of staying on protocol and the weights they give.

Per protocol (CONTRACTS §5b, §5e), a person's follow-up is artificially censored on the day they
deviate from their arm's strategy. When deviating depends on how the person is doing, the
persons who stay are not like those who left; inverse probability weighting rebuilds the
population that would have stayed had everyone followed the strategy (Robins, Hernán & Brumback
2000, Epidemiology 11:550; Hernán & Robins, *Causal Inference: What If*, ch. 12 and 21).

Person-periods (``periods.parquet``, CONTRACTS §5g): period :math:`k` holds days
:math:`kP .. (k+1)P - 1`; a time-varying covariate :math:`L_k` is measured on its first day. In
each arm, two pooled logistic models of staying on protocol through period :math:`k` are fitted
on the periods a person starts on protocol:

.. math::

    \\text{denominator: } \\operatorname{logit} P(S_k = 1 \\mid \\bar S_{k-1} = 1, X, L_k)
        = \\alpha_0 + b(k)^\\top \\alpha + X^\\top \\beta + L_k^\\top \\gamma, \\qquad
    \\text{numerator: the same without } L_k \\text{ (and without } X
    \\text{ for marginal estimates)},

with :math:`b(k)` a restricted cubic spline of the period (indicators when there are few
periods). The weight of a person's period :math:`k` is the stabilised inverse probability of
staying on protocol through it, times the estimand's baseline weight :math:`w_0`:

.. math::

    W_k = w_0 \\prod_{j \\le k} \\frac{\\hat P(S_j = 1 \\mid X)}{\\hat P(S_j = 1 \\mid X, L_j)} .

A numerator holding :math:`X` keeps :math:`X` as a cause of deviating in the weighted
population, so it is valid only for estimates that condition on :math:`X` (standardization);
the marginal weighted Aalen–Johansen risks use the numerator :math:`\\hat P(S_j = 1)` of the
period alone (Hernán, Brumback & Robins 2000, Epidemiology 11:561). Checked in the tests: with
:math:`X` in the numerator the marginal risk is biased on a simulation with a known truth.

The product runs through period :math:`k` itself because staying in period :math:`k` is decided
after :math:`L_k` is measured and before the period's outcomes, as treatment at time :math:`k`
follows :math:`L_k` in Hernán & Robins, Table 21.1 (a weight through period :math:`k - 1` alone
leaves the period's deviations, which depend on :math:`L_k`, uncorrected). A person who deviates
on a day inside period :math:`k` keeps that weight for the period's days before the deviation
(an approximation of order one period).

A period in which no one of an arm deviates (frequency-weighted) is one where staying is certain
in these data (a supply that cannot yet have run out): no model is fitted to it and its
probability is 1, never a fitted probability of a certain event. ``analysis.weights.truncate``
winsorises :math:`W_k` at quantiles over every person-period on protocol (Cole & Hernán 2008,
Am J Epidemiol 168:656).
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from emulant.columns import DEVIATION_DAY
from emulant.errors import EmulantError
from emulant.models.design import build_design, rcs_basis
from emulant.models.propensity import PropensityModel, PropensityWarning
from emulant.models.weights import weighted_quantile

PERSON_ID, PERIOD, START_DAY = "person_id", "period", "start_day"
KNOTS = (0.05, 0.275, 0.5, 0.725, 0.95)  # of the period indices 0..K-1 (Harrell 2015, §2.4.5)


class TreatmentProcessError(EmulantError, ValueError):
    """periods.parquet does not fit the cohort (a person, period or column missing)."""


@dataclass(frozen=True)
class PersonPeriods:
    """``periods.parquet`` as arrays aligned with the cohort's rows, built once for every replicate.

    Rows are sorted by person (the cohort's row order) and period.
    """

    person: np.ndarray  # index of the row's person in the cohort
    period: np.ndarray  # k
    start_day: np.ndarray  # first day of the period (k * P)
    L: np.ndarray  # design of the time-varying covariates (rows x q), measured on start_day
    L_columns: tuple[str, ...]
    on_protocol: np.ndarray  # bool: the person starts the period on protocol
    deviates: np.ndarray  # bool: the person's deviation day falls in this period
    n_periods: int
    period_days: int
    values: np.ndarray | None = None  # the time-varying covariates as measured (rows x names), or None
    value_kinds: tuple[str, ...] = ()  # their kinds (continuous | binary), in the protocol's order
    source_row: np.ndarray | None = None  # the row of the periods table each row comes from

    @property
    def first_row(self) -> np.ndarray:
        """Per row: True for a person's first period row."""
        return np.r_[True, self.person[1:] != self.person[:-1]]


def person_periods(cohort: pd.DataFrame, periods: pd.DataFrame, period_days: int,
                   time_varying: Sequence = (), kinds: Mapping[str, str] | None = None,
                   continuous: str = "spline") -> PersonPeriods:
    """Align ``periods.parquet`` with the cohort and learn the time-varying design once.

    ``deviation_day`` (cohort, empty: no deviation) decides which periods a person starts on
    protocol (``start_day <= deviation_day``) and in which one they deviate.
    """
    for col in (PERSON_ID, PERIOD, START_DAY):
        if col not in periods.columns:
            raise TreatmentProcessError(f"periods.parquet: column '{col}' is missing")
    if DEVIATION_DAY not in cohort.columns:
        raise TreatmentProcessError(f"cohort.parquet: column '{DEVIATION_DAY}' is missing "
                                    "(per-protocol estimates need the deviation days)")
    keys = unit_keys(cohort, periods)
    index = pd.MultiIndex.from_frame(cohort[keys]) if len(keys) > 1 else pd.Index(cohort[PERSON_ID])
    if not index.is_unique:
        raise TreatmentProcessError(f"cohort.parquet: {' and '.join(keys)} do not identify a row "
                                    "(one row per person, or per person and arm, aligns periods.parquet)")
    pos = index.get_indexer(pd.MultiIndex.from_frame(periods[keys]) if len(keys) > 1 else periods[PERSON_ID])
    if (pos < 0).any():
        i = int(np.flatnonzero(pos < 0)[0])
        unit = " and ".join(f"{k} {periods[k].iloc[i]}" for k in keys)
        raise TreatmentProcessError(f"periods.parquet: row {i}: {unit} is not in cohort.parquet")
    period = periods[PERIOD].to_numpy(dtype=np.int64)
    order = np.lexsort((period, pos))
    pos, period = pos[order], period[order]
    frame = periods.iloc[order].reset_index(drop=True)
    start = frame[START_DAY].to_numpy(dtype=float)
    if (np.diff(period)[pos[1:] == pos[:-1]] != 1).any() or (period[np.r_[True, pos[1:] != pos[:-1]]] != 0).any():
        raise TreatmentProcessError("periods.parquet: each person's periods must run 0, 1, 2, ... "
                                    "without gaps or repeats")
    dev = pd.to_numeric(cohort[DEVIATION_DAY], errors="coerce").to_numpy(dtype=float)[pos]
    on = np.isnan(dev) | (start <= dev)
    deviates = ~np.isnan(dev) & (start <= dev) & (dev < start + period_days)
    names = tuple(getattr(c, "name", c) for c in time_varying)
    if names:
        design = build_design(frame, time_varying, dict(kinds or {}), continuous)
        L, L_cols = design.transform(frame), design.columns
    else:
        L, L_cols = np.empty((len(frame), 0)), ()
    K = int(period.max()) + 1 if period.size else 0
    vkinds = tuple((kinds or {}).get(n, "continuous") for n in names)
    values = None  # numbers only: a categorical time-varying covariate has no values here
    if "categorical" not in vkinds:
        values = frame[list(names)].apply(pd.to_numeric, errors="coerce").to_numpy(dtype=float)
    return PersonPeriods(pos, period, start, L, tuple(L_cols), on, deviates, K, period_days,
                         values, vkinds, order)


def unit_keys(cohort: pd.DataFrame, periods: pd.DataFrame) -> list[str]:
    """The columns that identify a cohort row: ``person_id``, or with the design clone (one row
    per person and arm) ``person_id`` and ``arm``."""
    if cohort[PERSON_ID].is_unique or "arm" not in periods.columns:
        return [PERSON_ID]
    return [PERSON_ID, "arm"]


def period_basis(period: np.ndarray, n_periods: int) -> np.ndarray:
    """:math:`b(k)` without a constant: :math:`k` and a restricted cubic spline (knots at the 5,
    27.5, 50, 72.5 and 95% quantiles of :math:`0..K-1`, so every replicate has the same basis),
    or one indicator per period after the first when :math:`K \\le 6`."""
    k = np.asarray(period, dtype=float)
    if n_periods <= len(KNOTS) + 1:
        return (k[:, None] == np.arange(1, max(n_periods, 1))[None, :]).astype(float)
    knots = np.quantile(np.arange(n_periods, dtype=float), KNOTS)
    return np.column_stack([k, rcs_basis(k, knots)])


def _fit_stay(Z: np.ndarray, stay: np.ndarray, f: np.ndarray, what: str) -> tuple[np.ndarray, bool]:
    """Fitted probability of staying from one pooled logistic model (frequency weights ``f``)."""
    with warnings.catch_warnings():
        # separation (a period or covariate pattern in which no one deviates) is met by the
        # model's ridge refit (see PropensityModel); only a fit that does not converge fails
        warnings.simplefilter("ignore", PropensityWarning)
        model = PropensityModel().fit(Z, stay, sample_weight=f)
    return np.asarray(model.predict(Z), dtype=float), bool(model.converged_)


def _varying(Z: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Columns of ``Z`` that vary over ``rows`` (a model of one period has no period terms)."""
    if Z.shape[1] == 0 or not rows.any():
        return Z[rows]
    sub = Z[rows]
    return sub[:, np.ptp(sub, axis=0) > 0]


def staying_probabilities(pp: PersonPeriods, a: np.ndarray, X: np.ndarray, freq: np.ndarray,
                          process: np.ndarray | None = None, stay: np.ndarray | None = None,
                          carry: np.ndarray | None = None,
                          ) -> tuple[dict[str, np.ndarray], list[str]]:
    """Per period row, the probability of staying on protocol from each model of the arm:
    ``den`` (period, baseline, time-varying), ``num`` (period, baseline) and ``num_period``
    (period alone).

    ``process`` (default: one process for every row on protocol) labels the rows each model is
    fitted on, per arm: 0 for rows whose staying is not modelled (probability 1), and one pooled
    model per further label; ``stay`` (default: not deviating in the period) is what the model
    predicts. The clone design (:mod:`emulant.models.clone_weights`) uses separate processes for
    starting early, starting in the window's last period and sustaining after the start;
``carry`` (per row: -1 keeps the row's probabilities;
    ``j >= 0`` moves them to the later row ``j`` of the same person, multiplied into its own;
    -2 drops them) places the probability of a decision on the period where its consequence
    falls (the clone design: starting by the window's last day keeps the clone from the next
    period on).

    Rows not on protocol, rows of persons with frequency 0, and periods in which no one of the
    arm's process deviates get probability 1, as does a process in which no one stays (nothing
    on protocol is left to weight). Returns ``(probabilities, problems)``; ``problems`` names
    each model that did not converge.
    """
    a_r = np.asarray(a)[pp.person]
    f_r = np.asarray(freq, dtype=float)[pp.person]
    proc = pp.on_protocol.astype(int) if process is None else np.asarray(process, dtype=int)
    y = (1.0 - pp.deviates) if stay is None else np.asarray(stay, dtype=float)
    out = {name: np.ones(pp.person.size) for name in ("den", "num", "num_period")}
    problems: list[str] = []
    B = period_basis(pp.period, pp.n_periods)
    for g in (1, 0):
        for label in sorted(set(np.unique(proc)) - {0}):
            fit = pp.on_protocol & (a_r == g) & (f_r > 0) & (proc == label)
            dev_k = np.bincount(pp.period[fit], weights=f_r[fit] * (1.0 - y[fit]),
                                minlength=pp.n_periods)
            fit &= dev_k[pp.period] > 0
            if not fit.any() or not np.any(y[fit] * f_r[fit] > 0):
                continue
            base = np.column_stack([B, X[pp.person]])
            for name, Z in (("num_period", _varying(B, fit)), ("num", _varying(base, fit)),
                            ("den", _varying(np.column_stack([base, pp.L]), fit))):
                if Z.shape[1] == 0:  # one period, nothing else: the arm's weighted share staying
                    p, ok = np.full(int(fit.sum()), np.average(y[fit], weights=f_r[fit])), True
                else:
                    p, ok = _fit_stay(Z, y[fit], f_r[fit], name)
                out[name][fit] = p
                if not ok:
                    problems.append(f"treatment-process model '{name}' (arm "
                                    f"{'treated' if g else 'comparator'}) did not converge")
    if carry is not None:
        carry = np.asarray(carry)
        src = np.flatnonzero(carry >= 0)
        dst = carry[src]
        for v in out.values():
            moved = v[src].copy()
            v[carry != -1] = 1.0
            v[dst] *= moved
    return out, problems


def cumulative_through(pp: PersonPeriods, ratio: np.ndarray) -> np.ndarray:
    """:math:`\\prod_{j \\le k} r_j` within each person."""
    logr = np.log(np.asarray(ratio, dtype=float))
    cs = np.cumsum(logr)  # sum over the rows so far of the whole table
    first = np.flatnonzero(pp.first_row)
    owner = np.cumsum(pp.first_row) - 1
    return np.exp(cs - (cs - logr)[first][owner])


@dataclass(frozen=True)
class AdherenceWeights:
    """Per period row and estimand (freq NOT multiplied in): ``weights``, stabilised by the
    period alone, for the marginal (weighted Aalen–Johansen) estimates; ``conditional``,
    stabilised by period and baseline covariates, for models that condition on the baseline
    covariates (standardization); and the fits' problems."""

    weights: Mapping[str, np.ndarray]
    conditional: Mapping[str, np.ndarray]
    problems: tuple[str, ...]


def _truncated(w: np.ndarray, pp: PersonPeriods, f_r: np.ndarray, truncate) -> np.ndarray:
    use = pp.on_protocol & (f_r > 0)
    lo, hi = weighted_quantile(w[use], np.asarray(truncate, dtype=float), f_r[use])
    return np.clip(w, lo, hi)


def adherence_weights(pp: PersonPeriods, a: np.ndarray, X: np.ndarray, freq: np.ndarray,
                      baseline: Mapping[str, np.ndarray],
                      truncate: tuple[float, float] | None = None,
                      stabilize: bool = True, process: np.ndarray | None = None,
                      stay: np.ndarray | None = None, carry: np.ndarray | None = None) -> AdherenceWeights:
    """The weights over time of every estimand (see the module's formula).

    ``baseline`` maps each estimand to its per-person baseline weight (the propensity weights
    of :func:`emulant.models.weights.estimand_weights`). ``stabilize=False`` drops the numerator.
    A numerator that holds baseline covariates is valid only for an analysis that conditions on
    them (Hernán, Brumback & Robins 2000, Epidemiology 11:561; What If, §12.6): hence two sets,
    see :class:`AdherenceWeights`. Truncation is applied to rows on protocol, at
    frequency-weighted quantiles over them; never to ATO, whose baseline weights are bounded.
    ``process``, ``stay`` and ``carry``: see :func:`staying_probabilities`.
    """
    prob, problems = staying_probabilities(pp, a, X, freq, process, stay, carry)
    den = np.clip(prob["den"], 1e-12, None)
    f_r = np.asarray(freq, dtype=float)[pp.person]
    sets: dict[str, dict[str, np.ndarray]] = {"num_period": {}, "num": {}}
    for num_name, out in sets.items():
        adh = cumulative_through(pp, (prob[num_name] if stabilize else 1.0) / den)
        for est, w0 in baseline.items():
            w = np.asarray(w0, dtype=float)[pp.person] * adh
            out[est] = w if truncate is None or est == "ATO" else _truncated(w, pp, f_r, truncate)
    return AdherenceWeights(sets["num_period"], sets["num"], tuple(problems))


def weight_summary(pp: PersonPeriods, a: np.ndarray, arms: Mapping[int, str],
                   weights: Mapping[str, np.ndarray]) -> pd.DataFrame:
    """Per estimand, arm and period: persons under follow-up, on protocol, deviating, and the
    weights on protocol (mean, 1st and 99th percentiles, maximum)."""
    rows = []
    a_r = np.asarray(a)[pp.person]
    for est, w in weights.items():
        for g in (1, 0):
            for k in range(pp.n_periods):
                m = (a_r == g) & (pp.period == k)
                on = m & pp.on_protocol
                wk = w[on]
                q = np.quantile(wk, [0.01, 0.99]) if wk.size else (np.nan, np.nan)
                rows.append({"estimand": est, "arm": arms[g], "period": k,
                             "start_day": k * pp.period_days, "persons": int(m.sum()),
                             "on_protocol": int(on.sum()), "deviating": int((on & pp.deviates).sum()),
                             "weight_mean": float(wk.mean()) if wk.size else np.nan,
                             "weight_p01": float(q[0]), "weight_p99": float(q[1]),
                             "weight_max": float(wk.max()) if wk.size else np.nan})
    return pd.DataFrame(rows)
