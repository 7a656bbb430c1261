"""dnmr: dynamic NMR — exchange lineshapes, rates from VT spectra, activation parameters."""
from __future__ import annotations

from .errors import InputError

__version__ = "0.1.0"
__all__ = ["InputError", "__version__"]
