"""Positivity diagnostics: the content of ``positivity.json`` (CONTRACTS §4).

The propensity distribution by arm (20 equal bins on [0, 1], for the report's overlap figure),
the c-statistic, the share of persons with extreme scores, and per estimand the quantiles of the
weights (no individual weight: the disclosure rule of :mod:`emulant.disclosure`), the share of the total weight carried by the top 1% and Kish's effective sample size.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from scipy.stats import rankdata

from emulant.models.weights import kish_ess

#: Extreme propensity thresholds: common practice, no single source.
EXTREME_LOW, EXTREME_HIGH = 0.025, 0.975
N_BINS = 20
WEIGHT_QUANTILES = (0.01, 0.05, 0.25, 0.5, 0.75, 0.95, 0.99)


def c_statistic(a: np.ndarray, e: np.ndarray) -> float:
    r"""Area under the ROC curve of ``e`` for the treated arm (Hanley & McNeil 1982, Radiology
    143:29), from mid-ranks (Mann–Whitney):

    .. math:: C = \frac{R_1 - n_1 (n_1 + 1) / 2}{n_1 n_0},

    :math:`R_1` the sum of the treated persons' ranks of ``e`` (ties share their mean rank).
    """
    a = np.asarray(a, dtype=float)
    n1 = float(a.sum())
    n0 = float(len(a) - n1)
    if n1 == 0 or n0 == 0:
        return float("nan")
    r = rankdata(np.asarray(e, dtype=float))
    return float((r[a == 1].sum() - n1 * (n1 + 1) / 2) / (n1 * n0))


def top_share(w: np.ndarray, share: float = 0.01) -> float:
    """Share of the total weight carried by the ``ceil(share * n)`` persons with the largest
    weights."""
    w = np.sort(np.asarray(w, dtype=float))[::-1]
    k = max(1, int(np.ceil(share * len(w))))
    tot = w.sum()
    return float(w[:k].sum() / tot) if tot > 0 else float("nan")


def weight_quantiles(w: np.ndarray) -> dict[str, float]:
    """The 1, 5, 25, 50, 75, 95 and 99% quantiles of the weights (numpy's linear interpolation)."""
    w = np.asarray(w, dtype=float)
    if w.size == 0:
        return {}
    return {f"{100 * q:g}%": float(v) for q, v in zip(WEIGHT_QUANTILES, np.quantile(w, WEIGHT_QUANTILES),
                                                    strict=True)}


def positivity_summary(a: np.ndarray, e: np.ndarray, weights: Mapping[str, np.ndarray],
                       arms: Sequence[str], model: Any = None, columns: Sequence[str] = (),
                       truncated: Mapping[str, bool] | None = None) -> dict[str, Any]:
    """The ``positivity.json`` content.

    Parameters
    ----------
    a : array of 0/1, 1 for the treated arm ``arms[0]``
    e : propensity of the treated arm
    weights : estimand -> weights
    arms : (treated arm name, comparator arm name)
    model : the fitted :class:`~emulant.models.propensity.PropensityModel` (for ``"model"``), optional
    columns : the design's column names
    truncated : estimand -> whether truncation was applied

    Returns
    -------
    dict
        ``n`` {arm: n}; ``propensity_bins`` {``edges`` (21), ``counts`` {arm: 20 ints}};
        ``c_statistic``; ``extreme`` {``low``, ``high``, ``n``, ``share``} (e below 0.025 or above
        0.975: common practice, no single source); ``weights`` {estimand: {``mean`` {arm},
        ``quantiles`` {"1%", "5%", ..., "99%": weight}, ``top1pct_share``, ``ess`` {arm: Kish ESS},
        ``truncated``}}; ``model`` {``converged``, ``penalized``, ``warnings``, ``columns``}.
    """
    a = np.asarray(a, dtype=float)
    e = np.asarray(e, dtype=float)
    treated, comparator = arms
    masks = {treated: a == 1, comparator: a == 0}
    edges = np.linspace(0.0, 1.0, N_BINS + 1)
    extreme = (e < EXTREME_LOW) | (e > EXTREME_HIGH)
    out: dict[str, Any] = {
        "n": {arm: int(m.sum()) for arm, m in masks.items()},
        "propensity_bins": {
            "edges": [round(float(x), 10) for x in edges],
            "counts": {arm: [int(c) for c in np.histogram(e[m], bins=edges)[0]]
                       for arm, m in masks.items()},
        },
        "c_statistic": c_statistic(a, e),
        "extreme": {"low": EXTREME_LOW, "high": EXTREME_HIGH, "n": int(extreme.sum()),
                    "share": float(extreme.mean()) if len(e) else float("nan")},
        "weights": {},
    }
    for est, w in weights.items():
        w = np.asarray(w, dtype=float)
        out["weights"][est] = {
            "mean": {arm: float(w[m].mean()) if m.any() else float("nan")
                     for arm, m in masks.items()},
            "quantiles": weight_quantiles(w),
            "top1pct_share": top_share(w),
            "ess": {arm: kish_ess(w[m]) for arm, m in masks.items()},
            "truncated": bool((truncated or {}).get(est, False)),
        }
    out["model"] = {
        "converged": bool(getattr(model, "converged_", True)) if model is not None else None,
        "penalized": bool(getattr(model, "penalized_", False)) if model is not None else None,
        "warnings": list(getattr(model, "warnings_", [])) if model is not None else [],
        "columns": list(columns),
    }
    return out


def positivity_of(fit: Any, protocol: Any) -> dict[str, Any]:
    """``positivity.json`` of a :class:`~emulant.models.weights.WeightsFit`: the summary above,
    with the columns the propensity design dropped and why."""
    arms = (protocol.strategies.treated, protocol.strategies.comparator)
    pos = positivity_summary(fit.treated, fit.propensity, fit.weights, arms, model=fit.model,
                             columns=fit.design.columns, truncated=fit.truncated)
    pos["model"]["dropped"] = [{"column": c, "reason": r} for c, r in fit.design.dropped]
    return pos
