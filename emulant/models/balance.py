r"""Covariate balance: standardized mean differences and variance ratios, before and after weighting.

For a continuous covariate (Austin 2009, Stat Med 28:3083, eq. 1) and a binary one (eq. 2)

.. math::

    d = \frac{\bar x_1^{w} - \bar x_0^{w}}{\sqrt{(s_1^2 + s_0^2)/2}}, \qquad
    d = \frac{\hat p_1^{w} - \hat p_0^{w}}{\sqrt{(p_1 (1 - p_1) + p_0 (1 - p_0))/2}},

where the means :math:`\bar x_a^w, \hat p_a^w` are weighted by the estimand's weights (all ones for
``smd_unweighted``) and the denominator is ALWAYS computed on the unweighted cohort
(:math:`s_a^2` the sample variances, :math:`p_a` the proportions): the same scale before and after
weighting, so a change in the SMD reflects the means alone. This follows Stuart 2010 (Stat Sci
25:1, §6.1, on keeping the pre-adjustment standard deviation as the scale) and Austin & Stuart
2015 (Stat Med 34:3661) for weighted SMDs in IPTW analyses (cited from memory). Each level of a
categorical covariate is a binary row of its own; a ``<name>_missing`` flag is a binary row.

The variance ratio (continuous covariates only) is the ratio of weighted variances, treated over
comparator, with :math:`s_w^2 = \frac{\sum w}{(\sum w)^2 - \sum w^2} \sum w (x - \bar x^w)^2`
(Austin & Stuart 2015).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from emulant import columns
from emulant.errors import EmulantError
from emulant.models.design import is_zero_one
from emulant.models.weights import resolve_kinds, treated_indicator

BALANCE_COLUMNS = ("covariate", "level", "estimand", "mean_treated", "mean_comparator",
                   "smd_unweighted", "smd_weighted", "variance_ratio")


class BalanceError(EmulantError, ValueError):
    """The cohort and the weights do not line up, or a column is missing."""


def weighted_mean(x: np.ndarray, w: np.ndarray) -> float:
    tot = w.sum()
    return float(w @ x / tot) if tot > 0 else float("nan")


def weighted_var(x: np.ndarray, w: np.ndarray) -> float:
    r"""Weighted variance :math:`\frac{\sum w}{(\sum w)^2 - \sum w^2}\sum w (x - \bar x^w)^2`;
    with unit weights the sample variance (denominator :math:`n - 1`)."""
    s1, s2 = w.sum(), w @ w
    den = s1 * s1 - s2
    if den <= 0:
        return float("nan")
    m = w @ x / s1
    return float(s1 / den * (w @ (x - m) ** 2))


def smd(x: np.ndarray, a: np.ndarray, w: np.ndarray | None, kind: str) -> float:
    """Standardized mean difference (treated minus comparator), see the module docstring.

    ``kind`` is ``continuous`` or ``binary``; ``w`` the weights (None: unweighted)."""
    x = np.asarray(x, dtype=float)
    t, c = a == 1, a == 0
    w = np.ones_like(x) if w is None else np.asarray(w, dtype=float)
    diff = weighted_mean(x[t], w[t]) - weighted_mean(x[c], w[c])
    if kind == "binary":
        p1, p0 = x[t].mean(), x[c].mean()
        den = np.sqrt((p1 * (1 - p1) + p0 * (1 - p0)) / 2)
    else:
        den = np.sqrt((np.var(x[t], ddof=1) + np.var(x[c], ddof=1)) / 2)
    if not den > 0:
        return 0.0 if abs(diff) < 1e-12 else float(np.copysign(np.inf, diff))
    return float(diff / den)


def _items(cohort: pd.DataFrame, protocol: Any) -> list[tuple[str, str, str, np.ndarray]]:
    """(covariate, level, kind, values) rows: continuous and binary covariates, one binary row
    per categorical level, and non-constant ``<name>_missing`` flags."""
    kinds = resolve_kinds(protocol, cohort)
    out = []
    for cov in protocol.covariates:
        name = cov.name
        if name not in cohort.columns:
            raise BalanceError(f"cohort has no column for covariate '{name}'")
        s = cohort[name]
        kind = kinds[name]
        if kind != "categorical" and not pd.api.types.is_numeric_dtype(s.dtype) and not is_zero_one(s):
            kind = "categorical"
        if kind == "binary" and not is_zero_one(s):
            kind = "categorical" if s.nunique() <= 2 else "continuous"
        if kind == "categorical":
            v = s.astype(object).where(s.notna(), "missing")
            for lev in sorted(v.unique(), key=str):
                out.append((name, str(lev), "binary", (v == lev).to_numpy(float)))
            continue
        x = pd.to_numeric(s.astype(object) if not pd.api.types.is_numeric_dtype(s.dtype) else s,
                          errors="coerce").to_numpy(float)
        if np.isnan(x).any():
            raise BalanceError(f"cohort column '{name}' has {int(np.isnan(x).sum())} missing value(s)")
        out.append((name, "", kind, x))
        flag = columns.missing_flag(name)
        if flag in cohort.columns:
            m = pd.to_numeric(cohort[flag], errors="coerce").fillna(0).to_numpy(float)
            if m.min() != m.max():
                out.append((flag, "", "binary", m))
    return out


def _aligned_weights(cohort: pd.DataFrame, weights_df: pd.DataFrame, col: str) -> np.ndarray:
    if col not in weights_df.columns:
        raise BalanceError(f"weights table has no column '{col}'")
    ids, wid = cohort["person_id"], weights_df["person_id"]
    if len(ids) == len(wid) and (ids.to_numpy() == wid.to_numpy()).all():
        return weights_df[col].to_numpy(float)
    if wid.duplicated().any():
        raise BalanceError("weights table: person_id is not unique, so it cannot be matched to "
                           "the cohort")
    w = weights_df.set_index("person_id")[col].reindex(ids)
    if w.isna().any():
        raise BalanceError(f"weights table has no '{col}' for {int(w.isna().sum())} cohort "
                           f"person(s), e.g. person_id {ids[w.isna().to_numpy()].iloc[0]!r}")
    return w.to_numpy(float)


def balance_table(cohort: pd.DataFrame, weights_df: pd.DataFrame, protocol: Any) -> pd.DataFrame:
    """The ``balance.csv`` table (CONTRACTS §4), one row per covariate (level) and estimand.

    ``mean_treated``/``mean_comparator`` are the estimand-weighted means (proportions for binary
    rows); ``smd_unweighted``/``smd_weighted`` as in the module docstring (denominator from the
    unweighted cohort); ``variance_ratio`` the weighted variance ratio, continuous rows only
    (NaN otherwise); ``level`` is empty except for categorical levels.
    """
    a = treated_indicator(cohort)
    items = _items(cohort, protocol)
    if not items:
        return pd.DataFrame(columns=list(BALANCE_COLUMNS))
    V = np.column_stack([x for *_, x in items])
    cont = np.array([kind == "continuous" for _, _, kind, _ in items])
    arms = (a == 1, a == 0)
    m1, m0 = (V[m].mean(axis=0) for m in arms)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = [np.where(cont, V[m].var(axis=0, ddof=1), mean * (1 - mean))
               for m, mean in zip(arms, (m1, m0), strict=True)]
        den = np.sqrt((var[0] + var[1]) / 2)
        unweighted = _standardize(m1 - m0, den)
        frames = []
        for est in protocol.estimands:
            w = _aligned_weights(cohort, weights_df, columns.weight(est))
            means, wvars = [], []
            for m in arms:
                wm = np.where(m, w, 0.0)
                s1, s2 = wm.sum(), wm @ wm
                mean = wm @ V / s1
                means.append(mean)
                wvars.append(s1 / (s1 * s1 - s2) * (wm @ (V - mean) ** 2))
            ratio = np.where(cont & (wvars[1] > 0), wvars[0] / wvars[1], np.nan)
            frames.append(pd.DataFrame({
                "covariate": [n for n, *_ in items], "level": [lev for _, lev, *_ in items],
                "estimand": est, "mean_treated": means[0], "mean_comparator": means[1],
                "smd_unweighted": unweighted, "smd_weighted": _standardize(means[0] - means[1], den),
                "variance_ratio": ratio}))
    return pd.concat(frames, ignore_index=True)[list(BALANCE_COLUMNS)]


def _standardize(diff: np.ndarray, den: np.ndarray) -> np.ndarray:
    """diff / den; 0 where both vanish, +-inf where only the denominator does."""
    out = np.where(den > 0, diff / np.where(den > 0, den, 1.0), np.sign(diff) * np.inf)
    return np.where((den > 0) | (np.abs(diff) >= 1e-12), out, 0.0)


def flagged(balance_df: pd.DataFrame, threshold: float) -> list[str]:
    """Covariates (in table order, each once) with ``|smd_weighted| > threshold`` for any level
    or estimand (``analysis.balance.smd_threshold``; 0.1 is common practice, Austin 2009)."""
    over = balance_df.loc[balance_df["smd_weighted"].abs() > threshold, "covariate"]
    return list(dict.fromkeys(over))
