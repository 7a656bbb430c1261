"""How the global fit ties the spectra of a series together: the temperature trends of shifts, linewidth
and couplings (:class:`Treatment`) and the options that choose them.

See :mod:`dnmr.fitting.globalfit` for the model.
"""
from __future__ import annotations

from dataclasses import dataclass

from dnmr.errors import InputError
from dnmr.fitting.seriesfile import REFERENCE_LINE

TREND_DEGREES = {"constant": 0, "linear": 1, "quadratic": 2}
TREND_SUFFIXES = ("", "_per_k", "_per_k2")
SHIFT_TRENDS = ("constant", "linear", "quadratic")
LINEWIDTH_TRENDS = ("per-spectrum", "constant", "linear", "quadratic", REFERENCE_LINE)
COUPLING_TRENDS = ("constant", "linear", "quadratic")
DEFAULT_TREND = "linear"
TREND_OPTIONS = {"shift": "--shift-trend", "linewidth": "--linewidth-trend", "coupling": "--coupling-trend"}
"""The option of ``dnmr fit --global`` (and keyword of :func:`dnmr.fitting.globalfit.fit_series_global`) that
sets each family's temperature trend."""


@dataclass(frozen=True)
class Treatment:
    """How the global fit ties the spectra together.

    Parameters
    ----------
    shift_trend : {"constant", "linear", "quadratic"}
        Temperature trend of every chemical shift (ppm).
    linewidth_trend : {"per-spectrum", "constant", "linear", "quadratic", "reference-line"}
        Intrinsic linewidth (Hz): a trend in T, fitted in every spectrum, or held in every spectrum at the
        width of the series' reference line there (plus its ``added_width_hz``), its error carried.
    coupling_trend : {"constant", "linear", "quadratic"}
        Temperature trend of every scalar coupling (Hz) the model gives.
    """

    shift_trend: str = DEFAULT_TREND
    linewidth_trend: str = DEFAULT_TREND
    coupling_trend: str = DEFAULT_TREND

    def __post_init__(self):
        for family, allowed in (("shift", SHIFT_TRENDS), ("linewidth", LINEWIDTH_TRENDS), ("coupling", COUPLING_TRENDS)):
            value = getattr(self, f"{family}_trend")
            if value not in allowed:
                raise InputError(f"{family}_trend must be one of {', '.join(allowed)}, got {value!r}",
                                 where=TREND_OPTIONS[family])

    def loosened(self, family: str) -> str | None:
        """The option that lets `family` ("shift", "linewidth", "coupling") follow the data more closely,
        or None when none is left."""
        current = getattr(self, f"{family}_trend")
        order = {"shift": SHIFT_TRENDS, "linewidth": ("constant", "linear", "quadratic", REFERENCE_LINE, "per-spectrum"),
                 "coupling": COUPLING_TRENDS}[family]
        later = [t for t in order[order.index(current) + 1:] if t != REFERENCE_LINE]
        return f"{TREND_OPTIONS[family]} {later[0]}" if later else None
