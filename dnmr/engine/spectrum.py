"""Simulated spectra: the result object of :func:`simulate` and the function itself."""
from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path

import numpy as np

from dnmr.engine.blocks import frequency_grid_ppm, lineshape_terms
from dnmr.engine.prepared import small_model_terms
from dnmr.engine.resolvent import LineshapeTerms
from dnmr.model import Model
from dnmr.notebook import NotebookView


@dataclass(frozen=True)
class Spectrum(NotebookView):
    """A simulated spectrum on a ppm grid.

    Attributes
    ----------
    ppm : ndarray
        Chemical shift axis (ppm), ascending.
    intensity : ndarray
        Absorption as a spectral density (per Hz); integrates to sum of population x spins.
    frequency_mhz : float
        Spectrometer frequency of the observed nucleus (MHz).
    title : str
        The model's title.
    terms : LineshapeTerms, optional
        The engine's decomposition, kept to give the dispersion on request (exact on this grid).
    """

    ppm: np.ndarray
    intensity: np.ndarray
    frequency_mhz: float
    title: str = ""
    terms: LineshapeTerms | None = field(default=None, repr=False, compare=False)

    @cached_property
    def dispersion(self) -> np.ndarray | None:
        """The matching dispersion signal (per Hz), -Im S; None when the engine's terms were not kept."""
        return None if self.terms is None else -self.terms.evaluate(self.hz).imag

    @property
    def hz(self) -> np.ndarray:
        """Frequency axis (Hz from 0 ppm): ppm x frequency_mhz."""
        return self.ppm * self.frequency_mhz

    def integral(self) -> float:
        """Area under the absorption over the grid (trapezoid rule on the Hz axis)."""
        return float(np.trapezoid(self.intensity, self.hz))

    def maxima_ppm(self, prominence: float = 1e-3) -> np.ndarray:
        """Shifts (ppm) of the local maxima of the absorption, highest ppm first.

        Parameters
        ----------
        prominence : float
            Minimum prominence relative to the tallest point.
        """
        from scipy.signal import find_peaks

        peaks, _ = find_peaks(self.intensity, prominence=prominence * self.intensity.max())
        return self.ppm[peaks][::-1]

    def report(self) -> str:
        """One line: title, points, range (ppm), frequency (MHz), integral, maxima (ppm)."""
        maxima = ", ".join(f"{p:.3f}" for p in self.maxima_ppm())
        return (f"{self.title or 'simulated spectrum'}: {self.ppm.size} points, {self.ppm[-1]:.3f} to "
                f"{self.ppm[0]:.3f} ppm at {self.frequency_mhz:g} MHz; integral {self.integral():.4g}; "
                f"maxima at {maxima} ppm")

    def to_csv(self, path: str | Path, overwrite: bool = False) -> Path:
        """Write columns ppm, hz, intensity, dispersion (high ppm first, full precision), atomically
        (:func:`dnmr.io.output.atomic_write_text`: an existing file is replaced only with `overwrite`)."""
        from dnmr.io.output import atomic_write_text

        order = slice(None, None, -1)
        rows = zip(self.ppm[order], self.hz[order], self.intensity[order], self.dispersion[order])
        lines = ["ppm,hz,intensity,dispersion"]
        lines += [",".join(repr(float(v)) for v in row) for row in rows]
        return atomic_write_text(path, "\n".join(lines) + "\n", overwrite=overwrite)

    def plot(self, ax=None, **line_kwargs):
        """Draw the absorption against ppm (high to low); returns the matplotlib Axes."""
        from dnmr.reporting.plotting import plot_spectrum

        return plot_spectrum(self, ax=ax, **line_kwargs)


def simulate(
    model: Model,
    ppm: np.ndarray | None = None,
    *,
    window_ppm: tuple[float, float] | None = None,
    points: int | None = None,
    progress=None,
) -> Spectrum:
    """Simulate the exchange-broadened spectrum of `model`.

    Parameters
    ----------
    model : Model
        Spin system, populations and exchange rates.
    ppm : array, optional
        Chemical shifts (ppm) to evaluate at; default is the model's window.
    window_ppm : (float, float), optional
        Override the model's window (ppm, either order).
    points : int, optional
        Override the number of points.
    progress : callable, optional
        ``progress(done, total)`` after each block of coherences (for a progress bar on large systems).

    Returns
    -------
    Spectrum
        Absorption per Hz on an ascending ppm axis (dispersion on request, ``.dispersion``).
    """
    if ppm is None:
        grid = frequency_grid_ppm(model, window_ppm, points)
    else:
        grid = np.asarray(ppm, dtype=float)
        if grid.size > 1 and grid[0] > grid[-1]:
            grid = grid[::-1]
        if np.any(grid[1:] <= grid[:-1]):
            grid = np.unique(grid)
    sf = model.spectrometer.frequency_mhz
    terms = small_model_terms(model, progress)
    if terms is None:
        terms = lineshape_terms(model, progress, grid * sf)  # exact on this grid (which `dispersion` uses too)
    return Spectrum(grid, terms.absorption(grid, hz_per_unit=sf), sf, model.title, terms)


def simulate_over(
    model: Model,
    *,
    rates_per_s: list[float] | None = None,
    temperatures_k: list[float] | None = None,
) -> tuple[list[Spectrum], list[str]]:
    """Simulate `model` over a list of rates (first process, s^-1) or of temperatures (K), on one grid.

    Returns the spectra and a label for each ("k = 120 s^-1" or "250 K").  Temperatures need rates given
    as activation parameters (or populations as free energies) for anything to change, and are refused
    otherwise; they stand in for the model's own temperature, which may then be absent.
    """
    from dnmr.errors import InputError

    if (rates_per_s is None) == (temperatures_k is None):
        raise InputError("give either rates or temperatures")
    if rates_per_s is not None:
        if not model.exchanges:
            raise InputError("the model has no exchange process to vary", where="exchange")
        for k in rates_per_s:
            if not (k >= 0 and np.isfinite(k)):
                raise InputError(f"rates must be finite and not negative, got {k!r}", where="--rates-per-s")
        others = list(model.rates())[1:] if len(model.exchanges) > 1 else []  # a lone process needs no temperature
        models = [model.with_rates([k, *others]) for k in rates_per_s]
        labels = [f"k = {k:.3g} s$^{{-1}}$" for k in rates_per_s]
    else:
        for t in temperatures_k:
            if not (t > 0 and np.isfinite(t)):
                raise InputError(f"temperatures must be positive kelvin, got {t!r}", where="--temperatures-k")
        if not model.depends_on_temperature:
            raise InputError("every trace would be the same: the model's rates (rate_per_s) and populations do not "
                             "depend on temperature; give activation parameters in [[exchange]] (barrier_kj_mol, or "
                             "enthalpy_kj_mol with entropy_j_mol_k) or vary the rate with --rates-per-s",
                             model.source, "--temperatures-k")
        models = [model.at_temperature(t) for t in temperatures_k]
        labels = [f"{t:.0f} K" for t in temperatures_k]
    grid = frequency_grid_ppm(models[0])
    return [simulate(m, grid) for m in models], labels
