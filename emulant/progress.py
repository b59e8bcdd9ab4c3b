"""Progress of long work: done/total, elapsed time and an estimate of the time left.

One small helper for every stage that takes more than a few seconds (the bootstrap chunks, the
point estimate, the cohort, the weights). It writes a line through the ``emulant`` logger,
which the workflow's scripts send to the rule's log file and to standard error, each time the
work passes another tenth of its total (so at least every 10%), plus at the start and the end.
When standard error is a terminal and ``bar`` is on, a one-line bar is drawn there as well.

The estimate of the time left is the plain linear one: ``elapsed / done * (total - done)``.
"""

from __future__ import annotations

import logging
import math
import sys
import time
from collections.abc import Callable

log = logging.getLogger("emulant")


def _clock(seconds: float) -> str:
    s = int(round(seconds))
    if s < 60:
        return f"{s} s"
    m, s = divmod(s, 60)
    if m < 60:
        return f"{m} min {s:02d} s"
    h, m = divmod(m, 60)
    return f"{h} h {m:02d} min"


def progress_line(what: str, done: int, total: int, elapsed: float, failed: int = 0) -> str:
    """``what: 12/50 (24%), 1 failed, 30 s elapsed, about 1 min 35 s left``."""
    share = done / total if total else 1.0
    text = f"{what}: {done}/{total} ({share:.0%})"
    if failed:
        text += f", {failed} failed"
    text += f", {_clock(elapsed)} elapsed"
    if 0 < done < total:
        text += f", about {_clock(elapsed / done * (total - done))} left"
    elif done >= total:
        text += ", done"
    return text


class Progress:
    """Count work done and report it at each further tenth of ``total``.

    ``callback(done, total)``, when given, is called on every update (tests, other front ends).
    ``bar``: True draws a terminal bar on standard error, None draws it only when standard error
    is a terminal, False never.
    """

    def __init__(self, what: str, total: int, *, bar: bool | None = False,
                 callback: Callable[[int, int], None] | None = None, logger=None,
                 clock: Callable[[], float] = time.monotonic):
        self.what, self.total = what, int(total)
        self.callback = callback
        self.bar = bool(bar) if bar is not None else sys.stderr.isatty()
        self.log = logger or log
        self.clock = clock
        self.start = clock()
        self.done = self.failed = 0
        self._next_tenth = 1
        self.log.info("%s: %d to do", what, self.total)

    @property
    def elapsed(self) -> float:
        return self.clock() - self.start

    def update(self, done: int, failed: int = 0) -> None:
        """Set the counts: ``done`` items finished (failed ones included), ``failed`` of them failed."""
        self.done, self.failed = int(done), int(failed)
        if self.callback is not None:
            self.callback(self.done, self.total)
        tenth = math.floor(10 * self.done / self.total) if self.total else 10
        if tenth >= self._next_tenth and self.done < self.total:
            self._next_tenth = tenth + 1
            self._emit()
        if self.bar and self.total:
            width = 30
            full = int(width * self.done / self.total)
            sys.stderr.write(f"\r{self.what} [{'#' * full}{'.' * (width - full)}] "
                             f"{self.done}/{self.total}, {self.failed} failed, {self.elapsed:.0f} s")
            sys.stderr.flush()

    def step(self, n: int = 1, failed: int = 0) -> None:
        self.update(self.done + n, self.failed + failed)

    def _emit(self) -> None:
        if self.bar:
            sys.stderr.write("\r\033[K")
        self.log.info("%s", progress_line(self.what, self.done, self.total, self.elapsed, self.failed))

    def close(self) -> None:
        """The final line (also when the work stopped early)."""
        if self.bar and self.total:
            sys.stderr.write("\n")
            sys.stderr.flush()
        self._emit()
