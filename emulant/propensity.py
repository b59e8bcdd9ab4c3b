"""The propensity model and its design matrix.

:func:`build_design` learns, once on the whole cohort, how each covariate enters the model
(spline knots, category levels and reference levels, missing indicators) and returns a frozen
:class:`Design`; every bootstrap replicate reuses it through :meth:`Design.transform`.
:class:`PropensityModel` is a logistic regression for :math:`e(x) = P(A = 1 \\mid X = x)` fitted by
Newton–Raphson (iteratively reweighted least squares) with frequency weights; quasi-complete
separation or a fit that does not converge is reported and refitted with a light ridge penalty.
"""

from __future__ import annotations

import warnings
import weakref
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy.special import expit

from emulant import columns
from emulant.errors import EmulantError

CONTINUOUS = ("spline", "quadratic", "linear")
#: Knot quantiles for a restricted cubic spline with 4 and 3 knots (Harrell 2015, Regression
#: Modeling Strategies, 2nd ed., Table 2.3).
KNOTS_4 = (0.05, 0.35, 0.65, 0.95)
KNOTS_3 = (0.10, 0.50, 0.90)
_RANK_TOL = 1e-8  # a column whose residual on the earlier ones is below this share is dependent


class DesignError(EmulantError, ValueError):
    """A covariate cannot enter the design; the message names the column and the problem."""


class PropensityError(EmulantError, ValueError):
    """The propensity model cannot be fitted (bad shapes, a non-0/1 treatment, an empty arm)."""


class PropensityWarning(UserWarning):
    """The propensity model met separation or did not converge (see ``PropensityModel``)."""


# ----------------------------------------------------------------------------- the design


def rcs_basis(x: np.ndarray, knots: Iterable[float]) -> np.ndarray:
    r"""Restricted (natural) cubic spline basis, without the linear term.

    For knots :math:`t_1 < \dots < t_k` the :math:`k-2` nonlinear columns are

    .. math::

        s_j(x) = \frac{(x-t_j)_+^3 - (x-t_{k-1})_+^3 \frac{t_k-t_j}{t_k-t_{k-1}}
                 + (x-t_k)_+^3 \frac{t_{k-1}-t_j}{t_k-t_{k-1}}}{(t_k-t_1)^2},
        \quad j = 1, \dots, k-2,

    linear beyond the outer knots. Harrell's parameterisation (Harrell 2015, Regression Modeling
    Strategies, 2nd ed., §2.4.5), scaled by :math:`(t_k-t_1)^2` as his ``rcspline.eval`` does.
    """
    t = np.asarray(tuple(knots), dtype=float)
    k = len(t)
    x = np.asarray(x, dtype=float)
    if k < 3:
        return np.empty((len(x), 0))
    d = t[-1] - t[-2]

    def cube(u: np.ndarray) -> np.ndarray:
        return np.maximum(u, 0.0) ** 3

    out = np.empty((len(x), k - 2))
    for j in range(k - 2):
        out[:, j] = (cube(x - t[j]) - cube(x - t[-2]) * (t[-1] - t[j]) / d
                     + cube(x - t[-1]) * (t[-2] - t[j]) / d)
    return out / (t[-1] - t[0]) ** 2


def _dependent(m: np.ndarray) -> np.ndarray:
    """Boolean mask of columns of ``m`` that are (numerically) linear in an intercept and the
    columns before them: unpivoted QR, :math:`|R_{jj}|` against the centred column's norm."""
    if m.shape[1] == 0:
        return np.zeros(0, dtype=bool)
    c = m - m.mean(axis=0)
    norms = np.linalg.norm(c, axis=0)
    safe = np.where(norms > 0, norms, 1.0)
    r = np.linalg.qr(c / safe, mode="r")
    return (np.abs(np.diag(r)) < _RANK_TOL) | (norms <= 0)


@dataclass(frozen=True)
class Term:
    """How one cohort column enters the design (learned once)."""

    source: str  # the cohort column
    kind: str  # spline | quadratic | linear | binary | categorical
    columns: tuple[str, ...]
    knots: tuple[float, ...] = ()  # spline only
    levels: tuple[Any, ...] = ()  # categorical: the non-reference levels, one column each
    reference: Any = None  # categorical: the most frequent level

    def values(self, cohort: pd.DataFrame) -> np.ndarray:
        if self.source not in cohort.columns:
            raise DesignError(f"cohort has no column '{self.source}' (needed by the propensity design)")
        s = cohort[self.source]
        if self.kind == "categorical":
            v = _as_levels(s)
            unknown = sorted(set(v.unique()) - set(self.levels) - {self.reference}, key=str)
            if unknown:
                raise DesignError(f"column '{self.source}' has level(s) {unknown} not seen when the "
                                  "design was built")
            return np.column_stack([(v == lev).to_numpy(float) for lev in self.levels])
        x = _as_numeric(s, self.source)
        if self.kind == "spline":
            return np.column_stack([x, rcs_basis(x, self.knots)])
        if self.kind == "quadratic":
            return np.column_stack([x, x * x])
        return x[:, None]


def _as_levels(s: pd.Series) -> pd.Series:
    return s.astype(object).where(s.notna(), "missing")


def _as_numeric(s: pd.Series, name: str) -> np.ndarray:
    if not pd.api.types.is_numeric_dtype(s.dtype):
        s = s.astype(object)
    try:
        x = pd.to_numeric(s, errors="raise").to_numpy(dtype=float)
    except (TypeError, ValueError):
        raise DesignError(f"column '{name}' is not numeric (give it kind: categorical)") from None
    bad = ~np.isfinite(x)
    if bad.any():
        raise DesignError(f"column '{name}' has {int(bad.sum())} missing or infinite value(s) "
                          f"(first at row {int(np.flatnonzero(bad)[0])}); the cohort should have "
                          "filled them and added a missing indicator")
    return x


@dataclass(frozen=True)
class Design:
    """The covariate design matrix, learned once on the whole cohort.

    ``columns`` names the columns of :meth:`transform` (float, no intercept); ``dropped`` lists
    each column left out with the reason (constant, or linear in the earlier columns).
    """

    terms: tuple[Term, ...]
    keep: tuple[int, ...]  # indices of the terms' stacked columns that are kept
    columns: tuple[str, ...]
    dropped: tuple[tuple[str, str], ...] = ()
    continuous: str = "spline"

    def transform(self, cohort: pd.DataFrame) -> np.ndarray:
        """The design for ``cohort`` (n x len(columns)), with the learned knots and levels."""
        if not self.terms:
            return np.empty((len(cohort), 0))
        full = np.column_stack([t.values(cohort) for t in self.terms])
        return np.ascontiguousarray(full[:, list(self.keep)], dtype=float)

    def to_dict(self) -> dict[str, Any]:
        return {"continuous": self.continuous, "columns": list(self.columns),
                "dropped": [{"column": c, "reason": r} for c, r in self.dropped],
                "terms": [{"source": t.source, "kind": t.kind, "columns": list(t.columns),
                           "knots": list(t.knots), "levels": [str(v) for v in t.levels],
                           "reference": None if t.reference is None else str(t.reference)}
                          for t in self.terms]}


def _spline_term(name: str, x: np.ndarray) -> Term:
    """Spline with 4 knots; coinciding knots are merged, then 3 knots, then a linear term, so
    that the term's columns are never linearly dependent (checked by QR)."""
    for probs in (KNOTS_4, KNOTS_3):
        knots = tuple(float(v) for v in np.unique(np.quantile(x, probs)))
        if len(knots) < 3:
            continue
        basis = np.column_stack([x, rcs_basis(x, knots)])
        if not _dependent(basis).any():
            cols = (name, *(f"{name}_rcs{j + 1}" for j in range(len(knots) - 2)))
            return Term(name, "spline", cols, knots=knots)
    return Term(name, "linear", (name,))


def _term(name: str, kind: str, s: pd.Series, continuous: str) -> Term:
    if kind == "categorical" or (not pd.api.types.is_numeric_dtype(s.dtype) and not _is01(s)):
        v = _as_levels(s)
        counts = v.value_counts(sort=False)
        order = sorted(counts.index, key=lambda lev: (-counts[lev], str(lev)))
        return Term(name, "categorical", tuple(f"{name}[{lev}]" for lev in order[1:]),
                    levels=tuple(order[1:]), reference=order[0])
    x = _as_numeric(s, name)
    if kind == "binary":
        uniq = np.unique(x)
        if set(uniq) <= {0.0, 1.0}:
            return Term(name, "binary", (name,))
        if len(uniq) == 2:
            return _term(name, "categorical", s, continuous)
        return Term(name, "linear", (name,))  # e.g. a 0/1 covariate whose median fill is 0.5
    if kind != "continuous":
        raise DesignError(f"covariate '{name}': unknown kind {kind!r} "
                          "(expected continuous, binary or categorical)")
    if continuous == "spline":
        return _spline_term(name, x)
    if continuous == "quadratic" and len(np.unique(x)) > 2:
        return Term(name, "quadratic", (name, f"{name}^2"))
    return Term(name, "linear", (name,))


def _is01(s: pd.Series) -> bool:
    try:
        return set(pd.to_numeric(s.dropna()).unique()) <= {0, 1}
    except (TypeError, ValueError):
        return False


def build_design(cohort: pd.DataFrame, covariates: Iterable[Any], kinds: Mapping[str, str],
                 continuous: str = "spline") -> Design:
    """Learn the propensity design on the whole cohort.

    Parameters
    ----------
    cohort : DataFrame
        ``cohort.parquet`` (covariates by name, ``<name>_missing`` flags).
    covariates : iterable of :class:`emulant.protocol.Covariate` or str
        The adjustment set, in order.
    kinds : mapping
        Covariate name -> ``continuous`` | ``binary`` | ``categorical``.
    continuous : {"spline", "quadratic", "linear"}
        Continuous covariates as a restricted cubic spline (knots at the 5th/35th/65th/95th
        percentiles, Harrell 2015), as :math:`x` and :math:`x^2`, or as :math:`x`.

    Returns
    -------
    Design
        Categoricals are one-hot with the most frequent level as reference; binaries 0/1;
        a non-constant ``<name>_missing`` flag follows its covariate (not for categoricals, whose
        ``missing`` level carries it). Constant columns and columns linear in the earlier ones
        are dropped (and listed in ``Design.dropped``), so the matrix with an intercept has full
        column rank.
    """
    if continuous not in CONTINUOUS:
        raise DesignError(f"analysis.propensity.continuous: expected one of {CONTINUOUS}, "
                          f"got {continuous!r}")
    terms: list[Term] = []
    for cov in covariates:
        name = getattr(cov, "name", cov)
        if name not in cohort.columns:
            raise DesignError(f"cohort has no column for covariate '{name}'")
        if name not in kinds:
            raise DesignError(f"no kind given for covariate '{name}'")
        term = _term(name, kinds[name], cohort[name], continuous)
        terms.append(term)
        flag = columns.missing_flag(name)
        if term.kind != "categorical" and flag in cohort.columns:
            terms.append(_term(flag, "binary", cohort[flag], continuous))
    if not terms:
        return Design((), (), (), (), continuous)
    full = np.column_stack([t.values(cohort) for t in terms])
    names = [c for t in terms for c in t.columns]
    dropped: list[tuple[str, str]] = []
    const = np.ptp(full, axis=0) == 0 if len(full) else np.ones(full.shape[1], dtype=bool)
    dropped += [(names[j], "constant") for j in np.flatnonzero(const)]
    idx = [j for j in range(full.shape[1]) if not const[j]]
    dep = _dependent(full[:, idx])
    dropped += [(names[j], "linear in the earlier columns") for j, d in zip(idx, dep, strict=True) if d]
    keep = tuple(j for j, d in zip(idx, dep, strict=True) if not d)
    return Design(tuple(terms), keep, tuple(names[j] for j in keep), tuple(dropped), continuous)


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
