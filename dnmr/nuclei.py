"""Magnetic nuclei: spin quantum numbers and IUPAC frequency ratios.

Frequency ratios Xi (in %) are the IUPAC 2001 recommendations (Harris et al., Pure Appl. Chem. 73,
1795 (2001)): the resonance frequency of the nucleus' reference compound relative to TMS 1H at
100 MHz.  The spectrometer field is quoted as its 1H frequency, as is common practice.
"""
from __future__ import annotations

import math
import numbers
from dataclasses import dataclass

from dnmr.errors import InputError

MAX_FREQUENCY_MHZ = 3000.0
"""Highest spectrometer frequency accepted (MHz): far above any NMR magnet built (1H near 1.2 GHz at
28.2 T, from memory); a larger number is a slip (Hz or kHz for MHz) or damage."""


def check_frequency_mhz(value, where: str) -> float:
    """`value` as a spectrometer frequency (MHz), refused unless finite, positive and at most
    :data:`MAX_FREQUENCY_MHZ`.

    Raises
    ------
    InputError
        Naming `where` (a key, record or option).
    """
    mhz = float(value) if isinstance(value, numbers.Real) and not isinstance(value, bool) else math.nan
    if not 0 < mhz <= MAX_FREQUENCY_MHZ:  # also refuses nan
        raise InputError(f"expected a spectrometer frequency above 0 and at most {MAX_FREQUENCY_MHZ:g} MHz, "
                         f"got {value!r}", where=where)
    return mhz


@dataclass(frozen=True)
class Nucleus:
    """An NMR-active isotope.

    Attributes
    ----------
    symbol : str
        Isotope notation, e.g. ``"13C"``.
    spin : float
        Spin quantum number I.
    xi_percent : float
        IUPAC frequency ratio Xi in % (1H = 100).
    """

    symbol: str
    spin: float
    xi_percent: float

    def larmor_mhz(self, proton_mhz: float) -> float:
        """Larmor frequency (MHz) of this nucleus in a field where 1H resonates at `proton_mhz` (MHz)."""
        return proton_mhz * self.xi_percent / 100.0


_TABLE = {
    n.symbol: n
    for n in (
        Nucleus("1H", 0.5, 100.000000),
        Nucleus("2H", 1.0, 15.350609),
        Nucleus("3H", 0.5, 106.663974),
        Nucleus("6Li", 1.0, 14.716086),
        Nucleus("7Li", 1.5, 38.863797),
        Nucleus("11B", 1.5, 32.083974),
        Nucleus("13C", 0.5, 25.145020),
        Nucleus("14N", 1.0, 7.226317),
        Nucleus("15N", 0.5, 10.136767),
        Nucleus("17O", 2.5, 13.556457),
        Nucleus("19F", 0.5, 94.094011),
        Nucleus("23Na", 1.5, 26.451900),
        Nucleus("27Al", 2.5, 26.056859),
        Nucleus("29Si", 0.5, 19.867187),
        Nucleus("31P", 0.5, 40.480742),
        Nucleus("77Se", 0.5, 19.071513),
        Nucleus("103Rh", 0.5, 3.186447),
        Nucleus("117Sn", 0.5, 35.632259),
        Nucleus("119Sn", 0.5, 37.290632),
        Nucleus("195Pt", 0.5, 21.496784),
        Nucleus("199Hg", 0.5, 17.910822),
    )
}


def nucleus(symbol: str) -> Nucleus:
    """Look up an isotope by its notation (``"1H"``, ``"19F"``, also ``"H1"``/``"F19"``)."""
    key = symbol.strip()
    if key and key[0].isalpha() and key[-1].isdigit():  # "F19" -> "19F"
        digits = key.lstrip("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz")
        key = digits + key[: len(key) - len(digits)]
    key = key[: len(key) - len(key.lstrip("0123456789"))] + key.lstrip("0123456789").capitalize()
    try:
        return _TABLE[key]
    except KeyError:
        known = ", ".join(_TABLE)
        raise InputError(f'unknown nucleus "{symbol}"; use isotope notation, one of {known}') from None
