"""Formatting helpers: every number the templates print is a string made here."""

from __future__ import annotations

import math
from typing import Any


def missing(x: Any) -> bool:
    """True for None, NaN and empty text."""
    if x is None:
        return True
    if isinstance(x, float) and math.isnan(x):
        return True
    return isinstance(x, str) and x.strip() == ""


def num(x: Any, digits: int = 2) -> str:
    """A real number with ``digits`` decimals (empty when missing)."""
    if missing(x):
        return ""
    try:
        v = float(x)
    except (TypeError, ValueError):
        return str(x)
    if math.isinf(v):
        return "∞" if v > 0 else "−∞"
    return f"{v:,.{digits}f}".replace("-", "−")


def sig(x: Any, digits: int = 3) -> str:
    """A number with about ``digits`` significant figures, no exponent for usual magnitudes."""
    if missing(x):
        return ""
    v = float(x)
    if v == 0 or math.isinf(v):
        return num(v, 0) if v == 0 else num(v)
    mag = math.floor(math.log10(abs(v)))
    dec = max(0, digits - 1 - mag)
    return num(v, min(dec, 6))


def ci(lo: Any, hi: Any, digits: int = 3) -> str:
    """An interval ``lo to hi``; empty when either end is missing."""
    if missing(lo) or missing(hi):
        return ""
    return f"{sig(lo, digits)} to {sig(hi, digits)}"


def integer(x: Any) -> str:
    """A whole number with thousands separators (no disclosure control: use for non-counts)."""
    if missing(x):
        return ""
    return f"{int(round(float(x))):,}"


def yesno(x: Any) -> str:
    """A truth value as ``yes`` or ``no`` (empty when missing; other text unchanged)."""
    if missing(x):
        return ""
    if isinstance(x, bool) or x in (0, 1):
        return "yes" if x else "no"
    t = str(x).strip().lower()
    return {"true": "yes", "false": "no"}.get(t, str(x))


def text(x: Any) -> str:
    """Anything as text; empty for missing."""
    return "" if missing(x) else str(x)


def label(name: str) -> str:
    """``hf_admission`` -> ``hf admission`` (for headings; the raw name stays in code spans)."""
    return str(name).replace("_", " ")


def window(w: Any) -> str:
    """A window of days relative to time zero, in words."""
    if not w:
        return ""
    a, b = w
    return f"days {a} to {b}"
