"""Pooled logistic models of daily hazards and the parametric g-formula for risks.

Follow-up is counted in days; day :math:`d \\ge 1` lies in period :math:`k = \\lfloor (d-1)/P
\\rfloor` of ``period_days`` :math:`P` days (days :math:`kP+1, \\dots, (k+1)P`). The periods are
only the time basis of the hazard: the hazard of each model is a *daily* hazard, constant within
a period, and the risk set is exact to the day. A person followed to day :math:`T_i` is at risk
on days :math:`1, \\dots, T_i` (censoring comes after events on its day, as in Kaplan–Meier); an
event on day 0 is counted on day 1. Within a day the outcome comes first: the outcome model is at
risk on days :math:`1..T_i`, the competing-event model on those days without the outcome, the
censoring model on the days without an event of either cause (:func:`days_at_risk`).

With :math:`m_{ik}` the days person :math:`i` is at risk in period :math:`k` and :math:`y_{ik}`
the event on the last of them, the log-likelihood of the daily hazard :math:`h_i(k)` is

.. math:: \\ell = \\sum_{i,k} f_i \\bigl[y_{ik} \\log h_i(k) + (m_{ik} - y_{ik})
          \\log(1 - h_i(k))\\bigr],

the pooled logistic likelihood of the person-day table (a binomial of :math:`m_{ik}` trials per
person-period), fitted by Newton–Raphson with the Hessian assembled from per-person and
per-period sums, so neither the person-day nor the person-period table is materialised. A person
censored inside a period contributes only the days followed there (not the whole period), which
is what makes the g-formula agree with the Aalen–Johansen estimate under saturated models.
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


def days_at_risk(time, status, model: str, lost=None) -> tuple[np.ndarray, np.ndarray]:
    """Days at risk :math:`d_i` (days :math:`1..d_i`) of one model, and its event on day
    :math:`d_i`.

    ``outcome``: :math:`d = T` (an event on day 0 counts on day 1), the event is the outcome;
    ``competing``: the day of an outcome is not at risk of the competing event;
    ``censoring``: ``lost`` (bool) marks the censorings the censoring model counts (a loss to
    follow-up on day :math:`T`, at risk that day); every other person leaves it after day
    :math:`T - 1` (an event comes before censoring on its day, and a planned end of follow-up is
    no loss).
    """
    t = np.asarray(time, dtype=float)
    s = np.asarray(status, dtype=int)
    d = np.where(s != 0, np.maximum(t, 1.0), t)
    if model == "outcome":
        return d, s == OUTCOME
    if model == "competing":
        return d - (s == OUTCOME), s == COMPETING
    if model == "censoring":
        gone = np.asarray(lost, dtype=bool) & (s == 0) & (t >= 1)
        return np.where(gone, d, np.maximum(d - 1, 0.0)), gone
    raise SurvivalError(f"model {model!r}: expected 'outcome', 'competing' or 'censoring'")


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

    def __init__(self, B, Z, a, f, days, period_days, y_rows, y_k, y_f):
        self.B, self.Z, self.a, self.f, self.days = B, Z, a, f, days
        self.P = period_days
        self.arm = (a == 1).astype(np.intp)
        self.y_rows, self.y_k, self.y_f = y_rows, y_k, y_f
        K = B.shape[0]
        self.starts = np.arange(K) * period_days  # days before each period
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
            # f * days at risk in each period (0 after the last one)
            fm = np.clip(self.days[sl, None] - self.starts[None, :], 0, self.P)
            fm *= self.f[sl] if self.f.ndim == 2 else self.f[sl, None]
            lin = np.clip(Zc @ beta, -700, 300) if p else np.zeros(ac.size)
            E = expc[self.arm[sl]]  # exp(eta) = exp(x'beta) * exp(b(k)'(gamma + a alpha))
            E *= np.exp(lin)[:, None]
            np.minimum(E, _CAP, out=E)
            ll -= float(np.vdot(fm, np.log1p(E)))
            inv = 1.0 / (1.0 + E)
            pm = E * inv
            pm *= fm  # f * m * p
            W = np.multiply(pm, inv, out=inv)  # f * m * p (1 - p)
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
    """Pooled logistic regression of a daily hazard, constant within each period (D'Agostino et
    al. 1990, Stat Med 9:1501, on the person-day table), with frequency weights:

    .. math::

        \\operatorname{logit} h_i(k) = b(k)^\\top \\gamma + a_i\\, b(k)^\\top \\alpha
        + x_i^\\top \\beta

    with :math:`b(k)` the time basis of the period :math:`k` (its constant column gives the
    arm's main effect, the rest the arm-by-time interaction). Fitted by Newton–Raphson on the
    implicit person-period table, each cell a binomial of the days at risk in it.

    The weights are one per person (``freq`` of length n), or one per person and period
    (n x K, e.g. the per-protocol weights over time: each day of period :math:`k` of person
    :math:`i` then counts :math:`w_{ik}` times).

    Attributes
    ----------
    coef_ : (gamma, alpha, beta) stacked; period_days_; n_iter_, converged_
    """

    def __init__(self, max_iter: int = 50, tol: float = 1e-8, penalty: float = 0.0):
        self.max_iter = max_iter
        self.tol = tol
        self.penalty = penalty  # ridge on the arm and covariate coefficients (scaled columns)

    def _eta_parts(self, X, params):
        q = self.basis_.shape[1]
        g, al, be = params[:q], params[q:2 * q], params[2 * q:]
        lin = (X - self.x_mean_) / self.x_scale_ @ be if X.shape[1] else np.zeros(X.shape[0])
        return lin, self.basis_ @ g, self.basis_ @ (g + al)

    def fit(self, basis, X, a, days, event, freq=None, period_days: int = 1,
            start=None) -> PooledLogistic:
        """Fit on persons at risk on days ``1..days`` with ``event`` on the last of them.

        ``basis`` has one row per period of ``period_days`` days; days past the last period
        are not at risk. ``freq``: frequency weights per person (n) or per person and period
        (n x K). ``start``: coefficients to start Newton's method from (a bootstrap
        replicate starts from the point estimate's ``coef_``, a few iterations from its own
        optimum); by default the constant hazard of the crude daily rate.
        """
        B = np.asarray(basis, dtype=float)
        K, q = B.shape
        X = np.asarray(X, dtype=float).reshape(len(a), -1)
        a = np.asarray(a, dtype=float)
        f = np.ones(a.size) if freq is None else np.asarray(freq, dtype=float)
        if f.shape not in ((a.size,), (a.size, K)):
            raise SurvivalError(f"freq has shape {f.shape}: expected ({a.size},) or ({a.size}, {K})")
        days = np.minimum(np.floor(np.asarray(days, dtype=float)), K * period_days)
        self.basis_, self.period_days_ = B, int(period_days)
        # per person (period 0's with weights per period): who is kept, how columns are centred
        f_person = f if f.ndim == 1 else f[:, 0]
        self.x_mean_ = (np.average(X, axis=0, weights=f_person) if X.shape[1] and f_person.sum() > 0
                        else np.zeros(X.shape[1]))
        sd = X.std(axis=0) if X.shape[1] else np.zeros(0)
        self.x_scale_ = np.where(sd > 0, sd, 1.0)
        keep = (f_person > 0) & (days >= 1)  # persons with at least one weighted day at risk
        Z = ((X - self.x_mean_) / self.x_scale_)[keep]
        a, f, days = a[keep], f[keep], days[keep]
        ev = np.asarray(event, dtype=bool)[keep]
        last = (np.ceil(days / period_days) - 1).astype(int)  # the period of the last day
        y_rows, y_k = np.flatnonzero(ev), last[ev]
        y_f = f[y_rows, y_k] if f.ndim == 2 else f[ev]
        data = _Data(B, Z, a, f, days, period_days, y_rows, y_k, y_f)
        rate = y_f.sum() / max(float(f_person[keep] @ days), 1e-300)  # the start's crude rate
        params = np.zeros(2 * q + Z.shape[1])
        if start is not None and np.shape(start) == params.shape and np.all(np.isfinite(start)):
            params = np.array(start, dtype=float)
        elif 0 < rate < 1:
            params[:q] = np.linalg.lstsq(B, np.full(K, np.log(rate / (1 - rate))), rcond=None)[0]
        self.n_iter_, self.converged_ = 0, False
        # the blocks' products are small: BLAS threads cost more than they bring (measured)
        with threadpool_limits(limits=1, user_api="blas"):
            self._newton(data, params)
        return self

    def _pass(self, data: _Data, params: np.ndarray):
        ll, grad, H = data.pass_(params)
        if self.penalty > 0:  # every coefficient but the baseline hazard's (gamma)
            pen = np.r_[np.zeros(data.B.shape[1]), np.full(params.size - data.B.shape[1], self.penalty)]
            ll -= 0.5 * float(pen @ (params * params))
            grad = grad - pen * params
            H = H + np.diag(pen)
        return ll, grad, H

    def _newton(self, data: _Data, params: np.ndarray) -> None:
        ll, grad, H = self._pass(data, params)
        for it in range(1, self.max_iter + 1):
            d = np.sqrt(np.clip(np.diag(H), 1e-300, None))
            step = np.linalg.lstsq(H / np.outer(d, d), grad / d, rcond=None)[0] / d
            size = 1.0
            while True:  # step halving: Newton steps on the log-likelihood must not descend
                new = self._pass(data, params + size * step)
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
        """The daily hazard :math:`h_i(k)` for every person and period had everyone been in
        ``arm`` (n x K)."""
        X = np.asarray(X, dtype=float).reshape(np.shape(X)[0], -1)
        lin, c0, c1 = self._eta_parts(X, self.coef_)
        c = c1 if arm == 1 else c0
        return 1.0 / (1.0 + np.exp(-(lin[:, None] + c[None, :])))


def _log1m(h: np.ndarray) -> np.ndarray:
    """:math:`\\log(1 - h)`, with :math:`h` kept below 1 so that logs stay finite."""
    return np.log1p(-np.minimum(h, 1.0 - 1e-12))


def _split(days, period_days: int, K: int):
    """Day :math:`d` as full periods before it and the days of the next period through it."""
    d = np.asarray(days, dtype=float)
    k = np.clip(np.ceil(d / period_days) - 1, 0, K - 1).astype(int)
    return k, np.clip(d - k * period_days, 0, period_days)


def survival_through(log_q: np.ndarray, days, period_days: int,
                     own: bool = False) -> np.ndarray:
    """:math:`\\exp \\sum_{j=1}^{d} \\log q_i(k(j))`: surviving days :math:`1..d` with the
    daily probability :math:`q_i(k)` of period :math:`k` (``log_q``, n x K); 1 at :math:`d = 0`.

    For each person and each of ``days`` (n x len(days)), or with ``own`` for each person at
    their own day (``days`` of length n; n values).
    """
    n, K = log_q.shape
    k, j = _split(days, period_days, K)
    before = np.concatenate([np.zeros((n, 1)), np.cumsum(period_days * log_q, axis=1)], axis=1)
    if own:
        rows = np.arange(n)
        return np.exp(before[rows, k] + log_q[rows, k] * j)
    return np.exp(before[:, k] + log_q[:, k] * j)


def incidence_at(h_out: np.ndarray, h_comp: np.ndarray | None, days,
                 period_days: int) -> np.ndarray:
    """Each person's cumulative incidence of the outcome by each of ``days`` (n x len(days)).

    With daily hazards :math:`h` (outcome) and :math:`c` (competing event, 0 without one),
    constant within each period, and :math:`q = (1-h)(1-c)`,

    .. math::

        F_i(d) = \\sum_{j=1}^{d} h_i(k(j)) \\prod_{l<j} q_i(k(l)),

    summed in closed form over each period's days,
    :math:`\\sum_{j=1}^{m} h q^{j-1} = h (1 - q^m)/(1 - q)` — the total effect under
    competing events (Young et al. 2020, Stat Med 39:1199); without a competing event
    :math:`F = 1 - \\prod (1 - h)`.
    """
    K = h_out.shape[1]
    log_q = _log1m(h_out) + (0.0 if h_comp is None else _log1m(h_comp))
    k, j = _split(days, period_days, K)

    def geometric(m, lq):  # sum_{j=1}^{m} q^(j-1), with q = exp(lq) <= 1
        den = np.expm1(lq)
        return np.divide(np.expm1(m * lq), den, out=np.broadcast_to(m, lq.shape).astype(float),
                         where=den < 0)

    start = survival_through(log_q, np.arange(K) * period_days, period_days)  # S at period starts
    gain = start * h_out * geometric(float(period_days), log_q)  # incidence over a full period
    before = np.concatenate([np.zeros((h_out.shape[0], 1)), np.cumsum(gain, axis=1)], axis=1)
    return before[:, k] + start[:, k] * h_out[:, k] * geometric(j[None, :], log_q[:, k])


def hazard_models(time, status, a, X, freq, period_days: int, max_days: int,
                  competing: bool, lost=None, start=None) -> dict[str, PooledLogistic]:
    """Fit the pooled logistic models of the outcome, competing-event and censoring hazards.

    Follow-up runs to day ``max_days`` (:math:`\\lceil` ``max_days`` / P :math:`\\rceil`
    periods). ``lost`` (bool per person, or None for no censoring model) marks the censorings
    the censoring model counts: a loss to follow-up, never the planned end of follow-up
    (:func:`emulant.estimation.tte.losses`). ``start`` maps a model's name to the coefficients
    its Newton's method starts from (:meth:`PooledLogistic.fit`).
    """
    t = np.minimum(np.asarray(time, dtype=float), max_days)
    s = np.asarray(status, dtype=int)
    K = max(1, -(-int(max_days) // period_days))
    B = time_basis(K)
    kinds = ["outcome"] + (["competing"] if competing and np.any(s == COMPETING) else [])
    kinds += ["censoring"] if lost is not None else []
    models = {}
    for name in kinds:
        days, event = days_at_risk(t, s, name, lost)
        models[name] = PooledLogistic().fit(B, X, a, days, event, freq, period_days,
                                            start=(start or {}).get(name))
    for name, m in models.items():
        if not m.converged_:
            warnings.warn(NonConvergenceWarning(
                f"the pooled logistic model of the {name} hazard did not converge"),
                stacklevel=2)
    return models


def gformula_incidence(models: dict[str, PooledLogistic], X, days) -> dict[int, np.ndarray]:
    """Each person's predicted cumulative incidence by each of ``days`` under each arm
    (n x len(days))."""
    X = np.asarray(X, dtype=float).reshape(np.shape(X)[0], -1)
    P = models["outcome"].period_days_
    out = {arm: np.empty((X.shape[0], np.size(days))) for arm in (0, 1)}
    for lo in range(0, X.shape[0], CHUNK):
        Xc = X[lo:lo + CHUNK]
        for arm in (0, 1):
            h_comp = (models["competing"].predict_hazard(Xc, arm) if "competing" in models
                      else None)
            out[arm][lo:lo + CHUNK] = incidence_at(models["outcome"].predict_hazard(Xc, arm),
                                                   h_comp, days, P)
    return out


def censoring_probability_before(model: PooledLogistic, X, a, days) -> list[np.ndarray]:
    """:math:`G_i(d^-) = \\prod_{j < d} (1 - c_i(k(j)))`: uncensored on the days before
    :math:`d_i`, under the person's own arm (the pooled logistic censoring model).

    ``days`` is a list of arrays :math:`d` (one value per person); one result per array.
    """
    X = np.asarray(X, dtype=float).reshape(np.shape(X)[0], -1)
    a = np.asarray(a)
    P = model.period_days_
    ds = [np.maximum(np.asarray(d, dtype=float) - 1, 0) for d in days]
    out = [np.empty(X.shape[0]) for _ in ds]
    for lo in range(0, X.shape[0], CHUNK):
        sl = slice(lo, lo + CHUNK)
        log_c = _log1m(np.where(a[sl, None] == 1, model.predict_hazard(X[sl], 1),
                                model.predict_hazard(X[sl], 0)))
        for res, d in zip(out, ds, strict=True):
            res[sl] = survival_through(log_c, d[sl], P, own=True)
    return out
