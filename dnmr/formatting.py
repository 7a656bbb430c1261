"""One home for numbers shown to people: significant figures, a value with its standard error, and a number
read from a table."""
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


def table_number(text, spec: str = ".4g") -> str:
    """A number read from a table as text (a cell of rates.csv) shown with the format `spec`: '' for an empty
    cell, the text itself when it is not a number."""
    if text in ("", None):
        return ""
    try:
        return format(float(text), spec)
    except ValueError:
        return str(text)
