"""True risks of the "designs" scenario under window, dynamic and sequential-trial strategies.

Each truth simulates the same persons (or person-trials) under each strategy with common random
numbers (the same tone steps ``eps`` and start draws ``u`` for every strategy), from the state the
data give at time zero, and evaluates the exact risk of each simulated hazard path
(:func:`synthetic_cohort.designs_process.risks`: piecewise-constant hazards, death competing, no
censoring), averaged over about ``paths`` simulated paths per strategy. The random numbers come
from streams of their own (``[seed, 31]``, ``[seed, 32]``), so the extract is unchanged by them.

Plain functions: :func:`clone_truths` (window, never, dynamic thresholds, natural course, the
naive comparison) and :func:`sequential_truths` (start in the first interval against do not
start, per protocol and by intention to treat), both called by :func:`designs_truth`.
"""

from __future__ import annotations

import numpy as np

from synthetic_cohort import designs as G
from synthetic_cohort import designs_params as D
from synthetic_cohort import designs_process as S
from synthetic_cohort.records import Tables

OUTCOMES = ("crisis", "death")
CHUNK = 50_000  # simulated paths per batch
PATHS = 200_000  # simulated paths per strategy in truth.json (tests lower it)


def strategy_risks(state: dict, rules: dict, horizons, rng: np.random.Generator,
                   paths: int = 200_000) -> dict[str, np.ndarray]:
    """Per row and strategy, the risks ``(2 outcomes, len(horizons), n)`` averaged over simulated
    paths. ``state``: arrays ``tone_prev`` (L_{k0-1}), ``tone`` (L_k0), ``age0``, ``male``, ``k0``
    (first simulated period) and ``s`` (time zero + 1, in days after the flare; the risk by
    horizon h counts events in ``[s, s + h)``). ``rules``: name -> ``f(rows) -> rule``."""
    n = len(state["tone"])
    reps = max(1, -(-paths // max(n, 1)))
    K = int(np.ceil((np.max(state["s"]) + max(horizons)) / D.PERIOD)) + 1
    out = {name: np.zeros((len(OUTCOMES), len(horizons), n)) for name in rules}
    step = max(1, CHUNK // reps)
    for lo in range(0, n, step):
        hi = min(n, lo + step)
        rows = np.repeat(np.arange(lo, hi), reps)
        eps, u = rng.standard_normal((len(rows), K)), rng.random((len(rows), K))
        st = {k: np.asarray(v)[rows] for k, v in state.items()}
        for name, make in rules.items():
            run = S.simulate(st["tone_prev"], st["tone"], st["age0"], np.zeros(len(rows), bool),
                             eps, u, make(rows), st["k0"])
            h = S.hazards(D.CRISIS, run, st["age0"], st["male"])
            hd = S.hazards(D.DEATH, run, st["age0"], st["male"])
            for i, t in enumerate(horizons):
                fy, fd = S.risks(h, hd, st["s"], st["s"] + t)
                out[name][0, i, lo:hi] = fy.reshape(-1, reps).mean(axis=1)
                out[name][1, i, lo:hi] = fd.reshape(-1, reps).mean(axis=1)
    return out


def _by_horizon(values, horizons) -> dict:
    return {str(t): float(values[i]) for i, t in enumerate(horizons)}


def contrast(risks: dict[str, np.ndarray], arms: list[str], comparator: str, horizons,
             among: np.ndarray | None = None) -> dict:
    """``{outcome: {"risk": {arm: {h: r}}, "risk_difference": ..., "risk_ratio": ...}}``: each
    arm's mean risk (over ``among``) and its difference and ratio against ``comparator``."""
    out = {}
    for o, name in enumerate(OUTCOMES):
        mean = {a: (risks[a][o] if among is None else risks[a][o][:, among]).mean(axis=1)
                for a in [*arms, comparator]}
        res = {"risk": {a: _by_horizon(m, horizons) for a, m in mean.items()}}
        if len(arms) == 1:
            res["risk_difference"] = _by_horizon(mean[arms[0]] - mean[comparator], horizons)
            res["risk_ratio"] = _by_horizon(mean[arms[0]] / mean[comparator], horizons)
        else:
            res["risk_difference"] = {a: _by_horizon(mean[a] - mean[comparator], horizons) for a in arms}
            res["risk_ratio"] = {a: _by_horizon(mean[a] / mean[comparator], horizons) for a in arms}
        out[name] = res
    return out


def _observed(lat: G.Latent, who: np.ndarray, horizons) -> dict:
    """Crude risks of the drawn (uncensored) event times among ``who``, with binomial SEs."""
    out = {}
    for name in OUTCOMES:
        risk, se = {}, {}
        for t in horizons:
            if name == "crisis":
                hit = (lat.t_crisis < lat.t_death) & (lat.t_crisis < t + 1)
            else:
                hit = lat.t_death < t + 1
            p = float(hit[who].mean())
            risk[str(t)], se[str(t)] = p, float(np.sqrt(p * (1 - p) / who.sum()))
        out[name] = {"risk": risk, "se": se}
    return out


def clone_truths(t: Tables, lat: G.Latent, seed: int, horizons=D.HORIZONS, window=D.WINDOW,
                 thresholds=D.THRESHOLDS, within_days=D.WITHIN_DAYS,
                 paths: int = 200_000) -> dict:
    """Truths of the clone protocols' eligible persons (time zero: the flare): the window
    strategy ("early") and each dynamic threshold against "never", the natural course, the
    drawn data's crude risks and the naive "classify by later treatment" comparison."""
    eligible, attrition = G.clone_cohort(t, lat)
    e = np.flatnonzero(eligible)
    state = {"tone_prev": lat.tone_before[e], "tone": lat.run.L[e, 0], "age0": lat.age0[e],
             "male": lat.male[e], "k0": np.zeros(len(e), np.int64), "s": np.ones(len(e))}
    dyn = {f"above_{x:g}": (lambda rows, x=x: S.Dynamic(x, within_days, len(rows)))
           for x in thresholds}
    rules = {"early": lambda rows: S.Window(*window), "never": lambda rows: S.Never(),
             "natural_course": lambda rows: S.Natural(), **dyn}
    r = strategy_risks(state, rules, horizons, np.random.default_rng([seed, 31]), paths)
    started = lat.first_kestrel - lat.d0 <= window[1]
    groups = {"started_in_window": eligible & started, "not_started_in_window": eligible & ~started}
    obs = {k: _observed(lat, g, horizons) for k, g in groups.items()}
    naive = {}
    for o in OUTCOMES:
        a, b = (obs[k][o] for k in groups)
        naive[o] = {"risk": {k: obs[k][o]["risk"] for k in groups},
                    "risk_difference": {h: a["risk"][h] - b["risk"][h] for h in a["risk"]},
                    "se": {h: float(np.hypot(a["se"][h], b["se"][h])) for h in a["risk"]},
                    "n": {k: int(g.sum()) for k, g in groups.items()}}
    return {
        "population": "eligible persons of the clone protocols (time zero: the flare), ATE",
        "eligible": int(eligible.sum()), "attrition": [{"step": s, "remaining": n} for s, n in attrition],
        "window": list(window), "thresholds": list(thresholds), "within_days": within_days,
        "per_protocol": {o: {"ATE": v} for o, v in
                         contrast(r, ["early"], "never", horizons).items()},
        "dynamic": {o: {"ATE": v} for o, v in
                    contrast(r, list(dyn), "never", horizons).items()},
        "natural_course": {o: {"risk": _by_horizon(r["natural_course"][i].mean(axis=1), horizons)}
                           for i, o in enumerate(OUTCOMES)},
        "observed_uncensored": _observed(lat, eligible, horizons),
        "naive": naive,
    }


def sequential_state(lat: G.Latent, pt: G.PersonTrials) -> dict:
    """The state of each candidate person-trial at its start ``t_j``: the visit ``k_j`` inside
    the first interval, the tone of the two visits before it, ``s = t_j - flare + 1``."""
    i = pt.person
    since = pt.t0 - lat.d0[i]
    k = -(-since // D.PERIOD)  # the visit day 30k is in [t_j, t_j + 29]
    if np.any(k < 1):
        raise AssertionError("a candidate's flare is not before its trial start")
    prev = np.where(k >= 2, lat.run.L[i, np.maximum(k - 2, 0)], lat.tone_before[i])
    return {"tone_prev": prev, "tone": lat.run.L[i, k - 1], "age0": lat.age0[i],
            "male": lat.male[i], "k0": k - 1, "s": since + 1.0, "k": k}


def sequential_truths(t: Tables, lat: G.Latent, seed: int, horizons=D.HORIZONS,
                      paths: int = 200_000) -> dict:
    """Truths of the sequential protocol, pooled over its candidate person-trials (CONTRACTS
    §5c): ATE over every candidate person-trial, ATT over the initiating ones. Per protocol:
    "start kestrel at the visit in the first interval" against "never start"; intention to
    treat: the same start against "no start in the first interval, then as in the data"."""
    pt = G.sequential_candidates(t, lat)
    state = sequential_state(lat, pt)
    k = state.pop("k")
    rules = {"kestrel": lambda rows: S.StartAt(k[rows]), "no_kestrel": lambda rows: S.Never(),
             "no_kestrel_itt": lambda rows: S.NaturalAfter(k[rows])}
    r = strategy_risks(state, rules, horizons, np.random.default_rng([seed, 32]), paths)
    itt = {"kestrel": r["kestrel"], "no_kestrel": r["no_kestrel_itt"]}
    return {
        "population": "candidate person-trials of the sequential protocol, pooled over trials "
                      "(ATE: all; ATT: those who started kestrel in the trial's first interval)",
        "trials": len(G.trial_starts()), "person_trials": len(pt.person),
        "persons": int(len(np.unique(pt.person))),
        "initiating_person_trials": int(pt.initiator.sum()),
        "attrition": [{"step": s, "remaining": n} for s, n in pt.attrition],
        "per_protocol": {o: {"ATE": a, "ATT": b} for (o, a), b in zip(
            contrast(r, ["kestrel"], "no_kestrel", horizons).items(),
            contrast(r, ["kestrel"], "no_kestrel", horizons, pt.initiator).values(), strict=True)},
        "intention_to_treat": {o: {"ATE": a, "ATT": b} for (o, a), b in zip(
            contrast(itt, ["kestrel"], "no_kestrel", horizons).items(),
            contrast(itt, ["kestrel"], "no_kestrel", horizons, pt.initiator).values(), strict=True)},
    }


def designs_truth(t: Tables, lat: G.Latent, persons: int, seed: int,
                  paths: int | None = None) -> dict:
    """The content of the scenario's ``truth.json`` (``paths`` per strategy, default ``PATHS``)."""
    paths = paths or PATHS
    return {
        "scenario": "designs", "seed": int(seed), "persons": int(persons),
        "horizons": list(D.HORIZONS),
        "clone": clone_truths(t, lat, seed, paths=paths),
        "sequential": sequential_truths(t, lat, seed, paths=paths),
        "dgp": {"crisis": D.CRISIS, "death": D.DEATH, "start": D.START, "tone_step": D.TONE_STEP,
                "tone_before": D.TONE_BEFORE, "tone_flare": D.TONE_FLARE},
        "description": (
            "Invented registry: adults with an acute flare (index diagnosis FLR*) who may start "
            "kestrel at 30-day visits, with a probability rising with the last recorded tone "
            "(LBT1); kestrel lowers the tone and the crisis (CRS1) and death hazards. Truths: "
            "the same persons (person-trials) simulated under each strategy with common random "
            "numbers, exact piecewise-constant risks with death competing, no censoring."),
    }
