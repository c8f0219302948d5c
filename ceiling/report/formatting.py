"""How the report writes numbers (also used by the tests to know what the page shows)."""

from __future__ import annotations

import math
from typing import Any

__all__ = ["missing", "format_km2", "format_percent", "format_value", "format_size"]


def missing(v: Any) -> bool:
    """None, a blank string or NaN (a table's empty cell)."""
    if v is None:
        return True
    if isinstance(v, str):
        return not v.strip()
    try:
        return math.isnan(float(v))
    except (TypeError, ValueError):
        return False


def format_km2(v: Any) -> str:
    """Area in km2: whole km2 from 100 up, one decimal below (``12,345 km²``, ``3.4 km²``)."""
    if missing(v):
        return "–"
    x = float(v)
    return f"{x:,.0f} km²" if abs(x) >= 100 else f"{x:,.1f} km²"


def format_percent(share: Any) -> str:
    """A share 0..1 as a percentage with one decimal (``12.3 %``)."""
    if missing(share):
        return "–"
    return f"{100.0 * float(share):.1f} %"


def format_value(v: Any, digits: int = 2) -> str:
    if missing(v):
        return "–"
    return f"{float(v):,.{digits}f}"


def format_size(n: float) -> str:
    """A file size in bytes, kB, MB or GB (powers of 1000)."""
    for unit in ("bytes", "kB", "MB", "GB"):
        if n < 1000 or unit == "GB":
            return f"{n:,.0f} {unit}" if unit == "bytes" else f"{n:,.1f} {unit}"
        n /= 1000.0
    return f"{n} bytes"
