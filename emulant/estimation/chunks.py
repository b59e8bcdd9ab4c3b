"""The bootstrap split into chunks a scheduler can spread, and put back together.

The workflow runs the estimation stage as separate jobs: ``estimate_point`` (the point estimate,
``bootstrap/point.json``), one ``bootstrap_chunk`` per range of replicates
(``bootstrap/replicates_<first>-<last>.npz``) and ``estimate_effects``, which gathers them into
``estimates.csv``, ``curves.csv`` and ``bootstrap.json``. Replicate ``r`` depends only on
``(seed, r)`` (:func:`emulant.estimation.bootstrap.replicate_freq`) and runs with one BLAS
thread, so the gathered files are identical byte for byte whatever the chunking, the number of
cores or the machines that ran the chunks.

A chunk file holds the completed replicates' numbers and values (aligned to the point estimate's
rows and curve rows), the failed replicates' numbers and reasons, and the run's settings, so a
chunk of another run (other seed or replicate count) is refused.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from emulant.estimation.bootstrap import (
    BootstrapError,
    BootstrapRun,
    _fail_message,
    _too_many,
)

REPLICATES_PER_CHUNK = 25  # the default chunk size: a few minutes each at a million persons


@dataclass
class PointEstimate:
    """The point estimate's rows (estimates.csv without intervals), curve rows, warnings, and
    its hazard models' coefficients (outcome -> model -> list), where replicates start from."""

    rows: list[dict]
    curves: list[dict]
    warnings: list[str]
    subgroups: list[dict] = field(default_factory=list)  # each level: estimable, reason
    starts: dict = field(default_factory=dict)  # outcome -> hazard model -> coefficients
    # per protocol, written beside point.json by the estimate_point stage (not in point.json):
    adherence: Any = None  # adherence.csv, the weights over time summarised (a DataFrame)
    periods: Any = None  # periods.parquet, the person-periods with the weights used (a DataFrame)


def default_chunks(replicates: int) -> int:
    """``ceil(replicates / 25)``, at least 1: e.g. 200 replicates -> 8 chunks."""
    return max(1, math.ceil(replicates / REPLICATES_PER_CHUNK))


def chunk_ranges(replicates: int, chunks: int | str | None = None) -> list[range]:
    """Split replicates ``0..replicates-1`` into ``chunks`` consecutive ranges of near-equal size.

    ``chunks`` None or ``"auto"`` uses :func:`default_chunks`; more chunks than replicates gives
    one replicate per chunk; no replicates gives no chunk.
    """
    if replicates <= 0:
        return []
    k = default_chunks(replicates) if chunks in (None, "auto") else int(chunks)
    if k < 1:
        raise ValueError(f"bootstrap_chunks: expected a whole number >= 1 or 'auto', got {chunks!r}")
    k = min(k, replicates)
    edges = [replicates * i // k for i in range(k + 1)]
    return [range(a, b) for a, b in zip(edges[:-1], edges[1:], strict=True)]


def chunk_name(r: range) -> str:
    """``replicates_025-049.npz``: the chunk's file name (first and last replicate)."""
    return f"replicates_{r.start:03d}-{r.stop - 1:03d}.npz"


# ----------------------------------------------------------------------------- files


def _plain(v):
    if isinstance(v, np.generic):
        return v.item()
    return v


def point_to_json(point: PointEstimate) -> str:
    """JSON that reads back to the same values (Python writes floats exactly; NaN as NaN)."""
    return json.dumps({"rows": [{k: _plain(v) for k, v in r.items()} for r in point.rows],
                       "curves": [{k: _plain(v) for k, v in c.items()} for c in point.curves],
                       "warnings": list(point.warnings),
                       "subgroups": list(point.subgroups), "starts": point.starts}) + "\n"


def read_point(path: str | Path) -> PointEstimate:
    d = json.loads(Path(path).read_text(encoding="utf-8"))
    return PointEstimate(d["rows"], d["curves"], d["warnings"], d.get("subgroups", []),
                         d.get("starts", {}))


def write_run(fh, run: BootstrapRun) -> None:
    """One chunk's replicates to an open binary file (``.npz``)."""
    failed = sorted(run.failures)
    np.savez(fh, row_reps=run.row_reps, curve_reps=run.curve_reps,
             completed=np.asarray(run.completed_ids, dtype=np.int64),
             failed=np.asarray(failed, dtype=np.int64),
             reasons=np.asarray([run.failures[r] for r in failed], dtype=str),
             settings=np.asarray([run.requested, run.seed], dtype=np.int64),
             interval=np.asarray(run.interval), workers=np.asarray(run.workers),
             start_method=np.asarray(run.start_method), seconds=np.asarray(run.seconds))


def read_run(path: str | Path) -> BootstrapRun:
    with np.load(path, allow_pickle=False) as z:
        requested, seed = (int(v) for v in z["settings"])
        return BootstrapRun(requested, seed, str(z["interval"]), z["row_reps"], z["curve_reps"],
                            [int(r) for r in z["completed"]],
                            {int(r): str(w) for r, w in zip(z["failed"], z["reasons"], strict=True)},
                            int(z["workers"]), str(z["start_method"]), float(z["seconds"]))


# ----------------------------------------------------------------------------- gathering


def combine_runs(parts: list[BootstrapRun], protocol, n_rows: int, n_curves: int) -> BootstrapRun:
    """Chunks of one bootstrap as one run, in replicate order; every replicate exactly once.

    Raises
    ------
    BootstrapError
        When a chunk belongs to another run (seed or replicate count), a replicate is missing or
        repeated, or more than 5% of the replicates failed.
    """
    settings = protocol.analysis.bootstrap
    requested, seed = settings.replicates, settings.seed
    rows: dict[int, np.ndarray] = {}
    curves: dict[int, np.ndarray] = {}
    failures: dict[int, str] = {}
    seen: list[int] = []
    for p in parts:
        if (p.requested, p.seed) != (requested, seed):
            raise BootstrapError(f"a bootstrap chunk of another run ({p.requested} replicates, seed "
                                 f"{p.seed}; the protocol asks {requested}, seed {seed})")
        for i, r in enumerate(p.completed_ids):
            rows[r], curves[r] = p.row_reps[i], p.curve_reps[i]
        failures.update(p.failures)
        seen += list(p.completed_ids) + list(p.failures)
    if sorted(seen) != list(range(requested)):
        missing = sorted(set(range(requested)) - set(seen))
        raise BootstrapError(f"the bootstrap chunks do not hold replicates 0-{requested - 1} once each"
                             f" (missing: {missing[:10]}, repeated: {len(seen) - len(set(seen))})")
    if _too_many(len(failures), requested):
        raise BootstrapError(_fail_message(failures, requested))
    order = sorted(rows)
    return BootstrapRun(requested, seed, settings.interval,
                        np.array([rows[r] for r in order]).reshape(len(order), n_rows),
                        np.array([curves[r] for r in order]).reshape(len(order), n_curves),
                        order, {r: failures[r] for r in sorted(failures)},
                        max([p.workers for p in parts], default=1),
                        parts[0].start_method if parts else "in-process",
                        sum(p.seconds for p in parts), settings.kind)
