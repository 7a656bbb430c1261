"""dnmr: dynamic NMR — exchange lineshapes, rates from VT spectra, activation parameters.

Quick start::

    import dnmr
    model = dnmr.load_model("amide.toml")
    spectrum = dnmr.simulate(model)
    spectrum.plot()
"""
from __future__ import annotations

from .errors import InputError
from .model import Exchange, Model, Spectrometer, State
from .modelfile import load_model
from .readers import MeasuredSpectrum, read_spectrum
from .spectrum import Spectrum, simulate, simulate_over

__version__ = "0.1.0"
__all__ = [
    "Exchange", "InputError", "Model", "Spectrometer", "Spectrum", "State",
    "MeasuredSpectrum", "load_model", "read_spectrum", "simulate", "simulate_over", "__version__",
]
