"""The problem collector every protocol reader uses: typed fields with their key paths.

Every reader collects its problems and returns a best-effort value, so one pass lists every
problem of the file, each with its key path and what was expected.
"""

from __future__ import annotations

import datetime as dt
import difflib
import re
from typing import Any

ID_PATTERN = re.compile(r"^[a-z0-9-]+$")
NAME_PATTERN = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


class Collector:
    """Collects problems; every reader returns a best-effort value so parsing goes on."""

    def __init__(self) -> None:
        self.problems: list[str] = []

    def add(self, key: str, msg: str) -> None:
        self.problems.append(f"{key or '(top level)'}: {msg}")

    def mapping(self, node: Any, key: str, known: tuple[str, ...], required: tuple[str, ...] = ()) -> dict:
        if node is None:
            node = {}
        if not isinstance(node, dict):
            self.add(key, f"expected a mapping, got {type(node).__name__}")
            return {}
        for k in node:
            if k not in known:
                near = difflib.get_close_matches(str(k), known, n=1, cutoff=0.5)
                hint = f"; did you mean '{near[0]}'?" if near else f"; known keys: {', '.join(known)}"
                self.add(f"{key}.{k}" if key else str(k), f"unknown key{hint}")
        for k in required:
            if node.get(k) is None:
                self.add(f"{key}.{k}" if key else k, "required key is missing")
        return node

    def integer(self, v: Any, key: str, default: int | None, minimum: int | None = None) -> int | None:
        if v is None:
            return default
        if isinstance(v, bool) or not isinstance(v, int):
            self.add(key, f"expected an integer, got {v!r}")
            return default
        if minimum is not None and v < minimum:
            self.add(key, f"expected an integer >= {minimum}, got {v}")
        return v

    def number(self, v: Any, key: str, default: float) -> float:
        if v is None:
            return default
        if isinstance(v, bool) or not isinstance(v, int | float):
            self.add(key, f"expected a number, got {v!r}")
            return default
        return float(v)

    def boolean(self, v: Any, key: str, default: bool) -> bool:
        if v is None:
            return default
        if not isinstance(v, bool):
            self.add(key, f"expected true or false, got {v!r}")
            return default
        return v

    def choice(self, v: Any, key: str, options: tuple[str, ...], default: str | None) -> str | None:
        if v is None:
            return default
        if v not in options:
            near = difflib.get_close_matches(str(v), options, n=1, cutoff=0.5)
            hint = f" (did you mean '{near[0]}'?)" if near else ""
            self.add(key, f"expected one of {', '.join(options)}, got {v!r}{hint}")
            return default
        return v

    def text(self, v: Any, key: str, default: str = "") -> str:
        if v is None:
            return default
        if not isinstance(v, str | int | float):
            self.add(key, f"expected text, got {type(v).__name__}")
            return default
        return str(v)

    def date(self, v: Any, key: str) -> dt.date | None:
        if v is None:
            return None
        if isinstance(v, dt.datetime):
            return v.date()
        if isinstance(v, dt.date):
            return v
        try:
            return dt.date.fromisoformat(str(v))
        except ValueError:
            self.add(key, f"expected a date YYYY-MM-DD, got {v!r}")
            return None

    def window(self, v: Any, key: str) -> tuple[int, int] | None:
        if v is None:
            return None
        if not _two_whole_numbers(v):
            self.add(key, f"expected a window [a, b] of two whole numbers of days, got {v!r}")
            return None
        if v[0] > v[1]:
            self.add(key, f"window start {v[0]} is after its end {v[1]} (expected a <= b)")
        if v[1] > 0:
            self.add(key, f"window end {v[1]} is after day 0: a window must end on or before day 0, "
                          "the day it describes (time zero, or a period's first day); a record "
                          "after it would let the future decide the past")
        return (int(v[0]), int(v[1]))

    def days(self, v: Any, key: str) -> tuple[int, int] | None:
        """``[a, b]``: a span of days on or after time zero, ``0 <= a <= b`` (a grace window)."""
        if v is None:
            return None
        if not _two_whole_numbers(v):
            self.add(key, f"expected [a, b], two whole numbers of days with 0 <= a <= b, got {v!r}")
            return None
        if not 0 <= v[0] <= v[1]:
            self.add(key, f"expected 0 <= a <= b (days from time zero, both ends included), got {list(v)}")
        return (int(v[0]), int(v[1]))

    def listing(self, v: Any, key: str) -> list:
        if v is None:
            return []
        if not isinstance(v, list):
            self.add(key, f"expected a list, got {type(v).__name__}")
            return []
        return v


def _two_whole_numbers(v: Any) -> bool:
    """``[a, b]`` of two whole numbers (booleans are not numbers here)."""
    return (isinstance(v, list | tuple) and len(v) == 2
            and all(isinstance(x, int) and not isinstance(x, bool) for x in v))
