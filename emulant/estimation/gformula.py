"""The parametric g-formula of the per-protocol contrast, by Monte Carlo (CONTRACTS §5e).

Robins' g-formula (Robins 1986, Math Modelling 7:1393) gives the risk under a sustained
strategy :math:`\\bar g` as a product of the distributions of each time-varying covariate
given the past and of the hazards given the past, with treatment set by the strategy:

.. math::

    \\Pr[Y^{\\bar g}_K = 1] = \\sum_{\\bar l} \\sum_{k} h_k(\\bar l_k, \\bar g)
        \\prod_{j<k} \\bigl(1 - h_j(\\bar l_j, \\bar g)\\bigr)\\bigl(1 - c_j(\\bar l_j, \\bar g)\\bigr)
        \\prod_{j \\le k} f(l_j \\mid \\bar l_{j-1}, \\bar g),

with :math:`h` the outcome's and :math:`c` the competing event's hazard (the total effect under
competing events, Young et al. 2020, Stat Med 39:1199). It holds under sequential
exchangeability given the measured history, positivity of following the strategy, consistency,
and — for the parametric version — correct models (Hernán & Robins, *Causal Inference: What If*,
ch. 21; Taubman et al. 2009, Int J Epidemiol 38:1599; Young et al. 2011, Stat Biosci 3:119).

Here, per period :math:`k` (CONTRACTS §5a) of a person still on protocol, with arm :math:`a`,
baseline covariates :math:`X` (the propensity design) and the time-varying covariates
:math:`L_k` as measured on the period's first day (``periods.parquet``):

* each time-varying covariate :math:`L_{k}` (:math:`k \\ge 1`) given the previous values of all
  time-varying covariates :math:`L_{k-1}`, :math:`a`, :math:`b(k)` and :math:`X` — linear with
  resampled residuals (continuous) or logistic (binary)
  (:mod:`emulant.models.covariate_process`), fitted on the periods a person starts on protocol
  and free of the outcome and of the competing event;
* the daily hazards of the outcome and of the competing event (pooled logistic, each
  person-period a binomial of its days at risk, days :math:`kP+1 .. (k+1)P` as in
  :mod:`emulant.estimation.pooled_logistic`) given :math:`a`, :math:`b(k)`, :math:`a\\,b(k)`,
  :math:`X`, :math:`L_k` and :math:`a L_k`, on the artificially censored person-time (follow-up
  ends at ``deviation_day``);
* for the natural course only: per arm, the probability of deviating in period :math:`k` given
  :math:`b(k)`, :math:`X` and :math:`L_k` (0 in a period in which no one of the arm deviates).

:math:`b(k)` is the period basis of :func:`emulant.models.treatment_process.period_basis`.
The time-varying covariates enter as numbers, as ``periods.parquet`` holds them (a missing value
filled with the median; its ``<name>_missing`` flag is not modelled); a categorical one is an
error. All covariates of period :math:`k` are drawn given the values of period :math:`k-1`.
Under a sustained strategy everyone on protocol in an arm has the same treatment history, so
the arm *is* the treatment history of these models.

**Monte Carlo.** ``analysis.gformula.simulated_persons`` persons are drawn with replacement from
the estimand's population (probability proportional to the target weights of
:func:`emulant.estimation.tte_weighting.target_weights`: everyone for ATE, the treated for ATT,
overlap weights for ATO, times the replicate's frequency weights), from ``analysis.gformula.seed``
and the sample's frequency weights (each bootstrap replicate draws anew, so its intervals hold
the Monte Carlo error); each keeps their :math:`X` and their measured :math:`L_0`. For each arm, with the same draws
(common random numbers), the covariates are simulated period by period with the arm set by the
strategy, and each simulated person's cumulative incidence follows from the hazards given their
simulated history (:func:`emulant.estimation.pooled_logistic.incidence_at`, no event drawn: the
hazards are summed in closed form, which lowers the Monte Carlo error). The risk is the mean.

**Natural course.** The periods hold on-protocol person-time only, so the models describe
follow-up up to deviation. The natural course keeps each drawn person's own arm (persons drawn
from the whole cohort) and draws deviation from the model of the observed treatment process: a
person who deviates in period :math:`k` stops accruing events from that period on. Its risk by
arm is compared with the observed risk of the outcome before deviating (Aalen–Johansen with
deviating and the competing event as competing events): a difference beyond its bootstrap
interval says a model is wrong (Young et al. 2011; Taubman et al. 2009). A deviation on a day
inside a period counts from the period's first day (an approximation of order one period).
"""

from __future__ import annotations

import zlib
from dataclasses import dataclass, field

import numpy as np

from emulant.errors import EmulantError
from emulant.estimation.events import COMPETING
from emulant.estimation.per_protocol import CONTRAST, _long, _row_of, per_protocol_arrays
from emulant.estimation.pooled_logistic import days_at_risk, incidence_at
from emulant.estimation.tte import OutcomeContext, _row, outcome_arrays
from emulant.estimation.tte_weighting import standardized_risks, target_weights
from emulant.models.covariate_process import FittedModel, fit_logistic, fit_value
from emulant.models.treatment_process import PersonPeriods, period_basis

METHOD = "gformula"
NATURAL_COURSE = ("natural_course_risk", "observed_risk", "natural_course_difference")


class GFormulaError(EmulantError, ValueError):
    """The g-formula cannot be computed with these data (e.g. a categorical time-varying
    covariate)."""


def covariate_design(L_prev: np.ndarray, a: np.ndarray, B: np.ndarray, X: np.ndarray) -> np.ndarray:
    """Design of a time-varying covariate's model: previous values, arm, period, baseline."""
    return np.column_stack([L_prev, a, B, X])


def hazard_design(a: np.ndarray, B: np.ndarray, X: np.ndarray, L: np.ndarray) -> np.ndarray:
    """Design of an outcome or competing event hazard: arm, period, arm by period, baseline,
    time-varying covariates, arm by time-varying covariates."""
    a = np.asarray(a, dtype=float)
    return np.column_stack([a, B, a[:, None] * B, X, L, a[:, None] * L])


def deviation_design(B: np.ndarray, X: np.ndarray, L: np.ndarray) -> np.ndarray:
    """Design of deviating in a period (one model per arm): period, baseline, time-varying."""
    return np.column_stack([B, X, L])


@dataclass
class GFormulaModels:
    """The fitted models of one outcome; ``basis`` is :math:`b(k)` for :math:`k = 0..K-1`."""

    kinds: tuple[str, ...]
    covariates: list[FittedModel]
    outcome: FittedModel
    competing: FittedModel | None
    deviation: dict[int, FittedModel | None]  # per arm; None: no one of the arm deviates
    deviation_periods: dict[int, np.ndarray]  # per arm: periods in which someone deviates
    basis: np.ndarray
    problems: list[str] = field(default_factory=list)


def _values(pp: PersonPeriods) -> np.ndarray:
    if pp.values is None:
        raise GFormulaError("time_varying: the g-formula models continuous and binary time-varying "
                            "covariates only; a categorical one has no model here")
    return np.asarray(pp.values, dtype=float)


def _free_rows(pp: PersonPeriods, time: np.ndarray, status: np.ndarray, K: int) -> np.ndarray:
    """Period rows on protocol, before the period holding the outcome's or competing event's day
    (an event on day :math:`kP` belongs to period :math:`k-1` of the daily hazard)."""
    T, s = time[pp.person], status[pp.person]
    return pp.on_protocol & (pp.period < K) & ~((s != 0) & (T <= pp.start_day))


def fit_models(pp: PersonPeriods, a, X, f, time, status, pp_time, pp_status, K: int,
               competing: bool) -> GFormulaModels:
    """Fit every model of the g-formula with frequency weights ``f`` (per person).

    ``time``/``status``: the outcome's intention-to-treat arrays; ``pp_time``/``pp_status``: the
    same artificially censored at ``deviation_day``.
    """
    a, X, f = np.asarray(a, float), np.asarray(X, float).reshape(len(a), -1), np.asarray(f, float)
    V = _values(pp)
    P = pp.period_days
    B = period_basis(np.arange(K), K)
    problems: list[str] = []
    free = _free_rows(pp, np.asarray(time, float), np.asarray(status), K) & (f[pp.person] > 0)
    # time-varying covariates, periods 1..K-1: the previous row is the person's previous period
    rows = np.flatnonzero(free & (pp.period >= 1))
    Zc = covariate_design(V[rows - 1], a[pp.person[rows]], B[pp.period[rows]], X[pp.person[rows]])
    covs = [fit_value(kind, Zc, V[rows, j], f[pp.person[rows]]) for j, kind in enumerate(pp.value_kinds)]
    for j, m in enumerate(covs):
        if not m.converged:
            problems.append(f"g-formula model of time-varying covariate {j + 1} did not converge")
    hazards = {}
    for name in ("outcome", "competing") if competing else ("outcome",):
        days, event = days_at_risk(pp_time, pp_status, name)
        person, k, m, ev = _long(days, event, P, K)
        r = _row_of(pp, np.minimum(k, pp.n_periods - 1), person)
        Z = hazard_design(a[person], B[k], X[person], V[r])
        w = f[person]
        y = np.r_[np.ones(int(ev.sum())), np.zeros(person.size)]
        fw = np.r_[w[ev], w * (m - ev)]
        keep = fw > 0
        model = fit_logistic(np.vstack([Z[ev], Z])[keep], y[keep], fw[keep])
        if not model.converged:
            problems.append(f"g-formula {name} hazard model did not converge")
        hazards[name] = model
    deviation, periods = {}, {}
    for g in (0, 1):
        rows = np.flatnonzero(free & (a[pp.person] == g))
        fr = f[pp.person[rows]]
        dev_k = np.bincount(pp.period[rows], weights=fr * pp.deviates[rows], minlength=K)[:K] > 0
        periods[g] = dev_k
        rows = rows[dev_k[pp.period[rows]]]
        if not rows.size:
            deviation[g] = None
            continue
        Zd = deviation_design(B[pp.period[rows]], X[pp.person[rows]], V[rows])
        deviation[g] = fit_logistic(Zd, pp.deviates[rows].astype(float), f[pp.person[rows]])
        if not deviation[g].converged:
            problems.append(f"g-formula model of deviating (arm {g}) did not converge")
    return GFormulaModels(pp.value_kinds, covs, hazards["outcome"], hazards.get("competing"),
                          deviation, periods, B, problems)


def first_values(pp: PersonPeriods) -> np.ndarray:
    """Each cohort row's time-varying covariates in its period 0 (persons x names)."""
    V = _values(pp)
    out = np.full((int(pp.person.max()) + 1 if pp.person.size else 0, V.shape[1]), np.nan)
    first = pp.first_row
    out[pp.person[first]] = V[first]
    return out


def simulate(models: GFormulaModels, X: np.ndarray, L0: np.ndarray, arm: np.ndarray,
             rng: np.random.Generator, days, period_days: int, natural: bool = False) -> np.ndarray:
    """Each simulated person's cumulative incidence by each of ``days`` (n x len(days)).

    ``arm`` per simulated person (the strategy's, or their own for the natural course). With
    ``natural`` deviation is drawn from its model and ends the person's accrual of events.
    """
    B = models.basis
    K = B.shape[0]
    n = X.shape[0]
    a = np.asarray(arm, dtype=float)
    L = np.array(L0, dtype=float)
    h, hc = np.zeros((n, K)), np.zeros((n, K)) if models.competing is not None else None
    on = np.ones(n, dtype=bool)
    for k in range(K):
        Bk = np.repeat(B[k:k + 1], n, axis=0)
        if k > 0 and models.covariates:
            Z = covariate_design(L, a, Bk, X)
            L = np.column_stack([m.draw(Z, rng) for m in models.covariates])
        if natural:
            u = rng.random(n)
            for g in (0, 1):
                mg = models.deviation[g]
                m = (a == g) & on
                if mg is None or not models.deviation_periods[g][k] or not m.any():
                    continue
                p = mg.mean(deviation_design(Bk[m], X[m], L[m]))
                on[np.flatnonzero(m)[u[m] < p]] = False
        Zh = hazard_design(a, Bk, X, L)
        h[:, k] = np.where(on, models.outcome.mean(Zh), 0.0)
        if hc is not None:
            hc[:, k] = np.where(on, models.competing.mean(Zh), 0.0)
    return incidence_at(h, hc, days, period_days)


def seed_of(seed: int, freq: np.ndarray) -> list[int]:
    """The random stream of one sample: ``analysis.gformula.seed`` and a checksum of the
    sample's frequency weights, so that every bootstrap replicate draws its own simulated
    persons (its interval then holds the Monte Carlo error too) and reruns repeat every draw."""
    return [int(seed), zlib.crc32(np.ascontiguousarray(freq, dtype=float).tobytes())]


def draw_persons(v: np.ndarray, size: int, rng: np.random.Generator) -> np.ndarray:
    """Indices of ``size`` persons drawn with replacement with probability proportional to ``v``."""
    v = np.asarray(v, dtype=float)
    if not v.sum() > 0:
        raise GFormulaError("the estimand's population is empty: no one to simulate")
    return rng.choice(v.size, size=size, p=v / v.sum())


def natural_course_context(sample, outcome: str) -> OutcomeContext:
    """The observed outcome up to deviation: deviating counts as a competing event."""
    time, status = outcome_arrays(sample.cohort, outcome)
    pp_time, pp_status = per_protocol_arrays(sample.cohort, outcome)
    cut = pp_time < time
    return OutcomeContext(sample, outcome, arrays=(pp_time, np.where(cut, COMPETING, status)),
                          contrast=CONTRAST)


def periods_cover(pp: PersonPeriods, time: np.ndarray) -> bool:
    """True when every person's period rows reach the day-period of their last day at risk.

    ``periods.parquet`` ends at the primary outcome's end of follow-up (or deviation): an
    outcome followed past it (another outcome, death as an outcome) has person-time without
    measured covariates, and the g-formula is not computed for it."""
    last = np.zeros(int(pp.person.max()) + 1 if pp.person.size else 0, dtype=int)
    np.maximum.at(last, pp.person, pp.period)
    need = np.ceil(np.asarray(time, dtype=float)[: last.size] / pp.period_days) - 1
    return bool(np.all(need <= last))


def gformula_estimates(sample, pp: PersonPeriods, outcome: str, problems: list[str]
                       ) -> tuple[list[dict], list[dict]]:
    """Rows and curve rows of ``method: gformula`` (per estimand) and of its natural course, for
    one time-to-event outcome whose follow-up the periods cover (:func:`periods_cover`; none
    otherwise); models that did not converge are appended to ``problems``."""
    c = OutcomeContext(sample, outcome, arrays=per_protocol_arrays(sample.cohort, outcome),
                       contrast=CONTRAST)
    if not periods_cover(pp, c.time):
        return [], []
    settings = sample.protocol.analysis.gformula
    time, status = outcome_arrays(sample.cohort, c.outcome)
    K = max(1, -(-int(c.max_days) // c.P))
    models = fit_models(pp, c.a, c.X, c.f, time, status, c.time, c.status, K,
                        c.competing and bool(np.any(c.status == COMPETING)))
    problems += [p for p in models.problems if p not in problems]
    L0 = first_values(pp)
    days = np.concatenate([c.grid, np.asarray(c.horizons, dtype=float)])
    rows, curve_rows = [], []
    n_sim = int(settings.simulated_persons)
    seed = seed_of(settings.seed, c.f)
    for est in c.protocol.estimands:
        idx = draw_persons(target_weights(est, c.a, c.e, c.f), n_sim,
                           np.random.default_rng([*seed, 1]))
        inc = {g: simulate(models, c.X[idx], L0[idx], np.full(n_sim, g),
                           np.random.default_rng([*seed, 2]), days, c.P)
               for g in (0, 1)}
        curves, risk = standardized_risks(inc, np.ones(n_sim), c.grid.size, c.horizons)
        rows += c.contrast_rows(est, METHOD, risk)
        curve_rows += c.curve_rows(est, METHOD, curves)
    rows += natural_course_rows(sample, c, models, L0, days, settings)
    return c.past_the_data(rows), curve_rows


def natural_course_rows(sample, c: OutcomeContext, models: GFormulaModels, L0: np.ndarray,
                        days: np.ndarray, settings) -> list[dict]:
    """Per arm and horizon: the natural course's risk, the observed risk up to deviation, and
    their difference (``estimand`` empty: the natural course is the cohort as observed)."""
    n_sim = int(settings.simulated_persons)
    seed = seed_of(settings.seed, c.f)
    idx = draw_persons(c.f, n_sim, np.random.default_rng([*seed, 3]))
    a = c.a[idx]
    inc = simulate(models, c.X[idx], L0[idx], a, np.random.default_rng([*seed, 4]), days,
                   c.P, natural=True)
    obs = natural_course_context(sample, c.outcome)
    _, observed = obs.aj_curves(obs.f)
    rows = []
    for h_i, h in enumerate(c.horizons):
        for g in (1, 0):
            sim = float(inc[a == g, c.grid.size + h_i].mean()) if (a == g).any() else float("nan")
            for measure, value in zip(NATURAL_COURSE, (sim, observed[g][h], sim - observed[g][h]),
                                      strict=True):
                rows.append(_row(c.outcome, None, METHOD, measure, h, c.arms[g], None, value,
                                 obs.n[g], obs.events[g, h], contrast=CONTRAST))
    return rows
