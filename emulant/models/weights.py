"""Inverse probability weights per estimand, stabilising, truncation, effective sample size.

Frequency weights (``sample_weight``: ones for the point estimate, multinomial counts for a
bootstrap replicate) enter the arm shares and the truncation quantiles; they are never
multiplied into the returned weights (the estimators do that).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from emulant import columns
from emulant.cohort.covariates import adjustment_set, covariate_kinds
from emulant.errors import EmulantError
from emulant.models.design import build_design
from emulant.models.propensity import PropensityModel
from emulant.progress import Progress

ESTIMANDS = ("ATE", "ATT", "ATO")


class WeightsError(EmulantError, ValueError):
    """Weights cannot be formed (bad estimand, propensity outside (0, 1), bad input)."""


def weighted_quantile(x: np.ndarray, q: float | np.ndarray,
                      sample_weight: np.ndarray | None = None) -> np.ndarray:
    r"""Quantile of ``x`` with frequency weights, equal to ``np.quantile`` (linear interpolation,
    Hyndman & Fan 1996 type 7) of the sample in which row :math:`i` is repeated :math:`f_i` times.

    With the rows sorted and :math:`F_k = \sum_{i \le k} f_i`, :math:`N = F_n`, the position is
    :math:`h = (N - 1) q` (0-based); the value at position :math:`m` of the repeated sample is the
    first :math:`x_{(k)}` with :math:`F_k > m`.
    """
    x = np.asarray(x, dtype=float)
    if sample_weight is None:
        return np.quantile(x, q)
    f = np.asarray(sample_weight, dtype=float)
    pos = f > 0
    xs, fs = x[pos], f[pos]
    order = np.argsort(xs, kind="stable")
    xs, cum = xs[order], np.cumsum(fs[order])
    h = (cum[-1] - 1.0) * np.asarray(q, dtype=float)
    lo = np.floor(h)

    def at(m: np.ndarray) -> np.ndarray:
        return xs[np.minimum(np.searchsorted(cum, m, side="right"), len(xs) - 1)]

    return at(lo) + (h - lo) * (at(lo + 1) - at(lo))


def estimand_weights(a: np.ndarray, e: np.ndarray, estimand: str, stabilize: bool = True,
                     truncate: tuple[float, float] | None = None,
                     sample_weight: np.ndarray | None = None) -> np.ndarray:
    r"""Weights for one estimand from the treated indicator ``a`` and the propensity ``e``.

    .. math::

        \text{ATE: } w_i = \frac{a_i}{e_i} + \frac{1 - a_i}{1 - e_i}
        \quad (\times\ \hat P(A = a_i) \text{ when stabilised}),

        \text{ATT: } w_i = a_i + (1 - a_i) \frac{e_i}{1 - e_i}, \qquad
        \text{ATO: } w_i = a_i (1 - e_i) + (1 - a_i) e_i .

    ATE weights: Rosenbaum 1987 (JASA 82:387); stabilised by the arm's (frequency-weighted)
    share, Robins, Hernán & Brumback 2000 (Epidemiology 11:550). ATT weights: Sato & Matsuyama
    2003 (Epidemiology 14:680). Overlap weights (ATO): Li, Morgan & Zaslavsky 2018 (JASA
    113:390). ``stabilize`` changes the ATE weights only: the ATT weights are already on the
    treated arm's scale and the overlap weights are bounded by 1 (a constant factor per arm
    does not change a weighted mean).

    ``truncate=(lo, hi)`` winsorises the weights at the ``lo`` and ``hi`` quantiles of this
    estimand's weights over the whole cohort (frequency-weighted, :func:`weighted_quantile`);
    it is never applied to ATO (Cole & Hernán 2008, Am J Epidemiol 168:656, for truncation).
    """
    a = np.asarray(a, dtype=float)
    e = np.asarray(e, dtype=float)
    if estimand not in ESTIMANDS:
        raise WeightsError(f"unknown estimand {estimand!r} (expected one of {', '.join(ESTIMANDS)})")
    if a.shape != e.shape:
        raise WeightsError(f"a has shape {a.shape} but e has {e.shape}")
    f = np.ones_like(a) if sample_weight is None else np.asarray(sample_weight, dtype=float)
    bad = ~((e > 0) & (e < 1))
    if bad.any():
        raise WeightsError(f"propensity outside (0, 1) for {int(bad.sum())} person(s) (first at "
                           f"row {int(np.flatnonzero(bad)[0])}): positivity fails there")
    if estimand == "ATO":
        return a * (1.0 - e) + (1.0 - a) * e
    if estimand == "ATE":
        w = a / e + (1.0 - a) / (1.0 - e)
        if stabilize:
            share = (f @ a) / f.sum()
            w = w * np.where(a == 1, share, 1.0 - share)
    else:
        w = a + (1.0 - a) * e / (1.0 - e)
    if truncate is not None:
        lo, hi = weighted_quantile(w, np.asarray(truncate, dtype=float), sample_weight)
        w = np.clip(w, lo, hi)
    return w


def kish_ess(w: np.ndarray, sample_weight: np.ndarray | None = None) -> float:
    r"""Kish's effective sample size :math:`(\sum f_i w_i)^2 / \sum f_i w_i^2`
    (Kish 1965, Survey Sampling, §11.7)."""
    w = np.asarray(w, dtype=float)
    f = np.ones_like(w) if sample_weight is None else np.asarray(sample_weight, dtype=float)
    den = f @ (w * w)
    return float((f @ w) ** 2 / den) if den > 0 else 0.0


def treated_indicator(cohort: pd.DataFrame) -> np.ndarray:
    """The cohort's 0/1 ``treated`` column as floats (1 for ``strategies.treated``)."""
    if "treated" not in cohort.columns:
        raise WeightsError("cohort has no column 'treated'")
    a = pd.to_numeric(cohort["treated"], errors="coerce").to_numpy(dtype=float)
    bad = ~np.isin(a, (0.0, 1.0))
    if bad.any():
        raise WeightsError(f"cohort column 'treated' must be 0 or 1; row {int(np.flatnonzero(bad)[0])}"
                           f" holds {cohort['treated'].iloc[int(np.flatnonzero(bad)[0])]!r}")
    return a


def resolve_kinds(protocol: Any, cohort: pd.DataFrame) -> dict[str, str]:
    """Covariate kinds, as :func:`emulant.cohort.covariates.covariate_kinds` decides them."""
    return dict(covariate_kinds(protocol, cohort))


def design_for(cohort: pd.DataFrame, protocol: Any):
    """The propensity :class:`~emulant.models.propensity.Design` the protocol asks for."""
    kinds = resolve_kinds(protocol, cohort)
    return build_design(cohort, adjustment_set(protocol, cohort), kinds,
                        protocol.analysis.propensity.continuous)


@dataclass
class WeightsFit:
    """The fitted propensity model and the weights of every estimand (``weights.parquet``)."""

    table: pd.DataFrame  # person_id, arm, propensity and columns.weight(estimand) per estimand
    treated: np.ndarray  # 0/1 per person
    propensity: np.ndarray
    weights: dict[str, np.ndarray]  # per estimand
    truncated: dict[str, bool]  # per estimand: were the weights winsorised
    model: PropensityModel
    design: Any


def fit_weights(cohort: pd.DataFrame, protocol: Any) -> WeightsFit:
    """Fit the propensity model and form the weights of every estimand of the protocol.

    Returns a :class:`WeightsFit`; its ``table`` is ``weights.parquet`` (CONTRACTS §4):
    ``person_id, arm, propensity`` and ``columns.weight(estimand)`` per estimand. The positivity
    summary (``positivity.json``) is :func:`emulant.models.positivity.positivity_of` of it.
    """
    done = Progress("weights (design, propensity model, each estimand)", 2 + len(protocol.estimands))
    design = design_for(cohort, protocol)
    X = design.transform(cohort)
    a = treated_indicator(cohort)
    done.step()
    # sampled non-initiators stand for 1/share person-trials each (CONTRACTS §5c)
    sw = cohort["sample_weight"].to_numpy(float) if "sample_weight" in cohort.columns else None
    model = PropensityModel().fit(X, a, columns=design.columns, sample_weight=sw)
    e = model.predict(X)
    done.step()
    settings = protocol.analysis.weights
    w = {}
    for est in protocol.estimands:
        w[est] = estimand_weights(a, e, est, settings.stabilize, settings.truncate,
                                  sample_weight=sw)
        done.step()
    done.close()
    out = pd.DataFrame({c: cohort[c].to_numpy() for c in ("person_id", "trial", "arm")
                        if c in cohort.columns})
    out["propensity"] = e
    for est, v in w.items():
        out[columns.weight(est)] = v
    truncated = {est: settings.truncate is not None and est != "ATO" for est in w}
    return WeightsFit(out, a, e, w, truncated, model, design)
