"""Figures. Every spectrum axis follows NMR convention: ppm running high to low, left to right.

matplotlib is used with the non-interactive Agg backend unless the caller already chose one.
"""
from __future__ import annotations

import matplotlib

if matplotlib.get_backend().lower() not in ("agg", "module://matplotlib_inline.backend_inline"):
    matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402


def nmr_axis(ax, label: str = "chemical shift / ppm") -> None:
    """Label an x axis in ppm and run it high to low (NMR convention)."""
    ax.set_xlabel(label)
    if not ax.xaxis_inverted():
        ax.invert_xaxis()
