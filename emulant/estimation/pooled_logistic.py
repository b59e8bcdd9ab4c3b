"""Pooled logistic models of discrete-time hazards and the parametric g-formula for risks.

Follow-up is cut into periods of ``period_days`` days: period :math:`k` holds days
:math:`(kP, (k+1)P]` (day 0 belongs to period 0). A person is at risk in periods
:math:`0, \\dots, L_i`; an event on day :math:`T_i` falls in period :math:`\\lceil T_i/P\\rceil - 1`
(0 for day 0), a person censored on day :math:`T_i` survives periods up to
:math:`\\lceil T_i/P\\rceil - 1` and leaves at its end. Within a period the outcome comes first:
the outcome model is fitted on every person-period at risk, the competing-event model on those
without the outcome in that period, the censoring model on those with no event in it.

Every model is described by two arrays per person — the last period at risk and whether the
event happened in it — and fitted on the implicit person-period table (an :math:`n \\times K`
at-risk mask) by Newton–Raphson with the Hessian assembled from per-person and per-period sums,
so no long table is materialised; :func:`person_period` builds the long table explicitly (with
``np.repeat``) for checks and other uses.
"""

from __future__ import annotations

import warnings
from contextlib import nullcontext

import numpy as np

from emulant.errors import NonConvergenceWarning
from emulant.estimation.events import COMPETING, OUTCOME, SurvivalError

try:  # installed with scikit-learn
    from threadpoolctl import threadpool_limits
except ImportError:  # pragma: no cover
    def threadpool_limits(**_):
        return nullcontext()


def last_period(time, status, period_days: int) -> np.ndarray:
    """The last period each person is at risk in (-1: none, a censoring on day 0)."""
    t = np.asarray(time, dtype=float)
    s = np.asarray(status, dtype=int)
    k = np.ceil(t / period_days).astype(int) - 1
    return np.where(s == 0, k, np.maximum(k, 0))


def person_period(time, status, period_days: int) -> dict[str, np.ndarray]:
    """The long person-period table: one row per person and period at risk.

    Returns
    -------
    dict of arrays ``row`` (the person's index), ``period``, ``outcome``, ``competing``,
    ``censored`` (0/1: the event in that period)
    """
    s = np.asarray(status, dtype=int)
    last = last_period(time, s, period_days)
    counts = last + 1
    row = np.repeat(np.arange(s.size), counts)
    first = np.repeat(np.cumsum(counts) - counts, counts)
    period = np.arange(row.size) - first
    final = period == last[row]
    return {"row": row, "period": period,
            "outcome": (final & (s[row] == OUTCOME)).astype(int),
            "competing": (final & (s[row] == COMPETING)).astype(int),
            "censored": (final & (s[row] == 0)).astype(int)}


def time_basis(n_periods: int, kind: str = "spline", n_knots: int = 5) -> np.ndarray:
    """Basis of the period index :math:`k = 0, \\dots, K-1` for the baseline hazard.

    ``spline``: a constant, :math:`k`, and the :math:`n_{knots} - 2` terms of a restricted
    (natural) cubic spline with knots at the 5%, 27.5%, 50%, 72.5%, 95% quantiles of the period
    indices (fixed by K alone, so every bootstrap replicate uses the same basis)
    (Harrell 2015, Regression Modeling Strategies, 2nd ed., §2.4.5),

    .. math::

        \\frac{(k-t_j)_+^3 - (k-t_{m-1})_+^3 \\frac{t_m-t_j}{t_m-t_{m-1}}
        + (k-t_m)_+^3 \\frac{t_{m-1}-t_j}{t_m-t_{m-1}}}{(t_m-t_1)^2};

    ``saturated``: one indicator per period (used when there are too few periods for the knots).
    """
    k = np.arange(n_periods, dtype=float)
    if kind == "saturated" or n_periods <= n_knots + 1:
        return np.eye(n_periods)
    if kind != "spline":
        raise SurvivalError(f"time basis {kind!r}: expected 'spline' or 'saturated'")
    q = {3: [0.1, 0.5, 0.9], 4: [0.05, 0.35, 0.65, 0.95],
         5: [0.05, 0.275, 0.5, 0.725, 0.95]}[n_knots]
    t = np.quantile(k, q)
    cube = lambda u: np.clip(u, 0, None) ** 3  # noqa: E731
    cols = [np.ones_like(k), k]
    for j in range(n_knots - 2):
        c = (cube(k - t[j]) - cube(k - t[-2]) * (t[-1] - t[j]) / (t[-1] - t[-2])
             + cube(k - t[-1]) * (t[-2] - t[j]) / (t[-1] - t[-2]))
        cols.append(c / (t[-1] - t[0]) ** 2)
    return np.column_stack(cols)


CHUNK = 8192  # persons per block of the implicit person-period table (fits in cache)
_CAP = np.exp(35.0)  # a hazard logit above 35 is a probability of 1


class _Data:
    """The implicit person-period table of one model, in blocks of persons."""

    def __init__(self, B, Z, a, f, last, y_rows, y_k, y_f):
        self.B, self.Z, self.a, self.f, self.last = B, Z, a, f, last
        self.arm = (a == 1).astype(np.intp)
        self.y_rows, self.y_k, self.y_f = y_rows, y_k, y_f
        K = B.shape[0]
        self.periods = np.arange(K)
        self.ysum_k = np.bincount(y_k, weights=y_f, minlength=K)
        self.ysum_k1 = np.bincount(y_k, weights=y_f * a[y_rows], minlength=K)
        self.ysum_x = Z[y_rows].T @ y_f
        self.ZZa = np.hstack([Z, Z * a[:, None]])

    def pass_(self, params):
        """Log-likelihood, gradient and information matrix at ``params``, block by block."""
        B, Z, a = self.B, self.Z, self.a
        K, q = B.shape
        p = Z.shape[1]
        beta = params[2 * q:]
        c = np.stack([B @ params[:q], B @ (params[:q] + params[q:2 * q])])
        expc = np.exp(np.minimum(c, 35.0))
        lin_ev = Z[self.y_rows] @ beta if p else np.zeros(self.y_rows.size)
        ll = float(self.y_f @ (lin_ev + c[self.arm[self.y_rows], self.y_k]))
        s_k, s_k1, w_k, w_k1 = (np.zeros(K) for _ in range(4))
        r_x, WtZZ, H_xx = np.zeros(p), np.zeros((K, 2 * p)), np.zeros((p, p))
        for lo in range(0, a.size, CHUNK):
            sl = slice(lo, lo + CHUNK)
            Zc, ac = Z[sl], a[sl]
            fm = self.f[sl, None] * (self.periods[None, :] <= self.last[sl, None])
            lin = np.clip(Zc @ beta, -700, 300) if p else np.zeros(ac.size)
            E = expc[self.arm[sl]]  # exp(eta) = exp(x'beta) * exp(b(k)'(gamma + a alpha))
            E *= np.exp(lin)[:, None]
            np.minimum(E, _CAP, out=E)
            ll -= float(np.vdot(fm, np.log1p(E)))
            inv = 1.0 / (1.0 + E)
            pm = E * inv
            pm *= fm  # f * mask * p
            W = np.multiply(pm, inv, out=inv)  # f * mask * p (1 - p)
            s_k += pm.sum(axis=0)
            s_k1 += ac @ pm
            w_k += W.sum(axis=0)
            w_k1 += ac @ W
            if p:
                r_x += Zc.T @ pm.sum(axis=1)
                WtZZ += W.T @ self.ZZa[sl]
                H_xx += (Zc.T * W.sum(axis=1)) @ Zc
        grad = np.concatenate([B.T @ (self.ysum_k - s_k), B.T @ (self.ysum_k1 - s_k1),
                               self.ysum_x - r_x])
        H_tt, H_ta = (B.T * w_k) @ B, (B.T * w_k1) @ B
        H_tx, H_ax = B.T @ WtZZ[:, :p], B.T @ WtZZ[:, p:]
        H = np.block([[H_tt, H_ta, H_tx], [H_ta, H_ta, H_ax], [H_tx.T, H_ax.T, H_xx]])
        return ll, grad, H


class PooledLogistic:
    """Pooled logistic regression of a discrete-time hazard (D'Agostino et al. 1990, Stat Med
    9:1501), with frequency weights:

    .. math::

        \\operatorname{logit} h_i(k) = b(k)^\\top \\gamma + a_i\\, b(k)^\\top \\alpha
        + x_i^\\top \\beta

    with :math:`b(k)` the time basis (its constant column gives the arm's main effect, the rest
    the arm-by-time interaction). Fitted by Newton–Raphson on the implicit person-period table.

    Attributes
    ----------
    coef_ : (gamma, alpha, beta) stacked; n_iter_, converged_
    """

    def __init__(self, max_iter: int = 50, tol: float = 1e-8):
        self.max_iter = max_iter
        self.tol = tol

    def _eta_parts(self, X, params):
        q = self.basis_.shape[1]
        g, al, be = params[:q], params[q:2 * q], params[2 * q:]
        lin = (X - self.x_mean_) / self.x_scale_ @ be if X.shape[1] else np.zeros(X.shape[0])
        return lin, self.basis_ @ g, self.basis_ @ (g + al)

    def fit(self, basis, X, a, last, event, freq=None) -> PooledLogistic:
        """Fit on persons' at-risk periods ``0..last`` with ``event`` in period ``last``."""
        B = np.asarray(basis, dtype=float)
        K, q = B.shape
        X = np.asarray(X, dtype=float).reshape(len(a), -1)
        a = np.asarray(a, dtype=float)
        f = np.ones(a.size) if freq is None else np.asarray(freq, dtype=float)
        last = np.minimum(np.asarray(last, dtype=int), K - 1)
        self.basis_ = B
        self.x_mean_ = np.average(X, axis=0, weights=f) if X.shape[1] else np.zeros(0)
        sd = X.std(axis=0) if X.shape[1] else np.zeros(0)
        self.x_scale_ = np.where(sd > 0, sd, 1.0)
        keep = (f > 0) & (last >= 0)  # persons with at least one period at risk
        Z = ((X - self.x_mean_) / self.x_scale_)[keep]
        a, f, last = a[keep], f[keep], last[keep]
        ev = np.asarray(event, dtype=bool)[keep]
        y_rows, y_k, y_f = np.flatnonzero(ev), last[ev], f[ev]
        data = _Data(B, Z, a, f, last, y_rows, y_k, y_f)
        rate = y_f.sum() / max(float(f @ (last + 1)), 1e-300)
        params = np.zeros(2 * q + Z.shape[1])
        if 0 < rate < 1:
            params[:q] = np.linalg.lstsq(B, np.full(K, np.log(rate / (1 - rate))), rcond=None)[0]
        self.n_iter_, self.converged_ = 0, False
        # the blocks' products are small: BLAS threads cost more than they bring (measured)
        with threadpool_limits(limits=1, user_api="blas"):
            self._newton(data, params)
        return self

    def _newton(self, data: _Data, params: np.ndarray) -> None:
        ll, grad, H = data.pass_(params)
        for it in range(1, self.max_iter + 1):
            d = np.sqrt(np.clip(np.diag(H), 1e-300, None))
            step = np.linalg.lstsq(H / np.outer(d, d), grad / d, rcond=None)[0] / d
            size = 1.0
            while True:  # step halving: Newton steps on the log-likelihood must not descend
                new = data.pass_(params + size * step)
                if new[0] >= ll - 1e-10 * abs(ll) or size < 1e-3:
                    break
                size /= 2
            params = params + size * step
            self.n_iter_ = it
            done = np.max(np.abs(size * step)) < self.tol or abs(new[0] - ll) < 1e-13 * abs(ll)
            ll, grad, H = new
            if done:
                self.converged_ = True
                break
        self.loglik_ = ll
        self.coef_ = params

    def predict_hazard(self, X, arm: int) -> np.ndarray:
        """:math:`h_i(k)` for every person and period had everyone been in ``arm`` (n x K)."""
        X = np.asarray(X, dtype=float).reshape(np.shape(X)[0], -1)
        lin, c0, c1 = self._eta_parts(X, self.coef_)
        c = c1 if arm == 1 else c0
        return 1.0 / (1.0 + np.exp(-(lin[:, None] + c[None, :])))


def cumulative_incidence(h_out: np.ndarray, h_comp: np.ndarray | None = None) -> np.ndarray:
    """Each person's cumulative incidence at the end of each period (n x K).

    .. math::

        F_i(k) = \\sum_{l \\le k} h^{out}_i(l) \\prod_{j < l}
        \\bigl(1 - h^{out}_i(j)\\bigr)\\bigl(1 - h^{comp}_i(j)\\bigr)

    the total effect under competing events (Young et al. 2020, Stat Med 39:1199); without a
    competing event :math:`h^{comp} = 0` and :math:`F = 1 - \\prod (1 - h^{out})`.
    """
    surv = 1.0 - h_out if h_comp is None else (1.0 - h_out) * (1.0 - h_comp)
    before = np.cumprod(surv, axis=1)
    before = np.concatenate([np.ones((surv.shape[0], 1)), before[:, :-1]], axis=1)
    return np.cumsum(h_out * before, axis=1)


def at_days(F: np.ndarray, days, period_days: int, last_end: float | None = None) -> np.ndarray:
    """Values given at period ends at ``days``, linearly interpolated within a period, 0 at day 0
    (n x len(days), or len(days) for one curve).

    Period :math:`k` ends on day :math:`(k+1)P`, the last one on ``last_end`` when given (the
    follow-up's ``max_days``, which may cut the last period short).
    """
    F2 = np.atleast_2d(F)
    K = F2.shape[1]
    d = np.asarray(days, dtype=float)
    start_last = (K - 1) * period_days
    end_last = float(K * period_days if last_end is None else last_end)
    j = np.where(d <= start_last, d / period_days,
                 (K - 1) + np.clip((d - start_last) / max(end_last - start_last, 1e-12), 0, 1))
    j = np.clip(j, 0, K)
    lo = np.minimum(np.floor(j).astype(int), K - 1)
    frac = j - lo

    def column(k):  # value at the end of period k - 1 (0 at day 0)
        return np.where(k[None, :] > 0, F2[:, np.maximum(k - 1, 0)], 0.0)

    out = column(lo) * (1 - frac) + column(lo + 1) * frac
    return out if np.ndim(F) == 2 else out[0]


def hazard_models(time, status, a, X, freq, period_days: int, n_periods: int,
                  competing: bool, censoring: bool = False) -> dict[str, PooledLogistic]:
    """Fit the pooled logistic models of the outcome, competing-event and censoring hazards."""
    s = np.asarray(status, dtype=int)
    last = np.minimum(last_period(time, s, period_days), n_periods - 1)
    B = time_basis(n_periods)
    models = {"outcome": PooledLogistic().fit(B, X, a, last, s == OUTCOME, freq)}
    if competing and np.any(s == COMPETING):
        models["competing"] = PooledLogistic().fit(B, X, a, last - (s == OUTCOME),
                                                   s == COMPETING, freq)
    if censoring:
        models["censoring"] = PooledLogistic().fit(B, X, a, last - (s != 0), s == 0, freq)
    for name, m in models.items():
        if not m.converged_:
            warnings.warn(NonConvergenceWarning(
                f"the pooled logistic model of the {name} hazard did not converge"),
                stacklevel=2)
    return models


def gformula_incidence(models: dict[str, PooledLogistic], X) -> dict[int, np.ndarray]:
    """Each person's predicted cumulative incidence at period ends under each arm (n x K)."""
    X = np.asarray(X, dtype=float).reshape(np.shape(X)[0], -1)
    K = models["outcome"].basis_.shape[0]
    out = {arm: np.empty((X.shape[0], K)) for arm in (0, 1)}
    for lo in range(0, X.shape[0], CHUNK):
        Xc = X[lo:lo + CHUNK]
        for arm in (0, 1):
            h_comp = (models["competing"].predict_hazard(Xc, arm) if "competing" in models
                      else None)
            out[arm][lo:lo + CHUNK] = cumulative_incidence(
                models["outcome"].predict_hazard(Xc, arm), h_comp)
    return out


def censoring_probability_before(model: PooledLogistic, X, a, periods) -> list[np.ndarray]:
    """:math:`G_i = \\prod_{j < k_i} (1 - c_i(j))`: uncensored through the periods before
    ``k_i``, under the person's own arm (the pooled logistic censoring model).

    ``periods`` is a list of arrays :math:`k` (one value per person); one result per array.
    """
    X = np.asarray(X, dtype=float).reshape(np.shape(X)[0], -1)
    a = np.asarray(a)
    ks = [np.asarray(k, dtype=int) for k in periods]
    out = [np.empty(X.shape[0]) for _ in ks]
    for lo in range(0, X.shape[0], CHUNK):
        sl = slice(lo, lo + CHUNK)
        c = np.where(a[sl, None] == 1, model.predict_hazard(X[sl], 1),
                     model.predict_hazard(X[sl], 0))
        G = np.cumprod(1.0 - c, axis=1)
        G = np.concatenate([np.ones((G.shape[0], 1)), G], axis=1)
        rows = np.arange(G.shape[0])
        for res, k in zip(out, ks, strict=True):
            res[sl] = G[rows, np.clip(k[sl], 0, G.shape[1] - 1)]
    return out
