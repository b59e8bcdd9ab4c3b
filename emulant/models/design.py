"""The covariate design: how each covariate enters the propensity and outcome models.

:func:`build_design` learns, once on the whole cohort, how each covariate enters (spline knots,
category levels and reference levels, missing indicators) and returns a frozen :class:`Design`;
every bootstrap replicate reuses it through :meth:`Design.transform`.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

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
            if not self.levels:  # a single level: no column (build_design lists it as dropped)
                return np.empty((len(v), 0))
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
            cols = (name, *(f"{name} (spline {j + 1})" for j in range(len(knots) - 2)))
            return Term(name, "spline", cols, knots=knots)
    return Term(name, "linear", (name,))


def _term(name: str, kind: str, s: pd.Series, continuous: str) -> Term:
    if kind == "categorical" or (not pd.api.types.is_numeric_dtype(s.dtype) and not is_zero_one(s)):
        v = _as_levels(s)
        counts = v.value_counts(sort=False)
        order = sorted(counts.index, key=lambda lev: (-counts[lev], str(lev)))
        return Term(name, "categorical", tuple(f"{name}: {lev}" for lev in order[1:]),
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
        return Term(name, "quadratic", (name, f"{name} (squared)"))
    return Term(name, "linear", (name,))


def is_zero_one(s: pd.Series) -> bool:
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
        ``missing`` level carries it). Constant columns (a categorical with a single level has
        none), and columns linear in the earlier ones, are dropped and listed in
        ``Design.dropped``, so the matrix with an intercept has full column rank.
    """
    if continuous not in CONTINUOUS:
        raise DesignError(f"analysis.propensity.continuous: expected one of {CONTINUOUS}, "
                          f"got {continuous!r}")
    terms: list[Term] = []
    single: list[tuple[str, str]] = []
    for cov in covariates:
        name = getattr(cov, "name", cov)
        if name not in cohort.columns:
            raise DesignError(f"cohort has no column for covariate '{name}'")
        if name not in kinds:
            raise DesignError(f"no kind given for covariate '{name}'")
        term = _term(name, kinds[name], cohort[name], continuous)
        terms.append(term)
        if term.kind == "categorical" and not term.levels:
            single.append((name, f"a single level ({term.reference}) in the cohort: constant, "
                                 "adjusts for nothing"))
        flag = columns.missing_flag(name)
        if term.kind != "categorical" and flag in cohort.columns:
            terms.append(_term(flag, "binary", cohort[flag], continuous))
    if not any(t.columns for t in terms):
        return Design(tuple(terms), (), (), tuple(single), continuous)
    full = np.column_stack([t.values(cohort) for t in terms])
    names = [c for t in terms for c in t.columns]
    dropped: list[tuple[str, str]] = list(single)
    const = np.ptp(full, axis=0) == 0 if len(full) else np.ones(full.shape[1], dtype=bool)
    dropped += [(names[j], "constant") for j in np.flatnonzero(const)]
    idx = [j for j in range(full.shape[1]) if not const[j]]
    dep = _dependent(full[:, idx])
    dropped += [(names[j], "linear in the earlier columns") for j, d in zip(idx, dep, strict=True) if d]
    keep = tuple(j for j, d in zip(idx, dep, strict=True) if not d)
    return Design(tuple(terms), keep, tuple(names[j] for j in keep), tuple(dropped), continuous)
