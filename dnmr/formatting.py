"""One home for numbers shown to people: significant figures, a value with its standard error, a table cell
that may be empty, a number read from a table, and forward rates in words."""
from __future__ import annotations

import math

import numpy as np


def significant(x: float, digits: int = 3) -> str:
    """`x` to `digits` significant figures ('nan' where it is not finite)."""
    return "nan" if not np.isfinite(x) else f"{x:.{digits}g}"


def format_with_error(value: float, stderr: float, digits: int = 2) -> str:
    """'value ± stderr' rounded to `digits` significant figures of the error ('± n.d.' if undetermined)."""
    if not np.isfinite(stderr):
        return f"{value:.4g} ± n.d."
    if stderr == 0:
        return f"{value:.6g} ± 0"
    decimals = max(0, digits - 1 - int(math.floor(math.log10(abs(stderr)))))
    return f"{value:.{decimals}f} ± {stderr:.{decimals}f}"


def number_or_dash(value: float | None, spec: str) -> str:
    """`value` in the format `spec` (``"10.4g"``, ``".1f"``), or a '-' right-aligned to the spec's width
    where there is no value (a table cell left empty)."""
    width = "".join(ch for ch in spec.split(".")[0] if ch.isdigit())
    return f"{'-':>{width or 1}}" if value is None else format(value, spec)


def rates_text(rates_per_s: dict[str, float]) -> str:
    """Forward rates (s^-1) by process in words: ``k = 12.3 s^-1`` for one process,
    ``k: rotation 12.3 s^-1, inversion 4.5 s^-1`` for several."""
    if len(rates_per_s) == 1:
        return f"k = {next(iter(rates_per_s.values())):.3g} s^-1"
    return "k: " + ", ".join(f"{n} {k:.3g} s^-1" for n, k in rates_per_s.items())


def table_number(text, spec: str = ".4g") -> str:
    """A number read from a table as text (a cell of rates.csv) shown with the format `spec`: '' for an empty
    cell, the text itself when it is not a number."""
    if text in ("", None):
        return ""
    try:
        return format(float(text), spec)
    except ValueError:
        return str(text)
