"""One analysis sample: what every estimator of one bootstrap replicate (or the point estimate) needs.

The rows of the cohort are never copied or resampled; a replicate differs only in ``freq``, the
frequency weights (multinomial counts), and in what was refitted with them (``e``, ``weights``,
``censoring``).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from functools import partial
from typing import Any

import numpy as np
import pandas as pd

from emulant import columns
from emulant.errors import ReplicateFailure
from emulant.models.propensity import PropensityModel
from emulant.models.weights import estimand_weights
from emulant.protocol import MeasuredOutcome, Protocol

TREATED = "treated"  # cohort.parquet: 1 for strategies.treated (see emulant/columns.py docstring)


class SampleError(ReplicateFailure):
    """A sample that cannot be analysed (an arm without anyone, a model that did not converge).

    In a bootstrap replicate it marks the replicate as failed; ``reason`` is a short tag that
    the bootstrap counts (e.g. ``"empty arm"``, ``"propensity not converged"``).
    """


@dataclass(frozen=True)
class AnalysisSample:
    cohort: pd.DataFrame  # cohort.parquet as read; the same object for every replicate
    protocol: Protocol
    X: np.ndarray  # covariate design, n x p, no intercept (propensity.Design.transform)
    columns: tuple[str, ...]  # names of X's columns
    a: np.ndarray  # 1 for the treated arm (strategies.treated), 0 for the comparator
    freq: np.ndarray  # frequency weights: ones for the point estimate, counts for a replicate
    e: np.ndarray  # propensity of the treated arm, fitted with freq
    weights: Mapping[str, np.ndarray]  # estimand -> weight, fitted with freq; freq NOT multiplied in
    # measured outcome -> observation weight r_i: 0 where unmeasured, 1/P(measured | a, X) where
    # measured (missing: censor), 1 where measured (complete_case, or nobody unmeasured).
    # freq NOT multiplied in.
    censoring: Mapping[str, np.ndarray] = field(default_factory=dict)
    warnings: tuple[str, ...] = ()  # fits that did not converge (a replicate with any fails)
    # outcome -> hazard model -> coefficients its Newton's method starts from (a replicate
    # starts from the point estimate's); the sample's own fits are recorded in ``fitted``
    starts: Mapping[str, Mapping[str, np.ndarray]] = field(default_factory=dict)
    fitted: dict[str, dict[str, np.ndarray]] = field(default_factory=dict)

    @property
    def n(self) -> int:
        return int(len(self.a))

    @property
    def treated_arm(self) -> str:
        return self.protocol.strategies.treated

    @property
    def comparator_arm(self) -> str:
        return self.protocol.strategies.comparator


def treatment_indicator(cohort: pd.DataFrame) -> np.ndarray:
    """The cohort's ``treated`` column as a float array of 0/1."""
    if TREATED not in cohort.columns:
        raise SampleError("bad cohort", f"cohort has no column '{TREATED}'")
    a = cohort[TREATED].to_numpy(dtype=float)
    if not np.isin(a, (0.0, 1.0)).all():
        raise SampleError("bad cohort", f"cohort column '{TREATED}' must hold only 0 and 1")
    return a


def check_arms(a: np.ndarray, freq: np.ndarray) -> None:
    """Raise :class:`SampleError` when an arm has no one with a positive frequency weight."""
    for k, label in ((1.0, "treated"), (0.0, "comparator")):
        if not np.any(freq[a == k] > 0):
            raise SampleError("empty arm", f"no one in the {label} arm")


def measured_indicator(cohort: pd.DataFrame, measure: str) -> np.ndarray:
    """1.0 where the measured outcome has a value, else 0.0 (``measured__<m>`` and ``value__<m>``)."""
    vcol, mcol = columns.value(measure), columns.measured(measure)
    if vcol not in cohort.columns:
        raise SampleError("bad cohort", f"cohort has no column '{vcol}' (measured outcome '{measure}')")
    has_value = cohort[vcol].notna().to_numpy()
    if mcol in cohort.columns:
        flag = cohort[mcol].fillna(0).to_numpy(dtype=float) > 0
        has_value = has_value & flag
    return has_value.astype(float)


def censoring_weights(outcome: MeasuredOutcome, measured: np.ndarray, a: np.ndarray,
                      X: np.ndarray, freq: np.ndarray, model_factory: Any) -> tuple[np.ndarray, bool]:
    r"""Inverse probability of being measured, for a measured outcome with ``missing: censor``.

    A logistic model of being measured given arm and covariates, fitted with the frequency
    weights, gives :math:`\hat p_i = P(M_i = 1 \mid A_i, X_i)`; the observation weight is

    .. math:: r_i = M_i / \hat p_i ,

    unstabilised: a stabilising numerator constant within an arm (e.g. :math:`P(M=1 \mid A)`)
    would leave the Hájek and weighted-regression estimates unchanged but would bias the
    Horvitz–Thompson form of the augmented estimator, so none is applied. With
    ``complete_case``, or when no one (with a positive frequency) is unmeasured, :math:`r_i = M_i`.
    Source: Robins, Rotnitzky & Zhao (1995), JASA 90:106–121; Hernán & Robins, *Causal
    Inference: What If*, §12.6.

    Returns the weights and whether the model converged (True when no model was needed).
    """
    if outcome.missing != "censor" or not np.any(freq[measured == 0] > 0):
        return measured.copy(), True
    Z = np.column_stack([a, X])
    model = model_factory().fit(Z, measured, sample_weight=freq)
    p = np.asarray(model.predict(Z), dtype=float)
    r = np.where(measured > 0, 1.0 / np.clip(p, 1e-12, None), 0.0)
    return r, bool(getattr(model, "converged_", True))


def build_sample(cohort: pd.DataFrame, protocol: Protocol, design: Any,
                 X: np.ndarray | None = None, freq: np.ndarray | None = None,
                 starts: Mapping | None = None) -> AnalysisSample:
    """Fit one replicate: propensity, each estimand's weights and the censoring weights, with ``freq``.

    Parameters
    ----------
    cohort : the cohort table (cohort.parquet), shared by every replicate, never copied.
    protocol : the parsed protocol.
    design : :class:`emulant.models.propensity.Design`, learned once on the whole cohort.
    X : ``design.transform(cohort)``; computed when None (pass it to avoid recomputing it).
    freq : non-negative integer frequency weights; ones when None (the point estimate).
    starts : outcome -> hazard model -> starting coefficients (the point estimate's).

    Raises
    ------
    SampleError
        When an arm has no one with a positive frequency weight.
    """
    X = np.asarray(design.transform(cohort) if X is None else X, dtype=float)
    if X.ndim != 2 or len(X) != len(cohort):
        raise TypeError(f"build_sample: X must be the n x p design ({len(cohort)} rows), got shape "
                        f"{X.shape}; pass frequency weights as freq=")
    a = treatment_indicator(cohort)
    freq = np.ones(len(a)) if freq is None else np.asarray(freq, dtype=float)
    check_arms(a, freq)
    warnings: list[str] = []
    cols = tuple(getattr(design, "columns", ()) or ())
    names = cols if len(cols) == X.shape[1] else None
    model = PropensityModel(column_names=names).fit(X, a, sample_weight=freq)
    e = np.asarray(model.predict(X), dtype=float)
    if not bool(getattr(model, "converged_", True)):
        warnings.append("propensity not converged")
    ws = protocol.analysis.weights
    weights = {
        est: np.asarray(estimand_weights(a, e, est, ws.stabilize,
                                         None if est == "ATO" else ws.truncate,
                                         sample_weight=freq), dtype=float)
        for est in protocol.estimands
    }
    censoring = {}
    for outcome in protocol.outcomes.measured():
        m = measured_indicator(cohort, outcome.measure)
        factory = partial(PropensityModel, column_names=("arm", *names) if names else None)
        r, ok = censoring_weights(outcome, m, a, X, freq, factory)
        if not ok:
            warnings.append("censoring model not converged")
        censoring[outcome.measure] = r
    return AnalysisSample(cohort, protocol, X, cols, a, freq, e, weights, censoring, tuple(warnings),
                          dict(starts or {}))
