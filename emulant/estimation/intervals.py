"""Bootstrap standard errors and 95% intervals from the replicates (:mod:`.bootstrap`).

Standard error: the standard deviation of the replicate estimates (on the log scale for the
ratio measures ``risk_ratio`` and ``hazard_ratio``). Intervals at 95%: ``wald`` (estimate ±
1.96·SE, on the log scale for ratios, then exponentiated) or ``percentile`` (the 2.5th and
97.5th percentiles of the replicates). Source: Efron & Tibshirani, *An Introduction to the
Bootstrap* (1993), chapters 6 and 13.
"""

from __future__ import annotations

import numpy as np

from emulant.estimation.bootstrap import RATIO_MEASURES, BootstrapRun, _too_many

Z_975 = 1.959963984540054  # the standard normal's 97.5th percentile ("1.96")


def bootstrap_intervals(point: np.ndarray, reps: np.ndarray, ratio: np.ndarray,
                        interval: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    r"""Bootstrap SE and 95% interval per column of ``reps`` (replicates x estimates).

    .. math:: \widehat{SE} = \operatorname{SD}_r(\hat\theta^{*}_r), \qquad
              \text{wald: } \hat\theta \pm 1.96\,\widehat{SE}, \qquad
              \text{percentile: } [\hat\theta^{*}_{(2.5\%)}, \hat\theta^{*}_{(97.5\%)}]

    For ``ratio`` columns :math:`\theta` is replaced by :math:`\log\theta` in the SE and the
    Wald interval, whose ends are then exponentiated; the SE is reported on the log scale.
    Fewer than two finite replicate values give NaN. Source: Efron & Tibshirani (1993), ch. 6, 13.
    """
    point = np.asarray(point, dtype=float)
    k = point.shape[0]
    nan = np.full(k, np.nan)
    if reps.shape[0] == 0 or k == 0:
        return nan, nan.copy(), nan.copy()
    ratio = np.asarray(ratio, dtype=bool)
    with np.errstate(all="ignore"):
        scale = np.where(ratio, np.log(np.where(reps > 0, reps, np.nan)), reps)
        centre = np.where(ratio, np.log(np.where(point > 0, point, np.nan)), point)
    finite = np.isfinite(scale)
    scale = np.where(finite, scale, np.nan)  # an infinite ratio is no value (counted elsewhere)
    count = finite.sum(axis=0)
    se = nan.copy()
    ok = count >= 2
    if ok.any():
        se[ok] = np.nanstd(scale[:, ok], axis=0, ddof=1)
    if interval == "wald":
        lo, hi = centre - Z_975 * se, centre + Z_975 * se
        lo = np.where(ratio, np.exp(lo), lo)
        hi = np.where(ratio, np.exp(hi), hi)
    elif interval == "percentile":
        lo, hi = nan.copy(), nan.copy()
        if ok.any():
            raw = np.where(finite, reps, np.nan)[:, ok]
            lo[ok], hi[ok] = np.nanquantile(raw, [0.025, 0.975], axis=0)
    else:
        raise ValueError(f"analysis.bootstrap.interval: expected wald or percentile, got {interval!r}")
    return se, lo, hi


def non_estimable_replicates(rows: list[dict], run: BootstrapRun) -> np.ndarray:
    """Per row: completed replicates whose value is missing, or 0 or infinite for a ratio,
    while the point estimate is estimable (those replicates cannot enter a log-scale interval)."""
    point = np.array([np.nan if r.get("estimate") is None else float(r["estimate"]) for r in rows])
    ratio = np.array([r.get("measure") in RATIO_MEASURES for r in rows], dtype=bool)
    reps = run.row_reps
    with np.errstate(all="ignore"):
        bad = ~np.isfinite(reps) | (ratio & (reps <= 0))
        ok = np.isfinite(point) & ~(ratio & (point <= 0))
    return np.where(ok, bad.sum(axis=0), 0).astype(int)


def no_replicates(protocol, n_rows: int, n_curves: int) -> BootstrapRun:
    """An empty run: no replicate requested (every interval from the influence function)."""
    s = protocol.analysis.bootstrap
    return BootstrapRun(0, s.seed, "wald", np.empty((0, n_rows)), np.empty((0, n_curves)),
                        kind=s.kind)


def attach_intervals(rows: list[dict], curves: list[dict], run: BootstrapRun,
                     interval: str) -> tuple[list[dict], list[dict]]:
    """New rows with ``se, ci_low, ci_high`` (estimates) and ``ci_low, ci_high`` (curves).

    Replicates whose value is not estimable (:func:`non_estimable_replicates`) are left out of
    a row's interval and counted in its ``note``; above 5% of the completed replicates (the
    share that stops the whole bootstrap) the row gets no interval, since leaving out the
    replicates with no events in an arm would narrow it towards the estimable ones.
    """
    point = np.array([np.nan if r.get("estimate") is None else float(r["estimate"]) for r in rows])
    ratio = np.array([r.get("measure") in RATIO_MEASURES for r in rows], dtype=bool)
    se, lo, hi = bootstrap_intervals(point, run.row_reps, ratio, interval)
    bad = non_estimable_replicates(rows, run)
    out = []
    for r, s, a, b, k in zip(rows, se, lo, hi, bad, strict=True):
        r = {**r, "se": float(s), "ci_low": float(a), "ci_high": float(b)}
        if k > 0:
            many = _too_many(int(k), run.completed)
            note = (f"{k} of {run.completed} bootstrap replicates not estimable (missing, 0 or "
                    f"infinite); {'no interval' if many else 'interval from the others'}")
            r["note"] = f"{r['note']}; {note}" if r.get("note") else note
            if many:
                r.update(se=float("nan"), ci_low=float("nan"), ci_high=float("nan"))
        out.append(r)
    cpoint = np.array([np.nan if c.get("risk") is None else float(c["risk"]) for c in curves])
    _, clo, chi = bootstrap_intervals(cpoint, run.curve_reps, np.zeros(len(curves), bool), interval)
    cout = [{**c, "ci_low": float(a), "ci_high": float(b)}
            for c, a, b in zip(curves, clo, chi, strict=True)]
    return out, cout
