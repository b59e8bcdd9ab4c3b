"""The propensity model: a logistic regression for the probability of the treated arm.

The design matrix lives in :mod:`emulant.models.design` (re-exported here: ``build_design``, ``Design``).
:class:`PropensityModel` is a logistic regression for :math:`e(x) = P(A = 1 \\mid X = x)` fitted by
Newton–Raphson (iteratively reweighted least squares) with frequency weights; quasi-complete
separation or a fit that does not converge is reported and refitted with a light ridge penalty.
"""

from __future__ import annotations

import warnings
import weakref
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy.special import expit

from emulant.errors import EmulantError
from emulant.models.design import (  # noqa: F401 - re-exported: the design is part of this module's interface
    CONTINUOUS,
    Design,
    DesignError,
    Term,
    build_design,
    rcs_basis,
)


class PropensityError(EmulantError, ValueError):
    """The propensity model cannot be fitted (bad shapes, a non-0/1 treatment, an empty arm)."""


class PropensityWarning(UserWarning):
    """The propensity model met separation or did not converge (see ``PropensityModel``)."""


# ----------------------------------------------------------------------------- the model


@dataclass(frozen=True)
class _Prepared:
    """What a fit needs from ``X`` alone: centred, scaled columns (unweighted mean ``mu``;
    ``scale`` the SD, or the range of a two-valued column), their squares, and the two-valued
    columns with the rows holding their larger value."""

    Z: np.ndarray
    Z2: np.ndarray
    mu: np.ndarray
    scale: np.ndarray
    two: np.ndarray
    top: np.ndarray


_CACHE: list[tuple[Any, tuple, float, _Prepared]] = []  # (weakref to X, shape, fingerprint, prep)


def _prepared(X: np.ndarray) -> _Prepared:
    """Prepare ``X`` once for the many refits of a bootstrap: a two-entry cache keyed by the
    array object and a fingerprint of its content (a modified array is prepared anew)."""
    n, p = X.shape
    fp = float(X.ravel() @ _probe(X.size))
    for ref, shape, fprint, prep in _CACHE:
        if ref() is X and shape == X.shape and fprint == fp:
            return prep
    mu = X.mean(axis=0) if n else np.zeros(p)
    sd = X.std(axis=0) if n else np.ones(p)
    lo, hi = (X.min(axis=0), X.max(axis=0)) if n else (np.zeros(p), np.zeros(p))
    two = np.flatnonzero(((X == lo) | (X == hi)).all(axis=0) & (hi > lo))
    scale = np.where(sd > 0, sd, 1.0)
    scale[two] = (hi - lo)[two]
    Z = (X - mu) / scale
    prep = _Prepared(Z, Z * Z, mu, scale, two, (X[:, two] == hi[two]).astype(float))
    try:
        ref = weakref.ref(X)
    except TypeError:
        return prep
    _CACHE.insert(0, (ref, X.shape, fp, prep))
    del _CACHE[2:]
    return prep


_PROBES: dict[int, np.ndarray] = {}


def _probe(size: int) -> np.ndarray:
    if size not in _PROBES:
        _PROBES.clear()
        _PROBES[size] = np.random.default_rng(0).random(size)
    return _PROBES[size]


@dataclass
class PropensityModel:
    r"""Logistic regression for the propensity of the treated arm, with frequency weights.

    Maximises :math:`\sum_i f_i [a_i \eta_i - \log(1 + e^{\eta_i})] - \frac{\lambda}{2}
    \lVert \tilde\beta \rVert^2`, :math:`\eta_i = \beta_0 + x_i^\top \beta`, by Newton–Raphson
    (equivalently IRLS; McCullagh & Nelder 1989, Generalized Linear Models, §4.4) on centred and
    scaled columns (:math:`\tilde\beta_j = \beta_j s_j`, :math:`s_j` the standard deviation, or
    the range of a two-valued column), with step halving. :math:`\lambda = 0` first.

    Quasi-complete separation (a two-valued column one of whose values occurs in one arm only,
    Albert & Anderson 1984, Biometrika 71:1), a fit that has not converged after ``max_iter``
    steps, or fitted probabilities at 0 or 1 give a :class:`PropensityWarning` naming the columns
    involved (also kept in ``warnings_``), and the model is refitted with the ridge penalty
    :math:`\lambda` = ``penalty`` (le Cessie & van Houwelingen 1992, Appl Stat 41:191), which
    keeps every coefficient finite; ``penalized_`` is then True. With ``penalty=0`` the
    unpenalised (warned) fit is kept.

    Attributes
    ----------
    intercept_ : float
    coef_ : ndarray, one per design column (original scale)
    converged_, penalized_ : bool
    n_iter_ : int
    warnings_ : list of str
    """

    penalty: float = 1.0
    max_iter: int = 30
    tol: float = 1e-9
    warm_start: bool = False
    column_names: tuple[str, ...] | None = None
    intercept_: float = field(default=np.nan, init=False)
    coef_: np.ndarray = field(default_factory=lambda: np.empty(0), init=False)
    converged_: bool = field(default=False, init=False)
    penalized_: bool = field(default=False, init=False)
    n_iter_: int = field(default=0, init=False)
    warnings_: list[str] = field(default_factory=list, init=False)

    def fit(self, X: np.ndarray, a: np.ndarray, sample_weight: np.ndarray | None = None,
            columns: Iterable[str] | None = None) -> PropensityModel:
        """Fit on design ``X`` (no intercept), treated indicator ``a``, frequency weights."""
        X = np.asarray(X, dtype=float)
        a = np.asarray(a, dtype=float)
        n, p = X.shape
        f = np.ones(n) if sample_weight is None else np.asarray(sample_weight, dtype=float)
        if a.shape != (n,) or f.shape != (n,):
            raise PropensityError(f"X has {n} rows but a has {a.shape} and sample_weight {f.shape}")
        if not ((a == 0.0) | (a == 1.0)).all():
            raise PropensityError("the treated indicator must be 0 or 1")
        names = list(columns) if columns is not None else list(
            self.column_names or [f"x{j}" for j in range(p)])
        self.warnings_ = []
        f1, f0 = f * a, f * (1.0 - a)
        t1, t0 = f1.sum(), f0.sum()
        if not (t1 > 0 and t0 > 0):
            raise PropensityError("both arms need persons with positive weight to fit a propensity model")
        prep = _prepared(X)
        tot = t1 + t0
        mz = (f @ prep.Z) / tot
        vz = np.maximum((f @ prep.Z2) / tot - mz * mz, 0.0)  # weighted variance, Z scale
        live = vz > 1e-12
        rel = vz.copy()  # squared (weighted SD / s0): the ridge penalty per Z coefficient
        problems = _two_valued(prep, f1, f0, names, live, rel)
        Z = prep.Z if live.all() else prep.Z[:, live]
        zn = [nm for nm, ok in zip(names, live, strict=True) if ok]
        start = np.zeros(Z.shape[1] + 1)
        start[0] = np.log(t1 / t0)
        if self.warm_start and self.coef_.shape == (p,) and np.isfinite(self.intercept_):
            start = np.concatenate([[self.intercept_ + self.coef_ @ prep.mu],
                                    (self.coef_ * prep.scale)[live]])
        if not problems:
            beta, conv, it, eta = _newton(Z, a, f, np.zeros(Z.shape[1]), start, self.max_iter,
                                          self.tol)
            edge = (f > 0) & ((eta > 30) | (eta < -30))
            if not conv or edge.any():
                per_sd = np.abs(beta[1:]) * np.sqrt(rel[live])
                top3 = np.argsort(-per_sd)[:3]
                what = "did not converge" if not conv else (
                    f"gives fitted probabilities of 0 or 1 for {int(edge.sum())} person(s)")
                problems = [f"the logistic fit {what}; largest coefficients (per SD): " + ", ".join(
                    f"{zn[j]} ({per_sd[j]:.1f})" for j in top3)]
                start[1:] = 0.0
        if problems:
            msg = ("propensity model: quasi-complete separation or non-convergence: "
                   + "; ".join(problems))
            if self.penalty > 0:
                msg += f". Refitted with a ridge penalty (lambda = {self.penalty:g})."
                beta, conv, it, _ = _newton(Z, a, f, self.penalty * rel[live], start, 100,
                                            self.tol)
            warnings.warn(msg, PropensityWarning, stacklevel=2)
            self.warnings_.append(msg)
        self.penalized_ = bool(problems) and self.penalty > 0
        self.converged_ = bool(conv)
        self.n_iter_ = int(it)
        coef = np.zeros(p)
        coef[live] = beta[1:] / prep.scale[live]
        self.coef_ = coef
        self.intercept_ = float(beta[0] - coef @ prep.mu)
        self.column_names = tuple(names)
        return self

    def decision_function(self, X: np.ndarray) -> np.ndarray:
        return self.intercept_ + np.asarray(X, dtype=float) @ self.coef_

    def predict(self, X: np.ndarray) -> np.ndarray:
        """Propensity :math:`e(x) = 1 / (1 + e^{-\\eta})` of the treated arm."""
        return expit(self.decision_function(X))

    @property
    def summary(self) -> pd.DataFrame:
        """The fitted coefficients (original scale), intercept first."""
        return pd.DataFrame({"term": ["(intercept)", *(self.column_names or ())],
                             "coef": np.r_[self.intercept_, self.coef_]})

    def to_dict(self) -> dict[str, Any]:
        return {"converged": self.converged_, "penalized": self.penalized_,
                "n_iter": self.n_iter_, "warnings": list(self.warnings_),
                "intercept": self.intercept_,
                "coef": dict(zip(self.column_names or (), map(float, self.coef_), strict=True))}


def _two_valued(prep: _Prepared, f1: np.ndarray, f0: np.ndarray, names: list[str],
                live: np.ndarray, rel: np.ndarray) -> list[str]:
    """Two-valued columns: live only when both values carry weight, penalised per unit of range
    (``live`` and ``rel`` are updated in place); returns the quasi-complete separations found
    (one value of a column occurring in one arm only; Albert & Anderson 1984)."""
    problems = []
    if not len(prep.two):
        return problems
    t1, t0 = f1.sum(), f0.sum()
    w1, w0 = f1 @ prep.top, f0 @ prep.top
    for j, c1, c0 in zip(prep.two, w1, w0, strict=True):
        live[j] = (c1 + c0 > 0) and (t1 + t0 - c1 - c0 > 0)
        rel[j] = 1.0
        for label, g1, g0 in (("the larger value", c1, c0), ("the smaller value", t1 - c1, t0 - c0)):
            if live[j] and (g1 == 0) != (g0 == 0):
                arm = "treated" if g0 == 0 else "comparator"
                problems.append(f"{names[j]}: every person with {label} is in the {arm} arm "
                                f"({int(g1 + g0)} person(s))")
    return problems


def _newton(Z: np.ndarray, a: np.ndarray, f: np.ndarray, lam: np.ndarray, beta: np.ndarray,
            max_iter: int, tol: float) -> tuple[np.ndarray, bool, int, np.ndarray]:
    """Newton–Raphson with step halving for the weighted log-likelihood with ridge penalties
    ``lam`` (one per column, none on the intercept); returns (beta, converged, iterations,
    linear predictor)."""
    pen = np.concatenate([[0.0], lam])
    beta = beta.copy()
    fa = f * a

    def objective(eta: np.ndarray, b: np.ndarray) -> float:
        return float(fa @ eta - f @ np.logaddexp(0.0, eta) - 0.5 * pen @ (b * b))

    eta = beta[0] + Z @ beta[1:]
    obj = objective(eta, beta)
    buf = np.empty_like(Z)
    for it in range(1, max_iter + 1):
        e = expit(eta)
        r = fa - f * e
        v = f * e * (1.0 - e)
        zrv = Z.T @ np.column_stack([r, v])
        grad = np.concatenate([[r.sum()], zrv[:, 0]]) - pen * beta
        zv = zrv[:, 1]
        zs = np.multiply(Z, np.sqrt(v)[:, None], out=buf)
        hess = np.empty((len(beta), len(beta)))
        hess[0, 0] = v.sum()
        hess[0, 1:] = hess[1:, 0] = zv
        hess[1:, 1:] = zs.T @ zs
        hess[np.diag_indices_from(hess)] += pen
        try:
            step = np.linalg.solve(hess, grad)
        except np.linalg.LinAlgError:
            step = np.linalg.lstsq(hess, grad, rcond=None)[0]
        dz = step[0] + Z @ step[1:]
        t = 1.0
        for _ in range(30):
            new_eta = eta + t * dz
            new = objective(new_eta, beta + t * step)
            if new >= obj - 1e-12 * abs(obj):
                break
            t *= 0.5
        beta, eta, obj = beta + t * step, new_eta, new
        if np.max(np.abs(t * step)) < tol:
            return beta, True, it, eta
    return beta, False, max_iter, eta
