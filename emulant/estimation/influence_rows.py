"""Influence-function standard errors of the point estimate's rows (``analysis.variance: influence``).

Which rows get one (:func:`covered`), for the whole cohort's intention-to-treat rows:

* measured outcomes: the means and mean differences of ``unadjusted``, ``ipw`` and
  ``doubly_robust`` (every estimand), with the propensity model, the measurement model
  (``missing: censor``) and the outcome regressions estimated;
* time-to-event outcomes: the risks, risk differences and risk ratios (log scale) at each
  horizon and the risk curves of ``unadjusted`` and ``ipw`` (the weighted Aalen–Johansen
  estimate, with the propensity estimated), and the unadjusted crude rates.

``ipw`` rows with truncated weights (``analysis.weights.truncate``, not ATO) and time-to-event
``ipw`` rows with ``analysis.censoring_weights`` keep the bootstrap, as do ``standardization``,
time-to-event ``doubly_robust``, hazard ratios, per-protocol rows, subgroup rows and the
decision summary. :func:`bootstrap_needed` says from the protocol alone whether any row needs
the replicates (the workflow runs none when no row does).
"""

from __future__ import annotations

import logging

import numpy as np

from emulant import columns
from emulant.estimation.influence import (
    InfluenceUnavailable,
    Nuisance,
    aj_influence,
    dlog_weight,
    logistic_nuisance,
    mean_influence,
    rate_influence,
    regression_nuisance,
    se_of,
    standard_design,
)
from emulant.estimation.intervals import RATIO_MEASURES, Z_975
from emulant.estimation.sample import AnalysisSample, measured_indicator
from emulant.models.propensity import PropensityModel
from emulant.protocol import MeasuredOutcome, Protocol

log = logging.getLogger(__name__)

CONTRAST = "intention_to_treat"
KEY = "influence_se"  # the point estimate's rows and curve rows carry it until the gather step
NOTE = "interval: influence function (sandwich SE)"
FALLBACK = "interval: bootstrap (no influence function for this row)"
NO_INTERVAL = ("no interval: no influence function for this row and no bootstrap replicate was "
               "run (analysis.variance: bootstrap gives one)")
TTE_MEASURES = ("risk", "risk_difference", "risk_ratio", "rate")


def covered(protocol: Protocol, measured: bool, method: str, estimand, measure: str) -> bool:
    """Whether a whole-cohort intention-to-treat row gets an influence-function SE."""
    an = protocol.analysis
    truncated = an.weights.truncate is not None and estimand != "ATO"
    if measured:
        return method in ("unadjusted", "doubly_robust") or (method == "ipw" and not truncated)
    if measure == "rate":
        return method == "unadjusted"
    if measure not in TTE_MEASURES:
        return False
    return method == "unadjusted" or (method == "ipw" and not truncated and not an.censoring_weights)


def bootstrap_needed(protocol: Protocol) -> bool:
    """Whether any row needs the bootstrap's replicates (always, unless ``analysis.variance`` is
    ``influence`` and every row the protocol asks for is :func:`covered`)."""
    if protocol.analysis.variance != "influence":
        return True
    if protocol.per_protocol or protocol.subgroups or protocol.decision is not None:
        return True
    an = protocol.analysis
    outcomes = protocol.outcomes.all()
    if any(not isinstance(o, MeasuredOutcome) for o in outcomes) and an.hazard_ratio:
        return True
    for o in outcomes:
        m = isinstance(o, MeasuredOutcome)
        for method in an.methods:
            for est in protocol.estimands:
                if not all(covered(protocol, m, method, est, x) for x in
                           (("mean",) if m else ("risk", "risk_difference", "risk_ratio"))):
                    return True
    return False


# ----------------------------------------------------------------------------- the sample


def _arm_means(IF1, IF0, mu1, mu0, ratio=False):
    """(arm 1, arm 0, difference[, log ratio]) standard errors from the arms' influence."""
    out = [se_of(IF1), se_of(IF0), se_of(IF1 - IF0)]
    if ratio:
        out.append(se_of(IF1 / mu1 - IF0 / mu0) if mu1 > 0 and mu0 > 0 else float("nan"))
    return out


def _measurement(sample: AnalysisSample, outcome: MeasuredOutcome, Zx: np.ndarray, r: np.ndarray):
    """The measurement model's nuisance and d log r / d eta, or (None, None) without a model."""
    seen = measured_indicator(sample.cohort, outcome.measure)
    if outcome.missing != "censor" or not np.any(seen == 0):
        return None, None
    Zc = np.column_stack([sample.a, sample.X])
    p = PropensityModel().fit(Zc, seen).predict(Zc)
    if not np.allclose(np.where(seen > 0, 1.0 / p, 0.0), r, rtol=1e-6, atol=1e-9):
        raise InfluenceUnavailable("the measurement model differs from the sample's")
    alpha = logistic_nuisance(np.hstack([Zx[:, :1], sample.a[:, None], Zx[:, 1:]]), seen, p,
                              "measurement")
    return alpha, np.where(seen > 0, -(1.0 - p), 0.0)


def measured_ses(sample: AnalysisSample, outcome: MeasuredOutcome, beta: Nuisance,
                 Zx: np.ndarray) -> dict[tuple, float]:
    """(estimand, method, measure, arm) -> SE for one measured outcome's covered rows."""
    p, a, e = sample.protocol, sample.a, sample.e
    name = outcome.measure
    r = np.asarray(sample.censoring.get(name, measured_indicator(sample.cohort, name)), float)
    seen = (r > 0).astype(float)
    y = np.where(seen > 0, sample.cohort[columns.value(name)].to_numpy(dtype=float), 0.0)
    t_arm, c_arm = sample.treated_arm, sample.comparator_arm
    out: dict[tuple, float] = {}

    def put(est, method, ses):
        for key, s in zip(((est, method, "mean", t_arm), (est, method, "mean", c_arm),
                           (est, method, "mean_difference", t_arm)), ses, strict=True):
            out[key] = s

    _, IF1 = mean_influence(y, a * seen)
    _, IF0 = mean_influence(y, (1 - a) * seen)
    put("", "unadjusted", _arm_means(IF1, IF0, 0, 0))
    methods = p.analysis.methods
    if not ({"ipw", "doubly_robust"} & set(methods)):
        return out
    alpha, dlr = _measurement(sample, outcome, Zx, r)
    nu = dict(beta=beta, alpha=alpha, dlog_r=dlr)
    gam, m = {}, {}
    if "doubly_robust" in methods:
        for k, ind in ((1, a), (0, 1 - a)):
            gam[k], m[k] = regression_nuisance(Zx, y, ind * r, alpha,
                                               None if dlr is None else dlr)
    for est in p.estimands:
        if "ipw" in methods and covered(p, True, "ipw", est, "mean"):
            w, dl = np.asarray(sample.weights[est], float), dlog_weight(est, a, e)
            mu1, IF1 = mean_influence(y, a * w * r, dl, **nu)
            mu0, IF0 = mean_influence(y, (1 - a) * w * r, dl, **nu)
            put(est, "ipw", _arm_means(IF1, IF0, mu1, mu0))
        if "doubly_robust" in methods:
            put(est, "doubly_robust", _dr(est, y, a, e, r, m, gam, nu))
    return out


def _dr(est, y, a, e, r, m, gam, nu):
    """The doubly robust means' SEs (the forms of :mod:`emulant.estimation.measured`)."""
    one = np.ones_like(a)
    if est == "ATE":
        spec = {1: (one, a * r / e, -(1 - e), None, True), 0: (one, (1 - a) * r / (1 - e), e, None, True)}
    elif est == "ATT":
        spec = {1: (a, a * r, None, None, True), 0: (a, (1 - a) * r * e / (1 - e), one, None, True)}
    else:  # ATO
        h, dh = e * (1 - e), 1 - 2 * e
        spec = {1: (h, a * r * (1 - e), -e, dh, False), 0: (h, (1 - a) * r * e, 1 - e, dh, False)}
    IF = {}
    mu = {}
    for k, (t, u, dlu, dlt, shared) in spec.items():
        mu[k], IF[k] = mean_influence(y, u, dlu, t=t, m=m[k], dlog_t=dlt, shared=shared,
                                      gamma=gam[k], **nu)
    return _arm_means(IF[1], IF[0], mu[1], mu[0])


def tte_ses(sample: AnalysisSample, outcome: str, beta: Nuisance, days: np.ndarray
            ) -> tuple[dict[tuple, float], dict[tuple, float]]:
    """(estimand, method, measure, horizon, arm) -> SE for one time-to-event outcome's covered
    rows, and (estimand, method, arm, day) -> SE for its covered curve days."""
    from emulant.estimation.tte import outcome_arrays

    p, a, e = sample.protocol, sample.a, sample.e
    time, status = outcome_arrays(sample.cohort, outcome)
    arms = {1: sample.treated_arm, 0: sample.comparator_arm}
    horizons = tuple(p.analysis.horizons_days)
    rows: dict[tuple, float] = {}
    curves: dict[tuple, float] = {}
    for g in (1, 0):
        k = a == g
        _, IF = rate_influence(time[k], status[k], np.ones(int(k.sum())))
        rows[None, "unadjusted", "rate", None, arms[g]] = se_of(IF)
    plans = [(None, "unadjusted", np.ones_like(a), None)]
    for est in p.estimands:
        if "ipw" in p.analysis.methods and covered(p, False, "ipw", est, "risk"):
            plans.append((est, "ipw", np.asarray(sample.weights[est], float), dlog_weight(est, a, e)))
    for est, method, w, dl in plans:
        for what, when in (("rows", horizons), ("curves", days)):
            IFs = {g: _risk_if(time, status, a, w, dl, g, when, beta) for g in (1, 0)}
            for j, day in enumerate(when):
                (r1, i1), (r0, i0) = IFs[1][j], IFs[0][j]
                if what == "curves":
                    curves[est, method, arms[1], int(day)] = se_of(i1)
                    curves[est, method, arms[0], int(day)] = se_of(i0)
                    continue
                s1, s0, sd, sr = _arm_means(i1, i0, r1, r0, ratio=True)
                key = (est, method)
                rows[(*key, "risk", day, arms[1])] = s1
                rows[(*key, "risk", day, arms[0])] = s0
                rows[(*key, "risk_difference", day, arms[1])] = sd
                rows[(*key, "risk_ratio", day, arms[1])] = sr
    return rows, curves


def _risk_if(time, status, a, w, dl, g, days, beta):
    """[(risk, influence over everyone)] of arm ``g`` at ``days`` (weights ``w``, propensity
    derivative ``dl``: None for the unadjusted curve)."""
    k = a == g
    risks, grads = aj_influence(time[k], status[k], w[k], days)
    out = []
    for risk, xi in zip(risks, grads, strict=True):
        IF = np.zeros(len(a))
        IF[k] = w[k] * xi
        if dl is not None:
            c = np.zeros(len(a))
            c[k] = w[k] * xi * dl[k]
            IF += beta.apply(beta.gradient(c))
        out.append((float(risk), IF))
    return out


# ----------------------------------------------------------------------------- the rows


def _norm(v):
    return "" if v is None or (isinstance(v, float) and np.isnan(v)) else v


def attach_influence(sample: AnalysisSample, rows: list[dict], curves: list[dict]) -> int:
    """Add ``influence_se`` to every covered whole-cohort row and curve row of the point estimate
    (frequency weights all 1); returns how many rows got one. A model that prevents it (a
    penalised fit) leaves its rows to the bootstrap, with a log line."""
    if "trial" in sample.cohort.columns or not np.all(sample.freq == 1):
        log.warning("influence-function SEs assume one row per person with unit weights, not "
                    "person-trials or sampled non-initiators: every row keeps the bootstrap")
        return 0
    Zx = standard_design(sample.X)
    try:
        beta = logistic_nuisance(Zx, sample.a, sample.e, "propensity")
    except InfluenceUnavailable as exc:
        log.warning("influence-function SEs: %s; every row keeps the bootstrap", exc)
        return 0
    from emulant.estimation.survival import day_grid

    p = sample.protocol
    days = day_grid(p.follow_up.max_days, p.analysis.period_days)
    found: dict[tuple, float] = {}
    cfound: dict[tuple, float] = {}
    for o in p.outcomes.all():
        try:
            if isinstance(o, MeasuredOutcome):
                for (est, meth, meas, arm), s in measured_ses(sample, o, beta, Zx).items():
                    found[o.measure, est, meth, meas, "", arm] = s
            else:
                r, c = tte_ses(sample, o, beta, days)
                for (est, meth, meas, h, arm), s in r.items():
                    found[o, _norm(est), meth, meas, _norm(h), arm] = s
                for (est, meth, arm, day), s in c.items():
                    cfound[o, _norm(est), meth, arm, day] = s
        except InfluenceUnavailable as exc:
            log.warning("influence-function SEs of %s: %s; its rows keep the bootstrap",
                        getattr(o, "measure", o), exc)
    n = 0
    for row in rows:
        if row.get("contrast") != CONTRAST or _norm(row.get("subgroup")):
            continue
        key = (row["outcome"], _norm(row.get("estimand")), row["method"], row["measure"],
               _norm(row.get("horizon_day")), row["arm"])
        if key in found and np.isfinite(row.get("estimate", np.nan)):
            row[KEY] = found[key]
            n += 1
    for c in curves:
        key = (c.get("outcome"), _norm(c.get("estimand")), c["method"], c["arm"], int(c["day"]))
        if c.get("contrast") == CONTRAST and key in cfound:
            c[KEY] = cfound[key]
    return n


def influence_intervals(point_rows: list[dict], point_curves: list[dict], rows: list[dict],
                        curves: list[dict], replicates: bool = True
                        ) -> tuple[list[dict], list[dict]]:
    """Rows and curve rows with ``influence_se`` get its Wald interval (estimate ± 1.96 SE, on
    the log scale for ratios) and the note saying so, in place of the bootstrap's; the others
    keep the bootstrap's, with a note saying that too, or, when no replicate was run
    (``replicates`` False), that they have no interval (rows aligned with ``point_rows``)."""
    out = []
    for p, r in zip(point_rows, rows, strict=True):
        s = p.get(KEY)
        if s is None:
            r = {k: v for k, v in r.items() if k != KEY}
            if r.get("measure") != "e_value" and r.get("estimate") is not None \
                    and np.isfinite(float(r["estimate"])):
                why = FALLBACK if replicates else NO_INTERVAL
                r["note"] = f"{r['note']}; {why}" if r.get("note") else why
            out.append(r)
            continue
        r = {k: v for k, v in p.items() if k != KEY}
        est = float(r["estimate"])
        if r.get("measure") in RATIO_MEASURES:
            lo, hi = np.exp(np.log(est) - Z_975 * s), np.exp(np.log(est) + Z_975 * s)
        else:
            lo, hi = est - Z_975 * s, est + Z_975 * s
        r.update(se=float(s), ci_low=float(lo), ci_high=float(hi))
        r["note"] = f"{r['note']}; {NOTE}" if r.get("note") else NOTE
        out.append(r)
    cout = []
    for p, c in zip(point_curves, curves, strict=True):
        c = {k: v for k, v in c.items() if k != KEY}
        s = p.get(KEY)
        if s is not None:
            c.update(ci_low=float(c["risk"] - Z_975 * s), ci_high=float(c["risk"] + Z_975 * s))
        cout.append(c)
    return out, cout


def influence_account(point_rows: list[dict], non_estimable: list[dict]) -> dict:
    """bootstrap.json's additions under ``analysis.variance: influence``: the rows whose SE is the
    influence function's; bootstrap replicates not estimable are listed for the others only."""
    from emulant.estimation.bootstrap import ROW_KEY, row_key

    mine = {row_key(r, ROW_KEY) for r in point_rows if r.get(KEY) is not None}
    return {"variance": "influence",
            "influence_rows": len(mine),
            "non_estimable": [a for a in non_estimable
                              if tuple(a.get(k) for k in ROW_KEY) not in mine]}
