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

import numpy as np

from emulant.survival import COMPETING, OUTCOME, SurvivalError


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
    (natural) cubic spline with knots at the 5%, 27.5%, 50%, 72.5%, 95% quantiles of the periods
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
        Z = (X - self.x_mean_) / self.x_scale_
        Za = Z * a[:, None]
        mask = np.arange(K)[None, :] <= last[:, None]
        fm = f[:, None] * mask
        ev = np.asarray(event, dtype=bool) & (last >= 0)
        y_rows, y_k, y_f = np.flatnonzero(ev), last[ev], f[ev]
        ysum_k = np.bincount(y_k, weights=y_f, minlength=K)
        ysum_k1 = np.bincount(y_k, weights=y_f * a[ev], minlength=K)
        ysum_x = Z[y_rows].T @ y_f
        rate = y_f.sum() / max(fm.sum(), 1e-300)
        params = np.zeros(2 * q + Z.shape[1])
        if 0 < rate < 1:
            params[:q] = np.linalg.lstsq(B, np.full(K, np.log(rate / (1 - rate))), rcond=None)[0]
        self.n_iter_, self.converged_ = 0, False
        arm_idx = (a == 1).astype(np.intp)
        cap = np.exp(35.0)  # a hazard logit above 35 is a probability of 1

        def loglik(params):
            lin = np.clip(Z @ params[2 * q:], -700, 300) if Z.shape[1] else np.zeros(a.size)
            c = np.stack([B @ params[:q], B @ (params[:q] + params[q:2 * q])])
            E = np.exp(np.minimum(c, 35.0))[arm_idx]  # exp(eta) = exp(x'beta) * exp(b(k)'...)
            E *= np.exp(lin)[:, None]
            np.minimum(E, cap, out=E)
            eta_ev = lin[y_rows] + c[arm_idx[y_rows], y_k]
            ll = float(y_f @ eta_ev - np.vdot(fm, np.log1p(E)))
            return ll, E

        ll, E = loglik(params)
        for it in range(1, self.max_iter + 1):
            inv = 1.0 + E
            np.divide(1.0, inv, out=inv)
            pm = E * inv
            pm *= fm
            W = np.multiply(pm, inv, out=inv)  # f * mask * p (1 - p)
            # gradient: sums of f*mask*(y - p) over the design's columns
            r_k, r_k1 = ysum_k - pm.sum(axis=0), ysum_k1 - a @ pm
            r_x = ysum_x - Z.T @ pm.sum(axis=1)
            grad = np.concatenate([B.T @ r_k, B.T @ r_k1, r_x])
            w_k, w_k1 = W.sum(axis=0), a @ W
            WtZ, WtZa = W.T @ Z, W.T @ Za
            H_tt, H_ta = (B.T * w_k) @ B, (B.T * w_k1) @ B
            H_tx, H_ax = B.T @ WtZ, B.T @ WtZa
            H_xx = (Z.T * W.sum(axis=1)) @ Z
            H = np.block([[H_tt, H_ta, H_tx], [H_ta, H_ta, H_ax], [H_tx.T, H_ax.T, H_xx]])
            d = np.sqrt(np.clip(np.diag(H), 1e-300, None))
            step = np.linalg.lstsq(H / np.outer(d, d), grad / d, rcond=None)[0] / d
            size = 1.0
            while True:  # step halving: Newton steps on the log-likelihood must not descend
                new_ll, new_E = loglik(params + size * step)
                if new_ll >= ll - 1e-10 * abs(ll) or size < 1e-3:
                    break
                size /= 2
            params = params + size * step
            self.n_iter_ = it
            done = np.max(np.abs(size * step)) < self.tol or abs(new_ll - ll) < 1e-13 * abs(ll)
            ll, E = new_ll, new_E
            if done:
                self.converged_ = True
                break
        self.loglik_ = ll
        self.coef_ = params
        return self

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


def at_days(F: np.ndarray, days, period_days: int) -> np.ndarray:
    """Values given at period ends (columns :math:`(k+1)P`) at ``days``, linearly interpolated
    within a period, 0 at day 0 (n x len(days), or len(days) for one curve)."""
    F2 = np.atleast_2d(F)
    ext = np.concatenate([np.zeros((F2.shape[0], 1)), F2], axis=1)
    j = np.clip(np.asarray(days, dtype=float) / period_days, 0, F2.shape[1])
    lo = np.minimum(np.floor(j).astype(int), F2.shape[1] - 1)
    frac = j - lo
    out = ext[:, lo] * (1 - frac) + ext[:, lo + 1] * frac
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
    return models


def gformula_incidence(models: dict[str, PooledLogistic], X) -> dict[int, np.ndarray]:
    """Each person's predicted cumulative incidence at period ends under each arm (n x K)."""
    out = {}
    for arm in (0, 1):
        h_comp = models["competing"].predict_hazard(X, arm) if "competing" in models else None
        out[arm] = cumulative_incidence(models["outcome"].predict_hazard(X, arm), h_comp)
    return out


def censoring_probability_before(model: PooledLogistic, X, a, periods) -> np.ndarray:
    """:math:`G_i = \\prod_{j < k_i} (1 - c_i(j))`: uncensored through the periods before
    ``periods[i]`` under the person's own arm (the pooled logistic censoring model)."""
    a = np.asarray(a)
    c = np.where(a[:, None] == 1, model.predict_hazard(X, 1), model.predict_hazard(X, 0))
    G = np.cumprod(1.0 - c, axis=1)
    G = np.concatenate([np.ones((G.shape[0], 1)), G], axis=1)
    k = np.clip(np.asarray(periods, dtype=int), 0, G.shape[1] - 1)
    return G[np.arange(G.shape[0]), k]
