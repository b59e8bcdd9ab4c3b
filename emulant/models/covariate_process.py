"""Models of how the time-varying covariates and binary events evolve, for the parametric g-formula.

The parametric g-formula (Robins 1986, Math Modelling 7:1393; Taubman et al. 2009, Int J
Epidemiol 38:1599; Hernán & Robins, *Causal Inference: What If*, ch. 21) needs the distribution
of each time-varying covariate given the past, and the probability of each event given the past.
This module fits them on person-period rows with frequency weights (ones for the point estimate,
the replicate's counts in the bootstrap) and draws from them:

* a **continuous** covariate: linear regression (weighted least squares), drawn as the fitted
  mean plus a residual resampled with the fit's frequency weights (a nonparametric error
  distribution; Taubman et al. 2009 draw from a normal, resampling keeps skewness);
* a **binary** covariate or event: logistic regression
  (:class:`emulant.models.propensity.PropensityModel`, with its ridge refit on separation), drawn
  as a Bernoulli of the fitted probability. A value that never varies in the fitting rows is
  that value with probability 1.

Design columns that are linear combinations of the intercept and earlier columns in the fitting
rows (a constant column, period indicators that add up to the intercept) are dropped before the
fit (each column's variance left after projecting it on the columns kept before it, from the
Gram matrix of the centred columns: a Cholesky-style elimination, Golub & Van Loan 2013, §4.2),
so a saturated design fits exactly and predicts with the columns kept.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from emulant.models.propensity import PropensityModel, PropensityWarning

RANK_TOL = 1e-9


def independent_columns(Z: np.ndarray, f: np.ndarray) -> np.ndarray:
    """Mask of the columns of ``Z`` kept: each column in order is kept when it is not (within
    ``RANK_TOL`` of its variance) a linear combination of the intercept and the columns kept
    before it, over the rows with ``f > 0`` (on the Gram matrix of the centred columns)."""
    Z = np.asarray(Z, dtype=float)
    keep = np.zeros(Z.shape[1], dtype=bool)
    rows = np.asarray(f, dtype=float) > 0
    if not Z.shape[1] or not rows.any():
        return keep
    Zc = Z[rows] - Z[rows].mean(axis=0)
    G = Zc.T @ Zc
    chosen: list[int] = []
    for j in range(Z.shape[1]):
        if G[j, j] <= 1e-12 * max(1.0, float(np.abs(Zc[:, j]).max()) ** 2):
            continue
        if chosen:
            c = np.asarray(chosen)
            b = np.linalg.solve(G[np.ix_(c, c)], G[c, j])
            resid = G[j, j] - G[j, c] @ b
        else:
            resid = G[j, j]
        if resid > RANK_TOL * G[j, j]:
            chosen.append(j)
    keep[chosen] = True
    return keep


@dataclass
class FittedModel:
    """One fitted model of a value given design rows: ``kind`` is ``continuous`` or ``binary``.

    ``keep`` masks the design columns used; ``intercept``, ``coef`` their coefficients (linear
    predictor); ``residuals``/``residual_weights`` the continuous fit's residuals and their
    frequency weights; ``constant``: a binary value that never varied (its value), else None.
    """

    kind: str
    keep: np.ndarray
    intercept: float
    coef: np.ndarray
    residuals: np.ndarray | None = None
    residual_weights: np.ndarray | None = None
    constant: float | None = None
    converged: bool = True

    def linear(self, Z: np.ndarray) -> np.ndarray:
        """The linear predictor (the mean of a continuous value, the logit of a binary one)."""
        Z = np.asarray(Z, dtype=float)
        return self.intercept + Z[:, self.keep] @ self.coef

    def mean(self, Z: np.ndarray) -> np.ndarray:
        """The fitted mean (a probability for a binary value)."""
        if self.constant is not None:
            return np.full(np.shape(Z)[0], self.constant)
        eta = self.linear(Z)
        if self.kind == "binary":
            return 1.0 / (1.0 + np.exp(-np.clip(eta, -700, 700)))
        return eta

    def draw(self, Z: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """One value per row: mean plus a resampled residual, or a Bernoulli draw."""
        m = self.mean(Z)
        if self.kind == "binary":
            return (rng.random(m.size) < m).astype(float)
        if self.residuals is None or not self.residuals.size:
            return m
        p = self.residual_weights / self.residual_weights.sum()
        return m + self.residuals[rng.choice(self.residuals.size, size=m.size, p=p)]


def fit_linear(Z: np.ndarray, y: np.ndarray, f: np.ndarray) -> FittedModel:
    """Weighted least squares of ``y`` on ``[1, Z]`` (frequency weights ``f``), with residuals."""
    Z, y, f = np.asarray(Z, float), np.asarray(y, float), np.asarray(f, float)
    rows = f > 0
    keep = independent_columns(Z, f)
    A = np.column_stack([np.ones(int(rows.sum())), Z[rows][:, keep]])
    sw = np.sqrt(f[rows])
    beta = np.linalg.lstsq(A * sw[:, None], y[rows] * sw, rcond=None)[0]
    res = y[rows] - A @ beta
    return FittedModel("continuous", keep, float(beta[0]), beta[1:], res, f[rows])


def fit_logistic(Z: np.ndarray, y: np.ndarray, f: np.ndarray) -> FittedModel:
    """Logistic regression of a 0/1 ``y`` on ``[1, Z]`` (frequency weights ``f``)."""
    Z, y, f = np.asarray(Z, float), np.asarray(y, float), np.asarray(f, float)
    rows = f > 0
    keep = independent_columns(Z, f)
    t1 = float(f[rows] @ y[rows])
    if t1 <= 0 or t1 >= f[rows].sum():
        value = 1.0 if t1 > 0 else 0.0
        return FittedModel("binary", keep, np.nan, np.zeros(int(keep.sum())), constant=value)
    with warnings.catch_warnings():  # separation: the ridge refit of PropensityModel handles it
        warnings.simplefilter("ignore", PropensityWarning)
        model = PropensityModel().fit(Z[rows][:, keep], y[rows], sample_weight=f[rows])
    return FittedModel("binary", keep, float(model.intercept_), np.asarray(model.coef_, float),
                       converged=bool(model.converged_))


def fit_value(kind: str, Z: np.ndarray, y: np.ndarray, f: np.ndarray) -> FittedModel:
    """The model of a value of this kind: linear for ``continuous``, logistic for ``binary``."""
    return fit_linear(Z, y, f) if kind == "continuous" else fit_logistic(Z, y, f)
