"""dnmr: dynamic NMR — exchange lineshapes, rates from VT spectra, activation parameters.

Quick start::

    import dnmr
    model = dnmr.load_model("amide.toml")
    spectrum = dnmr.simulate(model)
    spectrum.plot()
"""
from __future__ import annotations

from .activation import EyringResult, coalescence_barrier, eyring_fit, eyring_fit_file, read_rates
from .errors import InputError
from .fitting import FitOptions, RateEstimate, SpectrumFit, fit_parameters, fit_spectrum
from .model import Exchange, Model, Spectrometer, State
from .modelfile import load_model
from .readers import MeasuredSpectrum, read_spectrum
from .planning import coalescence, plan_experiment, predict_coalescence
from .posterior import Posterior, sample_eyring_posterior, sample_spectrum_posterior
from .series import Series, SeriesFit, fit_series, load_series
from .solvents import Solvent, load_solvents, solvent
from .spectrum import Spectrum, simulate, simulate_over
from .thermometry import (
    fit_temperature_calibration,
    read_temperature_calibration,
    temperature_from_file,
    temperature_from_spectrum,
    thermometer_reading,
)
from .timescale import ActivationParameters, averaged_model, fast_exchange_limit, timescale_view

__version__ = "0.1.0"
__all__ = [
    # spin model and simulation
    "Exchange", "InputError", "Model", "Spectrometer", "Spectrum", "State",
    "load_model", "simulate", "simulate_over",
    # measured spectra
    "MeasuredSpectrum", "read_spectrum",
    # rates from measured spectra
    "FitOptions", "RateEstimate", "Series", "SeriesFit", "SpectrumFit", "fit_parameters", "fit_series",
    "fit_spectrum", "load_series",
    # activation parameters
    "EyringResult", "coalescence_barrier", "eyring_fit", "eyring_fit_file", "read_rates",
    # Bayesian errors (needs emcee)
    "Posterior", "sample_eyring_posterior", "sample_spectrum_posterior",
    # planning and the NMR timescale
    "ActivationParameters", "Solvent", "averaged_model", "coalescence", "fast_exchange_limit", "load_solvents",
    "plan_experiment", "predict_coalescence", "solvent", "timescale_view",
    # sample temperature
    "fit_temperature_calibration", "read_temperature_calibration", "temperature_from_file",
    "temperature_from_spectrum", "thermometer_reading",
    "__version__",
]
