"""Numbers for people: a value with its uncertainty, to digits that mean something."""

from __future__ import annotations

import math

__all__ = ["plus_minus"]


def plus_minus(value, sigma, unit: str = "", *, digits: int = 2, ascii_only: bool = False) -> str:
    """``"390.539 ± 0.0069 pm"``: the uncertainty to `digits` significant digits and the
    value to the same decimal place (common practice in reporting measurements).

    A zero, missing or non-finite uncertainty prints the value with 2 decimals and
    ``± n/a``; a missing value prints ``n/a``.
    """
    pm = "+-" if ascii_only else "±"
    tail = f" {unit}" if unit else ""
    try:
        v = float(value)
    except (TypeError, ValueError):
        return f"n/a{tail}"
    if not math.isfinite(v):
        return f"n/a{tail}"
    try:
        s = float(sigma)
    except (TypeError, ValueError):
        s = math.nan
    if not (math.isfinite(s) and s > 0):
        return f"{v:.2f} {pm} n/a{tail}"
    decimals = max(0, digits - 1 - math.floor(math.log10(s)))
    return f"{v:.{decimals}f} {pm} {s:.{decimals}f}{tail}"
