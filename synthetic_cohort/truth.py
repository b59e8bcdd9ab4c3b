"""Hazards of the invented registry and the true effects they imply for the eligible cohort.

With constant cause-specific hazards :math:`h_1` (the outcome) and :math:`h_2` (death, the
competing event), the cumulative incidence of the outcome by day :math:`t` is

.. math::

    F_1(t) = \\frac{h_1}{h_1 + h_2}\\left(1 - e^{-(h_1 + h_2) t}\\right)

(Kalbfleisch and Prentice, *The Statistical Analysis of Failure Time Data*, 2nd ed., 2002,
ch. 8: the cumulative incidence function of competing risks). Evaluating it for every eligible
person under each strategy and averaging gives the true risk (ATE: all eligible persons; ATT:
the treated arm's initiators) without Monte-Carlo noise in the outcome draws.
"""

from __future__ import annotations

import numpy as np

from synthetic_cohort import params as P

DAYS_PER_YEAR = 365.25


def log_rate(par: dict, x: dict[str, np.ndarray], arm: np.ndarray | str) -> np.ndarray:
    """Log of a daily hazard from the measured covariates ``x`` and the arm (name or index).

    .. math:: \\log h = \\log(r/365.25) + \\beta^\\top z(x) + \\log \\mathrm{HR}_{arm}
    """
    lab = x["lab"]
    missing = np.isnan(lab)
    hr = np.log(np.asarray([par["hazard_ratio"][a] for a in P.ARMS]))
    arm_term = hr[P.ARMS.index(arm)] if isinstance(arm, str) else hr[np.asarray(arm)]
    return (np.log(par["rate"] / DAYS_PER_YEAR) + par["age10"] * (x["age"] - P.AGE_MEAN) / 10
            + par["male"] * x["male"] + par["cv"] * x["cv"] + par["kidney"] * x["kidney"]
            + par["lab10"] * np.where(missing, 0.0, (lab - P.LAB_MEAN) / 10)
            + par["lab_missing"] * missing + par["drugs"] * (x["drugs"] - 2)
            + np.asarray(par["region"])[x["region"]] + arm_term)


def marker_mean(x: dict[str, np.ndarray], arm: np.ndarray | str) -> np.ndarray:
    """Expected marker value near day 365 (no change from baseline) under an arm."""
    par = P.MARKER_OUTCOME
    lab = x["lab"]
    missing = np.isnan(lab)
    eff = np.asarray([par["effect"][a] for a in P.ARMS])
    arm_term = eff[P.ARMS.index(arm)] if isinstance(arm, str) else eff[np.asarray(arm)]
    return (par["intercept"] + par["lab"] * np.where(missing, 0.0, lab - P.LAB_MEAN)
            + par["lab_missing"] * missing + par["age10"] * (x["age"] - P.AGE_MEAN) / 10
            + par["cv"] * x["cv"] + par["kidney"] * x["kidney"] + par["drugs"] * (x["drugs"] - 2)
            + par["male"] * x["male"] + np.asarray(par["region"])[x["region"]] + arm_term)


def marker_measured_logit(x: dict[str, np.ndarray], arm: np.ndarray) -> np.ndarray:
    """logit P(the outcome measurement is taken | alive and covered), measured covariates only."""
    par = P.MARKER_MEASURED
    return (par["intercept"] + par["lab_measured"] * ~np.isnan(x["lab"])
            + par["age10"] * (x["age"] - P.AGE_MEAN) / 10 + par["kestrel"] * (arm == 0)
            + np.asarray(par["region"])[x["region"]])


def cumulative_incidence(h: np.ndarray, other: np.ndarray, t: float) -> np.ndarray:
    """:math:`F_1(t)` for constant hazards ``h`` (event) and ``other`` (competing event)."""
    total = h + other
    return h / total * -np.expm1(-total * t)


def _effects(values: dict[str, np.ndarray], treated: str, comparator: str) -> tuple:
    return values[treated] - values[comparator], values[treated] / values[comparator]


def time_to_event_truth(x: dict[str, np.ndarray], arm: np.ndarray, par: dict,
                        horizons: tuple[int, ...], treated: str, comparator: str,
                        among: np.ndarray | None = None) -> dict:
    """True risks, risk differences and ratios by horizon for ATE and ATT.

    ``x`` holds the eligible persons' measured covariates and ``arm`` their arm index;
    ``among`` (a mask) restricts both estimands to a subgroup.
    """
    risks = {}
    for a in P.ARMS:
        h = np.exp(log_rate(par, x, a))
        # all-cause death as the outcome has no competing event
        hd = np.zeros_like(h) if par is P.DEATH else np.exp(log_rate(P.DEATH, x, a))
        risks[a] = np.stack([cumulative_incidence(h, hd, float(t)) for t in horizons])
    return summarise_risks(risks, arm, horizons, treated, comparator, among)


def measured_truth(x: dict[str, np.ndarray], arm: np.ndarray, treated: str,
                   comparator: str) -> dict:
    """True mean marker under each arm and their difference, for ATE and ATT."""
    groups = {"ATE": np.ones(len(arm), bool), "ATT": arm == P.ARMS.index(treated)}
    out = {}
    for estimand, g in groups.items():
        mean = {a: float(marker_mean({k: v[g] for k, v in x.items()}, a).mean()) for a in P.ARMS}
        out[estimand] = {"mean": mean, "mean_difference": mean[treated] - mean[comparator]}
    return out


def sustained_risks(x: dict[str, np.ndarray], arm: np.ndarray, tone0: np.ndarray,
                    supply: np.ndarray, horizons: tuple[int, ...], rng: np.random.Generator,
                    paths_per_arm: int = 200_000) -> tuple[dict, dict]:
    """The primary outcome's true per-person risks under each strategy, for the same eligible
    persons: ``(intention_to_treat, per_protocol)``, each ``{arm: (len(horizons), n)}``, to be
    averaged by :func:`summarise_risks` over the cohort or a subgroup.

    Intention to treat: every person assigned to each arm in turn, deviating as the registry's
    process would (about ``paths_per_arm`` simulated paths per arm, at least one per person),
    the exact piecewise risk averaged over paths. Per protocol: every person stays on the
    assigned class throughout, a deterministic tone path and the exact risk, no Monte Carlo.
    """
    from synthetic_cohort import sustain

    n = len(arm)
    reps = max(1, -(-paths_per_arm // max(n, 1)))
    chunk = max(1, 200_000 // reps)
    itt, pp = {}, {}
    for ai, a in enumerate(P.ARMS):
        base = log_rate(P.PRIMARY, x, a)
        hd = np.exp(log_rate(P.DEATH, x, a))
        forced = np.full(n, ai)
        paths = sustain.simulate(rng, tone0, forced, supply, adhere=True)
        pp[a] = sustain.cumulative_incidence(
            np.exp(sustain.log_hazards(base, forced, x["male"], paths)), hd, horizons)
        risk = np.zeros((len(horizons), n))
        for lo in range(0, n, chunk):
            sel = np.repeat(np.arange(lo, min(n, lo + chunk)), reps)
            paths = sustain.simulate(rng, tone0[sel], forced[sel], supply[sel])
            f = sustain.cumulative_incidence(
                np.exp(sustain.log_hazards(base[sel], forced[sel], x["male"][sel], paths)),
                hd[sel], horizons)
            np.add.at(risk.T, sel, f.T / reps)
        itt[a] = risk
    return itt, pp


def summarise_risks(risks: dict[str, np.ndarray], arm: np.ndarray, horizons, treated: str,
                    comparator: str, among: np.ndarray | None = None) -> dict:
    """Per-person risks ``{arm: (len(horizons), n)}`` averaged for ATE (everyone, or everyone
    in the ``among`` mask) and ATT (the treated arm's initiators among them)."""
    inside = np.ones(len(arm), bool) if among is None else np.asarray(among, bool)
    groups = {"ATE": inside, "ATT": inside & (arm == P.ARMS.index(treated))}
    out = {}
    for estimand, g in groups.items():
        mean = {a: risks[a][:, g].mean(axis=1) for a in P.ARMS}
        rd, rr = _effects(mean, treated, comparator)
        out[estimand] = {
            "risk": {a: {str(t): float(mean[a][i]) for i, t in enumerate(horizons)} for a in P.ARMS},
            "risk_difference": {str(t): float(rd[i]) for i, t in enumerate(horizons)},
            "risk_ratio": {str(t): float(rr[i]) for i, t in enumerate(horizons)},
        }
    return out
