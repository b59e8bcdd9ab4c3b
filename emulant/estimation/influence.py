r"""Influence functions of the weighted estimators (``analysis.variance: influence``).

Every estimate covered here is a smooth function of the persons' weights and of nuisance
parameters solved from estimating equations: the propensity model's logistic score, the
measurement model's logistic score (a measured outcome with ``missing: censor``) and the
outcome regressions' normal equations. Stacking those equations with the estimate's own gives
the sandwich variance of M-estimation (Stefanski & Boos 2002, The American Statistician
56:29–38). It is computed here in its equivalent form, the sum of squared influence values
of the persons (the empirical sandwich; for IPW with an estimated propensity score as in
Lunceford & Davidian 2004, Statistics in Medicine 23:2937–2960, §3):

.. math::

    \mathrm{IF}_i = D_i + \sum_\eta \mathrm{IF}_{\eta,i}^\top G_\eta, \qquad
    \mathrm{IF}_{\eta,i} = H_\eta^{-1} s_{\eta,i}, \qquad
    \widehat{SE} = \Big(\sum_i \mathrm{IF}_i^2\Big)^{1/2}

with :math:`D_i` the derivative of the estimate with respect to person :math:`i`'s weight at
fixed nuisance parameters, :math:`G_\eta` its derivative with respect to the nuisance
parameter :math:`\eta`, :math:`s_{\eta,i}` person :math:`i`'s term of :math:`\eta`'s estimating
equation and :math:`H_\eta` minus the Jacobian of their sum. A nuisance parameter whose equation
holds another's (the outcome regressions weighted by the measurement model's weights) carries
that one's influence through (:class:`Nuisance`'s ``parent``).

All influence values are on the sum scale for the point estimate (every frequency weight 1).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from emulant.errors import EmulantError


class InfluenceUnavailable(EmulantError):
    """No influence function for this estimate (e.g. a penalised fit): the bootstrap is used."""


# ----------------------------------------------------------------------------- nuisances


def standard_design(X: np.ndarray, first: np.ndarray | None = None) -> np.ndarray:
    """``[1, first, (X - mean) / sd]`` without constant columns: the same linear span as the
    models' own design (their fitted values and influence do not depend on the parametrisation),
    better conditioned."""
    X = np.asarray(X, dtype=float)
    sd = X.std(axis=0) if len(X) else np.ones(X.shape[1])
    keep = sd > 1e-12 * np.maximum(1.0, np.abs(X.mean(axis=0)))
    Z = (X[:, keep] - X[:, keep].mean(axis=0)) / sd[keep]
    parts = [np.ones((len(X), 1))] + ([] if first is None else [np.asarray(first, float)[:, None]])
    return np.hstack(parts + [Z])


@dataclass(frozen=True)
class Nuisance:
    r"""A nuisance parameter's influence, kept in factored form (never an n x k matrix).

    Person :math:`i`'s score is :math:`Z_i\,\mathrm{resid}_i`; ``Hinv`` inverts minus the
    Jacobian of the summed score; ``parent`` and ``C`` (the Jacobian of the summed score with
    respect to the parent's parameter) carry a parent nuisance's influence through.
    """

    Z: np.ndarray
    resid: np.ndarray
    Hinv: np.ndarray
    parent: Nuisance | None = None
    C: np.ndarray | None = None

    def apply(self, G: np.ndarray) -> np.ndarray:
        r""":math:`\mathrm{IF}_{\eta,i}^\top G` for every person (``G``: the estimate's derivative
        with respect to this parameter)."""
        u = self.Hinv @ G
        out = (self.Z @ u) * self.resid
        if self.parent is not None:
            out = out + self.parent.apply(self.C.T @ u)
        return out

    def gradient(self, coef: np.ndarray) -> np.ndarray:
        r""":math:`G = \sum_j c_j Z_j`: the derivative of an estimate whose derivative with respect
        to person :math:`j`'s linear predictor is :math:`c_j`."""
        return self.Z.T @ coef


def _pinv(H: np.ndarray) -> np.ndarray:
    return np.linalg.pinv(H, rcond=1e-12, hermitian=True)


def logistic_nuisance(Z: np.ndarray, y: np.ndarray, p: np.ndarray, what: str) -> Nuisance:
    r"""A logistic model's coefficients: score :math:`Z_i (y_i - p_i)`, :math:`H = \sum_i
    p_i(1-p_i) Z_i Z_i^\top` (McCullagh & Nelder 1989, §4.4).

    Raises :class:`InfluenceUnavailable` when the fitted ``p`` does not solve the unpenalised
    score equation (a ridge-penalised refit after separation): its Newton step is not ~0.
    """
    y, p = np.asarray(y, float), np.asarray(p, float)
    Hinv = _pinv(Z.T @ (Z * (p * (1.0 - p))[:, None]))
    score = Z.T @ (y - p)
    if np.max(np.abs(Hinv @ score), initial=0.0) > 1e-5:
        raise InfluenceUnavailable(f"the {what} model was penalised (separation)")
    return Nuisance(Z, y - p, Hinv)


def regression_nuisance(Z: np.ndarray, y: np.ndarray, w: np.ndarray,
                        parent: Nuisance | None = None,
                        dlog_w: np.ndarray | None = None) -> tuple[Nuisance, np.ndarray]:
    r"""Weighted least squares of ``y`` on ``Z`` with weights ``w``; returns the nuisance and the
    fitted values for everyone.

    Score :math:`w_i Z_i (y_i - Z_i^\top\gamma)`, :math:`H = Z^\top W Z`. When the weights depend
    on a parent's parameter (:math:`\partial \log w_i / \partial \eta_{\mathrm{parent}, i}` =
    ``dlog_w``), :math:`C = \sum_i w_i (y_i - \hat m_i)\, \mathrm{dlog\_w}_i\, Z_i Z_{p,i}^\top`.
    """
    Hinv = _pinv(Z.T @ (Z * w[:, None]))
    m = Z @ (Hinv @ (Z.T @ (w * y)))
    resid = w * (y - m)
    C = None if parent is None else Z.T @ (parent.Z * (resid * dlog_w)[:, None])
    return Nuisance(Z, resid, Hinv, parent, C), m


# ----------------------------------------------------------------------------- means


def mean_influence(y, u, dlog_u=None, *, t=None, m=None, dlog_t=None, shared=False,
                   beta: Nuisance | None = None, alpha: Nuisance | None = None, dlog_r=None,
                   gamma: Nuisance | None = None) -> tuple[float, np.ndarray]:
    r"""A weighted mean, plain or augmented, and its influence values.

    Plain (``t`` None, the Hájek mean of IPW): :math:`\mu = \sum_i u_i y_i / \sum_i u_i`.
    Augmented, with outcome predictions :math:`m_i` and target weights :math:`t_i`:

    .. math::

        \text{shared: } \mu = \frac{\sum_i t_i m_i + \sum_i u_i (y_i - m_i)}{\sum_i t_i}, \qquad
        \text{separate: } \mu = \frac{\sum_i t_i m_i}{\sum_i t_i}
                               + \frac{\sum_i u_i (y_i - m_i)}{\sum_i u_i} .

    ``dlog_u``, ``dlog_t``: derivatives of :math:`\log u_i`, :math:`\log t_i` with respect to
    person :math:`i`'s propensity linear predictor (``beta``); ``dlog_r``: of :math:`\log u_i`
    with respect to the measurement model's linear predictor (``alpha``); ``gamma``: the outcome
    regression that gives ``m``. Returns :math:`(\mu, \mathrm{IF})`.
    """
    y = np.asarray(y, float)
    u = np.asarray(u, float)
    res = y if m is None else y - m
    U = u.sum()
    if not U > 0:
        raise InfluenceUnavailable("no weight in a mean")
    if t is None:
        mu = float(u @ res / U)
        D = u * (res - mu) / U
        du, dt, cg = (res - mu) / U, None, None
    elif shared:
        T = t.sum()
        mu = float((t @ m + u @ res) / T)
        D = (t * m + u * res - t * mu) / T
        du, dt, cg = res / T, (m - mu) / T, (t - u) / T
    else:
        T = t.sum()
        A, B = float(t @ m / T), float(u @ res / U)
        mu = A + B
        D = t * (m - A) / T + u * (res - B) / U
        du, dt, cg = (res - B) / U, (m - A) / T, t / T - u / U
    IF = D.copy()
    if beta is not None:
        c = (du * u * dlog_u if dlog_u is not None else 0.0) + (
            dt * t * dlog_t if dlog_t is not None else 0.0)
        if np.ndim(c):
            IF += beta.apply(beta.gradient(c))
    if alpha is not None and dlog_r is not None:
        IF += alpha.apply(alpha.gradient(du * u * dlog_r))
    if gamma is not None and cg is not None:
        IF += gamma.apply(gamma.gradient(cg))
    return mu, IF


def dlog_weight(estimand: str, a: np.ndarray, e: np.ndarray) -> np.ndarray:
    r""":math:`\partial \log w_i / \partial \eta_i` of the estimand's weight (:math:`\eta` the
    propensity's linear predictor, :math:`\partial e/\partial\eta = e(1-e)`): ATE
    :math:`-(a - e)`; ATT :math:`1 - a`; ATO :math:`1 - a - e`. A per-arm constant (the
    stabilising share) leaves every per-arm weighted mean unchanged and is left out."""
    if estimand == "ATE":
        return -(a - e)
    if estimand == "ATT":
        return 1.0 - a
    if estimand == "ATO":
        return 1.0 - a - e
    raise InfluenceUnavailable(f"no weights of estimand {estimand!r}")


# ----------------------------------------------------------------------------- time to event


def aj_influence(time, status, W, days, cause: int = 1) -> tuple[np.ndarray, list[np.ndarray]]:
    r"""The weighted Aalen–Johansen cumulative incidence at ``days`` and its derivatives with
    respect to each person's weight :math:`W_i` (one arm).

    With :math:`h_s = d_s / n_s` (all causes) and :math:`h_{1s} = d_{1s}/n_s` at the distinct
    times, :math:`\hat F_1(t) = \sum_{s\le t}\hat S(s^-)h_{1s}` and
    :math:`\partial h_s / \partial W_i = (dN_i(s) - Y_i(s) h_s)/n_s`:

    .. math::

        \frac{\partial \hat F_1(t)}{\partial W_i} = \sum_{s \le t} \hat S(s^-)
        \frac{dN_{1i}(s) - Y_i(s) h_{1s}}{n_s}
        - \sum_{u \le t} \frac{dN_i(u) - Y_i(u) h_u}{n_u}
          \frac{\hat F_1(t) - \hat F_1(u)}{1 - h_u} .

    This is the exact derivative of :func:`emulant.estimation.survival.aalen_johansen` (its
    linearisation; with one cause it gives Greenwood's variance). Returns the risks and, per
    day, the derivatives (length n).
    """
    t = np.asarray(time, float)
    s = np.asarray(status, int)
    W = np.asarray(W, float)
    times, inv = np.unique(t, return_inverse=True)
    n = np.cumsum(np.bincount(inv, weights=W, minlength=times.size)[::-1])[::-1]
    d1 = np.bincount(inv, weights=W * (s == cause), minlength=times.size)
    d = np.bincount(inv, weights=W * (s != 0), minlength=times.size)
    h1 = np.divide(d1, n, out=np.zeros_like(d1), where=n > 0)
    h = np.divide(d, n, out=np.zeros_like(d), where=n > 0)
    before = np.concatenate([[1.0], np.cumprod(1.0 - h)[:-1]])
    F = np.cumsum(before * h1)
    inv_n = np.divide(1.0, n, out=np.zeros_like(n), where=n > 0)
    cA = np.cumsum(before * h1 * inv_n)
    risks, grads = [], []
    for day in np.asarray(days, float):
        k = int(np.searchsorted(times, day, side="right")) - 1
        if k < 0:
            risks.append(0.0)
            grads.append(np.zeros(t.size))
            continue
        Ft = F[k]
        q = np.divide((Ft - F) * inv_n, 1.0 - h, out=np.zeros_like(F), where=h < 1.0)
        cB = np.cumsum(h * q)
        j = np.minimum(inv, k)
        by = inv <= k
        A = np.where(by & (s == cause), before[inv] * inv_n[inv], 0.0) - cA[j]
        B = np.where(by & (s != 0), q[inv], 0.0) - cB[j]
        risks.append(float(Ft))
        grads.append(A - B)
    return np.asarray(risks), grads


def rate_influence(time, status, W, cause: int = 1, per: float = 1000.0,
                   year: float = 365.25) -> tuple[float, np.ndarray]:
    r"""The crude rate :math:`\text{per}\cdot\sum W\delta / (\sum W T/\text{year})` and its
    influence :math:`W_i\,\text{per}\,(\delta_i - \text{rate}\,T_i/(\text{per}\cdot\text{year}))
    / PY` (the ratio estimator's linearisation; common practice, no single source)."""
    t = np.asarray(time, float)
    W = np.asarray(W, float)
    dlt = (np.asarray(status) == cause).astype(float)
    py = float(W @ t) / year
    if not py > 0:
        raise InfluenceUnavailable("no person-time")
    rate = per * float(W @ dlt) / py
    return rate, W * per * (dlt - rate * t / (per * year)) / py


def se_of(IF: np.ndarray) -> float:
    """The standard error :math:`(\\sum_i \\mathrm{IF}_i^2)^{1/2}`."""
    return float(np.sqrt(np.sum(np.square(IF))))
