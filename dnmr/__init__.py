"""dnmr: dynamic NMR — exchange lineshapes, rates from VT spectra, activation parameters.

Quick start::

    import dnmr
    model = dnmr.load_model("amide.toml")
    spectrum = dnmr.simulate(model)
    spectrum.plot()
"""
from __future__ import annotations

import importlib
import importlib.util

#: The public names (``__all__``) by the module each lives in.  Imported on first use (PEP 562), so that
#: ``import dnmr`` and every ``dnmr`` command load only the modules they need (fitting pulls in lmfit,
#: statistics scipy.stats).
_HOMES = {
    "activation.parameters": ("ActivationParameters",),
    "activation.coalescence": ("coalescence_barrier",),
    "activation.eyring": ("eyring_fit", "eyring_fit_file"),
    "activation.eyring_result": ("EyringResult",),
    "activation.posterior": ("sample_eyring_posterior",),
    "activation.rate_table": ("read_rates",),
    "activation.study": ("EyringStudy", "run_eyring"),
    "errors": ("InputError",),
    "jobs": ("run_fit",),
    "fitting.spectrumfit": ("FitOptions", "SpectrumFit", "fit_parameters", "fit_spectrum"),
    "fitting.rates": ("RateEstimate",),
    "engine.longitudinal": ("LongitudinalSystem",),
    "model": ("Model",),
    "modelparts": ("Exchange", "Spectrometer", "State"),
    "io.modelfile": ("load_model",),
    "io.measured": ("MeasuredSpectrum",),
    "io.readers": ("read_spectrum",),
    "planning.coalescence": ("coalescence", "predict_coalescence"),
    "planning.plan": ("plan_experiment",),
    "fitting.posterior": ("sample_spectrum_posterior",),
    "posterior": ("Posterior",),
    "fitting.series": ("SeriesFit", "fit_series"),
    "fitting.seriesfile": ("Series", "load_series"),
    "planning.solvents": ("Solvent", "load_solvents", "solvent"),
    "engine.spectrum": ("Spectrum", "simulate", "simulate_over"),
    "activation.temperature_calibration": ("fit_temperature_calibration", "read_temperature_calibration"),
    "activation.thermometers": ("temperature_from_file", "temperature_from_spectrum", "thermometer_reading",
                                "thermometer_readings"),
    "fitting.transfer": ("TransferFit", "fit_transfer", "run_transfer"),
    "fitting.transferfile": ("Experiment", "load_experiment"),
    "planning.fastexchange": ("averaged_model", "fast_exchange_limit"),
    "planning.timescale": ("timescale_view",),
}
_HOME_OF = {name: module for module, names in _HOMES.items() for name in names}


def __getattr__(name: str):
    """A public name (or a submodule, ``dnmr.engine.blocks``) imported on first use."""
    if name in _HOME_OF:
        value = getattr(importlib.import_module(f".{_HOME_OF[name]}", __name__), name)
    elif not name.startswith("__") and importlib.util.find_spec(f".{name}", __name__) is not None:
        value = importlib.import_module(f".{name}", __name__)
    else:
        raise AttributeError(f"module 'dnmr' has no attribute {name!r}")
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))


__version__ = "0.3.0"
__all__ = [*_HOME_OF, "__version__"]
