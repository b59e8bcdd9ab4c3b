"""The event codes and input checks every time-to-event estimator shares (the lowest module of
:mod:`emulant.estimation`: it imports nothing of emulant but the error base class)."""

from __future__ import annotations

import numpy as np

from emulant.errors import EmulantError

CENSORED, OUTCOME, COMPETING = 0, 1, 2
DAYS_PER_YEAR = 365.25


class SurvivalError(EmulantError, ValueError):
    """Bad time-to-event input; the message names the array (or cohort column) and the row."""


def check_times(time, weight, name: str = "time") -> tuple[np.ndarray, np.ndarray]:
    t = np.asarray(time, dtype=float)
    if t.ndim != 1:
        raise SurvivalError(f"{name}: expected a one-dimensional array, got shape {t.shape}")
    w = np.ones_like(t) if weight is None else np.asarray(weight, dtype=float)
    if w.shape != t.shape:
        raise SurvivalError(f"weight: length {w.size} differs from {name}'s length {t.size}")
    bad = ~np.isfinite(t) | (t < 0)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise SurvivalError(f"{name}: row {i} holds {t[i]!r}; expected a finite number >= 0")
    badw = ~np.isfinite(w) | (w < 0)
    if badw.any():
        i = int(np.flatnonzero(badw)[0])
        raise SurvivalError(f"weight: row {i} holds {w[i]!r}; expected a finite number >= 0")
    return t, w


def check_status(status, n: int, allowed=(CENSORED, OUTCOME, COMPETING)) -> np.ndarray:
    s = np.asarray(status)
    if s.shape != (n,):
        raise SurvivalError(f"status: length {s.size} differs from time's length {n}")
    s = s.astype(int)
    bad = ~np.isin(s, allowed)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise SurvivalError(f"status: row {i} holds {s[i]}; expected one of {list(allowed)}")
    return s
