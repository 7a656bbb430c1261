"""Ranges a user gives a fit: a pair of numbers (a ppm region, a range of rates in s^-1) and a list of
ppm regions, checked once and put in ascending order."""
from __future__ import annotations

import math
from typing import Any

from dnmr.errors import InputError


def number_pair(value: Any, where: str) -> tuple[float, float] | None:
    """Two different finite numbers in ascending order (ppm, Hz or s^-1, as given), or None for None.

    Parameters
    ----------
    value : pair of numbers or None
        What was given, in either order.
    where : str
        The key named in the error when `value` is no such pair.

    Returns
    -------
    (float, float) or None
    """
    if value is None:
        return None
    try:
        lo, hi = sorted(float(v) for v in value)
    except (TypeError, ValueError):
        raise InputError(f"expected two numbers, got {value!r}", where=where) from None
    if not (math.isfinite(lo) and math.isfinite(hi)) or lo == hi or len(tuple(value)) != 2:
        raise InputError(f"expected two different finite numbers, got {value!r}", where=where)
    return lo, hi


def ppm_regions(value: Any, where: str) -> tuple[tuple[float, float], ...]:
    """One [lo, hi] pair (ppm) or a list of them, as a tuple of ascending pairs (empty for None or [])."""
    if value is None or (isinstance(value, (list, tuple)) and len(value) == 0):
        return ()
    items = list(value)
    if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in items):
        return (number_pair(items, where),)
    return tuple(number_pair(v, f"{where}[{i}]") for i, v in enumerate(items))
