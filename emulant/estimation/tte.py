"""Time-to-event effects of one outcome: the rows of ``estimates.csv`` and ``curves.csv``.

:func:`time_to_event_estimates` is called for the point estimate and for every bootstrap
replicate (an :class:`~emulant.estimation.sample.AnalysisSample` differing only in ``freq`` and what was
refitted with it); it returns point values only, on a fixed grid of days so replicates line up,
and the bootstrap adds ``se``, ``ci_low`` and ``ci_high``.

Methods (each estimand of the protocol; ``unadjusted`` once, with ``estimand`` empty):

* ``unadjusted``: Aalen–Johansen (Kaplan–Meier without competing events) by arm, crude rates,
  and the Cox hazard ratio.
* ``ipw``: the same curves weighted by the estimand's inverse probability of treatment weights
  (Cole & Hernán 2004, Comput Methods Programs Biomed 75:45), and the weighted Cox hazard ratio;
  with ``analysis.censoring_weights`` the curve is the inverse probability of censoring weighted
  cumulative incidence (:func:`emulant.estimation.tte_weighting.ipcw_incidence`). The hazard ratio uses
  the treatment weights alone (censored persons leave its risk sets); it is cause-specific
  with competing events (:mod:`emulant.estimation.cox`, with the caution on hazard ratios).
* ``standardization``: the parametric g-formula with pooled logistic hazards
  (:mod:`emulant.estimation.pooled_logistic`).
* ``doubly_robust``: the augmented IPW risk at each horizon (:func:`emulant.estimation.tte_weighting.aipw_risk`),
  with the estimand's weights from the untruncated propensity (``analysis.weights.truncate``
  applies to the IPW estimates only), as for measured outcomes
  (:mod:`emulant.estimation.measured`).
"""

from __future__ import annotations

import numpy as np

from emulant import columns
from emulant.estimation.cox import cox_hazard_ratio
from emulant.estimation.pooled_logistic import gformula_incidence, hazard_models
from emulant.estimation.survival import (
    COMPETING,
    OUTCOME,
    SurvivalError,
    aalen_johansen,
    crude_rate,
    day_grid,
    events_by,
    number_at_risk,
    step_at,
)
from emulant.estimation.tte_weighting import (
    aipw_risk,
    censoring_at,
    ipcw_incidence,
    standardized_risks,
    target_weights,
)
from emulant.models.weights import estimand_weights

CONTRAST = "intention_to_treat"
STATUS = {"outcome": OUTCOME, "competing": COMPETING}


def outcome_arrays(cohort, outcome: str) -> tuple[np.ndarray, np.ndarray]:
    """``time`` (days) and ``status`` (0 censored, 1 outcome, 2 competing) of one outcome."""
    time, reason = _end_columns(cohort, outcome)
    status = np.select([reason == "outcome", reason == "competing"], [OUTCOME, COMPETING], 0)
    return time, status


def losses(cohort, outcome: str, freq, max_days: int) -> np.ndarray:
    """The censorings a censoring model counts: losses to follow-up, not planned ends.

    A person is lost when follow-up ends by ``coverage_end`` or ``administrative_end`` (calendar
    time, which differs between persons entering on different days) before ``max_days`` and
    before the last day anyone (with a positive frequency weight) is followed. Reaching
    ``max_days``, and an end of follow-up that every person still followed reaches on the same
    day, is the planned end of the study window, not censoring: counted as censoring, it drives
    the censoring hazard towards 1 at the end of follow-up (common practice, no single source).
    """
    time, reason = _end_columns(cohort, outcome)
    f = np.asarray(freq, dtype=float)
    last = float(np.max(time[f > 0], initial=0.0))
    end = min(float(max_days), last)
    return np.isin(reason, ("coverage_end", "administrative_end")) & (time < end)


def _end_columns(cohort, outcome: str) -> tuple[np.ndarray, np.ndarray]:
    day_col, reason_col = columns.end_day(outcome), columns.end_reason(outcome)
    for col in (day_col, reason_col):
        if col not in cohort.columns:
            raise SurvivalError(f"cohort: column {col!r} is missing (outcome {outcome!r})")
    time = cohort[day_col].to_numpy(dtype=float)
    reason = cohort[reason_col].astype(str).to_numpy()
    bad = ~np.isin(reason, columns.END_REASONS)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise SurvivalError(f"cohort: column {reason_col!r}, row {i}: {reason[i]!r} is not one "
                            f"of {list(columns.END_REASONS)}")
    if np.isnan(time).any():
        i = int(np.flatnonzero(np.isnan(time))[0])
        raise SurvivalError(f"cohort: column {day_col!r}, row {i} is missing")
    return time, reason


def _row(outcome, estimand, method, measure, horizon, arm, comparator, estimate, n, events,
         note="", contrast=CONTRAST):
    row = {"outcome": outcome, "contrast": contrast, "estimand": estimand, "method": method,
           "measure": measure, "horizon_day": horizon, "arm": arm, "comparator": comparator,
           "estimate": float(estimate), "n": None if n is None else int(round(n)),
           "events": None if events is None else int(round(events))}
    if note:  # why the estimate is empty (the estimates.csv column ``note``)
        row["note"] = note
    return row


def _zero_risk_note(r1: float, r0: float, arms: dict, horizon) -> str:
    """A risk ratio with a zero (or missing) risk in an arm is not estimable: 0 or infinite."""
    empty = [arms[g] for g, r in ((1, r1), (0, r0)) if not r > 0]
    if not empty:
        return ""
    return f"not estimable: no events by day {horizon} in {' and '.join(empty)}"


class OutcomeContext:
    """What every method of one outcome shares: arrays, arms, grid, counts.

    ``arrays`` replaces the outcome's ``(time, status)`` (per protocol: artificially censored),
    ``contrast`` the rows' contrast.
    """

    def __init__(self, sample, outcome: str, arrays=None, contrast: str = CONTRAST):
        p = sample.protocol
        self.outcome, self.protocol, self.contrast = outcome, p, contrast
        self.time, self.status = outcome_arrays(sample.cohort, outcome) if arrays is None else arrays
        self.cohort = sample.cohort
        self.a = np.asarray(sample.a).astype(int)
        self.f = np.asarray(sample.freq, dtype=float)
        self.X, self.e, self.weights = sample.X, np.asarray(sample.e, float), sample.weights
        self.arms = {1: sample.treated_arm, 0: sample.comparator_arm}
        self.P = p.analysis.period_days
        self.max_days = p.follow_up.max_days
        self.horizons = tuple(p.analysis.horizons_days)
        self.grid = day_grid(self.max_days, self.P)
        self.competing = bool(p.outcomes.competing) or bool(np.any(self.status == COMPETING))
        self.n = {g: float(self.f[self.a == g].sum()) for g in (0, 1)}
        self.events = {(g, h): events_by(self.time[self.a == g], self.status[self.a == g],
                                         self.f[self.a == g], h)
                       for g in (0, 1) for h in self.horizons}
        self.at_risk = {g: number_at_risk(self.time[self.a == g], self.f[self.a == g], self.grid)
                        for g in (0, 1)}

    def past_the_data(self, rows: list[dict]) -> list[dict]:
        """Empty the horizon rows an arm's follow-up does not reach, with the reason in ``note``.

        An arm with fewer than ``report.min_cell`` persons (frequency-weighted) still at risk on
        the horizon's day leaves its risk there not estimable, and with it every contrast at that
        horizon: Kaplan–Meier and Aalen–Johansen would carry their last value forward and the
        g-formula would extrapolate its time basis (Kaplan & Meier 1958 leave the estimate
        undefined past the last observation; the threshold is the report's small-cell rule).
        """
        m = max(int(self.protocol.report.min_cell), 1)
        thin = {}
        for g in (0, 1):
            k = self.a == g
            for h, n in zip(self.horizons, number_at_risk(self.time[k], self.f[k], self.horizons),
                            strict=True):
                if n < m:
                    who = "no one" if n == 0 else f"fewer than {m} persons"
                    thin[g, h] = f"{who} at risk on day {h} in {self.arms[g]}"
        if not thin:
            return rows
        for r in rows:
            h = r.get("horizon_day")
            why = [thin[g, h] for g in (1, 0) if (g, h) in thin
                   and (r["measure"] != "risk" or r["arm"] == self.arms[g])]
            if why:
                r["estimate"], r["note"] = float("nan"), "not estimable: " + " and ".join(why)
        return rows

    def contrast_rows(self, estimand, method, risk):
        """risk per arm, risk_difference and risk_ratio at each horizon; risk[g][h]."""
        rows, o = [], self.outcome
        for h in self.horizons:
            for g in (1, 0):
                rows.append(_row(o, estimand, method, "risk", h, self.arms[g], None,
                                 risk[g][h], self.n[g], self.events[g, h], contrast=self.contrast))
            n, ev = self.n[0] + self.n[1], self.events[0, h] + self.events[1, h]
            r1, r0 = risk[1][h], risk[0][h]
            rows.append(_row(o, estimand, method, "risk_difference", h, self.arms[1],
                             self.arms[0], r1 - r0, n, ev, contrast=self.contrast))
            rr = r1 / r0 if r0 > 0 and r1 > 0 else float("nan")
            rows.append(_row(o, estimand, method, "risk_ratio", h, self.arms[1], self.arms[0],
                             rr, n, ev, note=_zero_risk_note(r1, r0, self.arms, h),
                             contrast=self.contrast))
        return rows

    def curve_rows(self, estimand, method, curves):
        rows = []
        for g in (1, 0):
            for day, r, nr in zip(self.grid, curves[g], self.at_risk[g], strict=True):
                rows.append({"contrast": self.contrast, "estimand": estimand, "method": method,
                             "arm": self.arms[g], "day": int(day), "risk": float(r),
                             "at_risk": int(round(nr))})
        return rows

    def hazard_ratio_row(self, estimand, method, w):
        """Cox hazard ratio weighted by ``w`` (None: unweighted) with the frequency weights."""
        hr = cox_hazard_ratio(self.time, self.status, self.a, w, freq=self.f)
        note = f"not estimable: {hr.not_estimable}" if hr.not_estimable else ""
        return _row(self.outcome, estimand, method, "hazard_ratio", None, self.arms[1],
                    self.arms[0], hr.hr, hr.n, hr.events, note=note, contrast=self.contrast)

    def aj_curves(self, w):
        """Weighted Aalen–Johansen cumulative incidence by arm on the grid and at horizons."""
        curves, risk = {}, {}
        days = np.concatenate([self.grid, np.asarray(self.horizons, dtype=float)])
        for g in (0, 1):
            m = self.a == g
            t, cif, _ = aalen_johansen(self.time[m], self.status[m], w[m])
            vals = step_at(t, cif, days, 0.0)
            curves[g] = vals[: self.grid.size]
            risk[g] = dict(zip(self.horizons, vals[self.grid.size:], strict=True))
        return curves, risk


def time_to_event_estimates(sample, outcome: str) -> tuple[list[dict], list[dict]]:
    """Point estimates for one time-to-event outcome: ``(rows, curve_rows)``.

    ``rows`` hold the ``estimates.csv`` columns except ``se``, ``ci_low``, ``ci_high``;
    ``curve_rows`` the ``curves.csv`` columns except ``ci_low``, ``ci_high``, on the days
    0, P, 2P, …, ``follow_up.max_days`` (P = ``analysis.period_days``). Time is
    ``end_day__<outcome>``; the status comes from ``end_reason__<outcome>``. Frequency weights
    (``sample.freq``) multiply every weight and count. ``n`` and ``events`` are frequency-weighted
    counts of persons and of outcome events (by the horizon, or over follow-up for hazard ratios
    and rates).
    """
    c = OutcomeContext(sample, outcome)
    an = c.protocol.analysis
    methods = [m for m in an.methods if m != "unadjusted"]
    rows: list[dict] = []
    curve_rows: list[dict] = []

    # unadjusted: computed once, estimand empty
    curves, risk = c.aj_curves(c.f)
    rows += c.contrast_rows(None, "unadjusted", risk)
    curve_rows += c.curve_rows(None, "unadjusted", curves)
    if an.hazard_ratio:
        rows.append(c.hazard_ratio_row(None, "unadjusted", None))
    for g in (1, 0):
        m = c.a == g
        r = crude_rate(c.time[m], c.status[m], c.f[m])
        rows.append(_row(outcome, None, "unadjusted", "rate", None, c.arms[g], None, r["rate"],
                         r["n"], r["events"]))

    need_models = "standardization" in methods or "doubly_robust" in methods
    lost = losses(c.cohort, outcome, c.f, c.max_days) if an.censoring_weights else None
    models = (hazard_models(c.time, c.status, c.a, c.X, c.f, c.P, c.max_days, c.competing, lost,
                            start=sample.starts.get(outcome))
              if need_models or ("ipw" in methods and an.censoring_weights) else None)
    if models:  # the point estimate's coefficients start every replicate's fits
        sample.fitted[outcome] = {k: m.coef_ for k, m in models.items()}
    days = np.concatenate([c.grid, np.asarray(c.horizons, dtype=float)])
    incidence = gformula_incidence(models, c.X, days) if need_models else None
    cens = None
    if "doubly_robust" in methods or ("ipw" in methods and an.censoring_weights):
        cens = censoring_at(c.time, c.status, c.a, c.f, c.horizons,
                            models.get("censoring") if models and an.censoring_weights else None,
                            c.X)

    for est in c.protocol.estimands:
        if est not in c.weights:
            raise SurvivalError(f"analysis sample: no weights for estimand {est!r}")
        w = c.f * np.asarray(c.weights[est], dtype=float)
        if "ipw" in methods:
            if an.censoring_weights:
                curves, risk = ipcw_incidence(c.time, c.status, c.a, w, cens, c.grid,
                                              c.horizons)
            else:
                curves, risk = c.aj_curves(w)
            rows += c.contrast_rows(est, "ipw", risk)
            curve_rows += c.curve_rows(est, "ipw", curves)
            if an.hazard_ratio:
                rows.append(c.hazard_ratio_row(est, "ipw", np.asarray(c.weights[est], float)))
        if need_models:
            v = target_weights(est, c.a, c.e, c.f)
            curves, risk = standardized_risks(incidence, v, c.grid.size, c.horizons)
            if "standardization" in methods:
                rows += c.contrast_rows(est, "standardization", risk)
                curve_rows += c.curve_rows(est, "standardization", curves)
            if "doubly_robust" in methods:
                # the untruncated propensity, as for measured outcomes: truncated weights in
                # the augmentation term would lose the double robustness
                w_dr = c.f * estimand_weights(c.a, c.e, est, stabilize=False)
                F_h = {g: incidence[g][:, c.grid.size:] for g in (0, 1)}
                risk = aipw_risk(c.time, c.status, c.a, w_dr, v, F_h, cens, c.horizons)
                rows += c.contrast_rows(est, "doubly_robust", risk)
    return c.past_the_data(rows), curve_rows
