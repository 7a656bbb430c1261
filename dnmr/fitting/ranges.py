"""Ranges a user gives a fit: a pair of numbers (a ppm region, a range of rates in s^-1) and a list of
ppm regions, checked once and put in ascending order; rates no molecule reaches, refused."""
from __future__ import annotations

import math
from typing import Any

from dnmr.errors import InputError
from dnmr.kinetics import rate_ceiling_per_s


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


def check_rate_ceiling(log10_rate: float, temperature_k: float, where: str, given: str, at: str = "") -> None:
    """Refuse a rate a user gives a fit above kB T/h at the sample's temperature: no first-order process is
    faster (the Eyring rate of a zero barrier), so a fit searching there reports rates no molecule reaches.

    Parameters
    ----------
    log10_rate : float
        log10 of the rate (s^-1).
    temperature_k : float
        The sample's temperature (K).
    where : str
        The key named in the error.
    given : str
        The value as the user wrote it (``"1e+15 s^-1"``, ``"log10 k = 14"``).
    at : str
        Whose temperature `temperature_k` is, for the message (``" (the coldest spectrum)"``).
    """
    ceiling = rate_ceiling_per_s(temperature_k)
    if log10_rate > math.log10(ceiling):
        most = 10.0 ** math.floor(math.log10(ceiling))
        raise InputError(f"{given} is above kB T/h = {ceiling:.3g} s^-1 at {temperature_k:g} K{at}, the fastest any "
                         f"first-order process can be (the Eyring rate of a zero barrier); give at most {most:g} s^-1 "
                         f"(log10 k = {math.log10(most):g})", where=where)
