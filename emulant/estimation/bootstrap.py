"""Nonparametric bootstrap of the whole analysis, as frequency weights.

Replicate ``r`` draws person weights (multinomial counts, or Dirichlet weights for the Bayesian
bootstrap: :func:`replicate_freq`) from its own random stream
``numpy.random.default_rng([seed, r])`` and refits everything with them: the
propensity model, each estimand's weights (with truncation), the censoring models and the
outcome models (:func:`emulant.estimation.sample.build_sample`, :func:`emulant.estimation.effects.estimate_sample`).
The rows are never copied: the cohort and its design matrix are handed to each worker once,
by the pool's initializer. Each worker runs one BLAS thread, and a replicate's numbers depend
only on ``(seed, r)``, so results are identical bit for bit whatever the number of workers.

Standard errors and intervals from the replicates: :mod:`.intervals`.
"""

from __future__ import annotations

import math
import os
import time
import warnings
from collections import Counter
from collections.abc import Callable, Iterator
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from contextlib import contextmanager
from dataclasses import dataclass, field
from multiprocessing import get_all_start_methods, get_context
from typing import Any

import numpy as np

from emulant.errors import EmulantError, NonConvergenceWarning, ReplicateFailure
from emulant.progress import Progress

ROW_KEY = ("outcome", "contrast", "estimand", "method", "measure", "horizon_day", "arm",
           "comparator", "subgroup")
CURVE_KEY = ("outcome", "contrast", "estimand", "method", "arm", "day")  # outcome when present
RATIO_MEASURES = ("risk_ratio", "hazard_ratio")
MAX_FAILED_SHARE = 0.05
_THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS",
                "VECLIB_MAXIMUM_THREADS", "NUMEXPR_NUM_THREADS")


class BootstrapError(EmulantError):
    """Too many failed replicates (above 5%); the message gives the counts and the reasons."""


# ----------------------------------------------------------------------------- resampling


def replicate_freq(n: int, seed: int, r: int, kind: str = "multinomial") -> np.ndarray:
    """The person weights of replicate ``r``, from one random stream per ``(seed, r)``.

    ``multinomial``: counts ``Multinomial(n, 1/n, …, 1/n)`` (Efron's bootstrap).
    ``bayesian``: ``n`` times Dirichlet(1, …, 1) weights, drawn as normalised standard
    exponentials (Rubin 1981, Ann Stat 9:130), so replicate-based shares read as posterior
    probabilities under a non-informative prior. Both sum to ``n``.
    """
    rng = np.random.default_rng([seed, r])
    if kind == "bayesian":
        g = rng.standard_exponential(n)
        return g * (n / g.sum())
    return rng.multinomial(n, np.full(n, 1.0 / n)).astype(float)


def resampling_units(cohort) -> tuple[np.ndarray | None, np.ndarray | None]:
    """What the bootstrap resamples, and each row's weight before resampling.

    A cohort of person-trials (a ``trial`` column, CONTRACTS §5c) or of clones (a person in
    every arm, §5d: ``person_id`` repeats) resamples persons with all their rows: ``clusters``
    gives each row its person's index. A ``sample_weight`` column
    (the inverse share of sampled non-initiators) multiplies every replicate's frequency
    weights and is the point estimate's. Both are None for a cohort of one row per person
    (every row resampled alone, unit weights). Resampling the independent units, not the
    correlated rows, is the cluster bootstrap (Davison & Hinkley 1997, Bootstrap Methods and
    their Application, §3.8).
    """
    clusters = base = None
    if "trial" in cohort.columns or ("person_id" in cohort.columns and not cohort["person_id"].is_unique):
        clusters = np.unique(cohort["person_id"].to_numpy(), return_inverse=True)[1]
    if "sample_weight" in cohort.columns:
        base = cohort["sample_weight"].to_numpy(dtype=float)
    return clusters, base


def unit_freq(n: int, seed: int, r: int, kind: str, clusters: np.ndarray | None,
              base: np.ndarray | None) -> np.ndarray:
    """The row weights of replicate ``r``: :func:`replicate_freq` drawn per cluster (per row
    when ``clusters`` is None) and given to its rows, times ``base``."""
    if clusters is None:
        freq = replicate_freq(n, seed, r, kind)
    else:
        freq = replicate_freq(int(clusters.max()) + 1 if len(clusters) else 0, seed, r,
                              kind)[clusters]
    return freq if base is None else freq * base


def _norm(v: Any) -> Any:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return None
    if isinstance(v, np.generic):
        return v.item()
    return v


def row_key(row: dict, key_columns: tuple[str, ...]) -> tuple:
    """The identifying columns of a row (missing ones and NaN read as None)."""
    return tuple(_norm(row.get(c)) for c in key_columns)


def key_index(rows: list[dict], key_columns: tuple[str, ...]) -> dict[tuple, int]:
    idx: dict[tuple, int] = {}
    for i, row in enumerate(rows):
        k = row_key(row, key_columns)
        if k in idx:
            raise ValueError(f"two estimate rows share the key {dict(zip(key_columns, k, strict=True))}")
        idx[k] = i
    return idx


def align(rows: list[dict], index: dict[tuple, int], key_columns: tuple[str, ...],
          value: str) -> np.ndarray:
    """A replicate's values in the point estimate's row order (NaN for a row it lacks)."""
    out = np.full(len(index), np.nan)
    for row in rows:
        i = index.get(row_key(row, key_columns))
        if i is not None and row.get(value) is not None:
            out[i] = float(row[value])
    return out


# ----------------------------------------------------------------------------- workers

_STATE: dict[str, Any] = {}


@contextmanager
def _one_thread_env() -> Iterator[None]:
    """Set the BLAS thread variables to 1 while worker processes start (read at their import)."""
    old = {k: os.environ.get(k) for k in _THREAD_VARS}
    os.environ.update({k: "1" for k in _THREAD_VARS})
    try:
        yield
    finally:
        for k, v in old.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


def _init_worker(state: dict[str, Any]) -> None:
    from threadpoolctl import threadpool_limits

    _STATE.clear()
    _STATE.update(state)
    _STATE["limits"] = threadpool_limits(limits=1)  # kept alive for the worker's life


def _replicate(r: int) -> tuple[int, np.ndarray | None, np.ndarray | None, str | None]:
    """Run replicate ``r`` on the worker's shared state; a failure returns its reason."""
    s = _STATE
    freq = unit_freq(s["n"], s["seed"], r, s["kind"], s.get("clusters"), s.get("base"))
    try:
        with np.errstate(all="ignore"), warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")  # kept to look for non-convergence, never shown
            rows, curves = s["estimator"](freq)
        failed = [w for w in caught if issubclass(w.category, NonConvergenceWarning)]
        if failed:
            return r, None, None, str(failed[0].message)
    except ReplicateFailure as exc:
        return r, None, None, exc.reason
    except Exception as exc:  # noqa: BLE001 - any failure of a replicate is counted, not raised
        return r, None, None, f"error: {type(exc).__name__}: {str(exc)[:80]}"
    vals = align(rows, s["row_index"], ROW_KEY, "estimate")
    cvals = align(curves, s["curve_index"], CURVE_KEY, "risk")
    return r, vals, cvals, None


# ----------------------------------------------------------------------------- the run


@dataclass
class BootstrapRun:
    """Replicate estimates (completed replicates only, in replicate order) and their account.

    A run may cover only some of the ``requested`` replicates (one chunk of them); chunks are
    put together by :func:`emulant.estimation.chunks.combine_runs`.
    """

    requested: int
    seed: int
    interval: str
    row_reps: np.ndarray  # completed x rows
    curve_reps: np.ndarray  # completed x curve rows
    completed_ids: list[int] = field(default_factory=list)  # replicate numbers, ascending
    failures: dict[int, str] = field(default_factory=dict)  # replicate number -> reason
    workers: int = 1
    start_method: str = "in-process"
    seconds: float = 0.0
    kind: str = "multinomial"

    @property
    def reasons(self) -> dict[str, int]:
        """Failure reasons with their counts, most frequent first (ties by first replicate)."""
        return dict(Counter(self.failures[r] for r in sorted(self.failures)).most_common())

    @property
    def failed(self) -> int:
        return len(self.failures)

    @property
    def completed(self) -> int:
        return int(self.row_reps.shape[0])

    def account(self) -> dict[str, Any]:
        """bootstrap.json: what was asked, what completed, why replicates failed.

        Nothing in it depends on how the replicates were spread over chunks, processes or
        machines (timing and workers go to the log), so it is identical byte for byte.
        """
        return {"requested": self.requested, "completed": self.completed, "failed": self.failed,
                "failure_reasons": self.reasons, "seed": self.seed,
                "interval": self.interval, "level": 0.95,
                "se_scale": {m: "log" for m in RATIO_MEASURES},
                "kind": self.kind, "resampling": (
                    "Dirichlet(1, ..., 1) person weights times n (Bayesian bootstrap)"
                    if self.kind == "bayesian" else "multinomial frequency weights")
                + ", numpy default_rng([seed, r])"}


def _too_many(failed: int, requested: int) -> bool:
    return failed > MAX_FAILED_SHARE * requested


def _fail_message(failures: dict[int, str], requested: int) -> str:
    reasons = Counter(failures[r] for r in sorted(failures))
    why = "; ".join(f"{k}: {v}" for k, v in reasons.most_common())
    return (f"bootstrap stopped: {len(failures)} of {requested} replicates failed "
            f"(more than {MAX_FAILED_SHARE:.0%}); reasons — {why}")


def _run_serial(state, reps, on_result) -> None:
    from threadpoolctl import threadpool_limits

    saved = dict(_STATE)
    try:
        _STATE.clear()
        _STATE.update(state)
        with threadpool_limits(limits=1):
            for r in reps:
                if on_result(_replicate(r)):
                    return
    finally:
        _STATE.clear()
        _STATE.update(saved)


def default_start_method() -> str:
    """'fork' where the platform has it, else 'spawn'.

    Fork does not re-run the caller's main module in the workers (spawn does, which fails in a
    script without an ``if __name__ == "__main__"`` guard, such as a workflow script); the workers
    only run numpy code with one BLAS thread (OpenBLAS shuts its threads down around a fork).
    """
    return "fork" if "fork" in get_all_start_methods() else "spawn"


def _run_pool(state, reps, on_result, workers: int, start_method: str | None) -> None:
    start_method = start_method or default_start_method()
    with _one_thread_env():
        pool = ProcessPoolExecutor(max_workers=workers, mp_context=get_context(start_method),
                                   initializer=_init_worker, initargs=(state,))
        try:
            pending = {pool.submit(_replicate, r) for r in reps}
            while pending:
                done, pending = wait(pending, return_when=FIRST_COMPLETED)
                for fut in done:
                    if on_result(fut.result()):
                        for p in pending:
                            p.cancel()
                        return
        finally:
            pool.shutdown(wait=True, cancel_futures=True)


def run_bootstrap(estimator: Callable[[np.ndarray], tuple[list[dict], list[dict]]], n: int,
                  protocol, rows: list[dict], curves: list[dict], workers: int = 2,
                  progress: bool | Callable | None = None, start_method: str | None = None,
                  replicates: int | None = None, seed: int | None = None,
                  only: range | None = None, clusters: np.ndarray | None = None,
                  base: np.ndarray | None = None) -> BootstrapRun:
    """Run the protocol's bootstrap replicates; ``rows``/``curves`` are the point estimate's.

    ``estimator(freq)`` refits the whole analysis with frequency weights ``freq`` (one per each of
    the ``n`` persons) and returns its ``(rows, curves)``; a :class:`~emulant.errors.ReplicateFailure`
    it raises fails that replicate with the exception's ``reason``. With worker processes it
    must pickle (a module-level function or a :func:`functools.partial` of one). ``only`` runs
    one chunk of the replicates (e.g. ``range(25, 50)``); replicate ``r`` gives the same numbers
    whichever chunk, process or machine runs it. ``clusters`` (row -> cluster index) resamples
    clusters with all their rows and ``base`` multiplies the weights (:func:`unit_freq`,
    :func:`resampling_units`). ``progress``: None (a terminal bar when
    standard error is a terminal), True/False, or a callback ``f(done, total)``; a line with
    done/total, elapsed time and the time left goes to the ``emulant`` log at every tenth.

    Raises
    ------
    BootstrapError
        As soon as more than 5% of the requested replicates have failed.
    """
    settings = protocol.analysis.bootstrap
    requested = settings.replicates if replicates is None else int(replicates)
    seed = settings.seed if seed is None else int(seed)
    reps = range(requested) if only is None else only
    if reps.start < 0 or reps.stop > requested:
        raise ValueError(f"replicates {reps.start}-{reps.stop - 1} outside 0-{requested - 1}")
    state = {"estimator": estimator, "n": int(n), "seed": seed, "kind": settings.kind,
             "row_index": key_index(rows, ROW_KEY), "curve_index": key_index(curves, CURVE_KEY),
             "clusters": clusters, "base": base}
    results: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    failures: dict[int, str] = {}
    what = ("bootstrap replicates" if only is None
            else f"bootstrap replicates {reps.start}-{reps.stop - 1} of 0-{requested - 1}")
    bar = Progress(what, len(reps), bar=progress if isinstance(progress, bool) or progress is None
                   else False, callback=progress if callable(progress) else None)
    t0 = time.monotonic()

    def on_result(res) -> bool:
        r, vals, cvals, reason = res
        if reason is None:
            results[r] = (vals, cvals)
        else:
            failures[r] = reason
        bar.update(len(results) + len(failures), len(failures))
        return _too_many(len(failures), requested)

    try:
        if len(reps) > 0 and workers > 1:
            _run_pool(state, reps, on_result, workers, start_method)
        elif len(reps) > 0:
            _run_serial(state, reps, on_result)
    finally:
        bar.close()
    if _too_many(len(failures), requested):
        raise BootstrapError(_fail_message(failures, requested))
    order = sorted(results)
    row_reps = np.array([results[r][0] for r in order]).reshape(len(order), len(rows))
    curve_reps = np.array([results[r][1] for r in order]).reshape(len(order), len(curves))
    method = "in-process" if workers <= 1 else (start_method or default_start_method())
    return BootstrapRun(requested, seed, settings.interval, row_reps, curve_reps, order,
                        {r: failures[r] for r in sorted(failures)}, max(1, workers), method,
                        time.monotonic() - t0, settings.kind)
