"""The part of a spectrum a fit uses: the spectrum read (or checked) at the model's field, the fitted
region (ppm) from the options, the model's [window] or the model's shifts, and a note when none of the
model's lines lies in it."""
from __future__ import annotations

from pathlib import Path

from dnmr.engine.blocks import default_window_ppm
from dnmr.errors import InputError
from dnmr.io.readers import read_spectrum
from dnmr.io.measured import MeasuredSpectrum
from dnmr.io.measured import MIN_POINTS
from dnmr.model import Model


def spectrum_for_model(spectrum: MeasuredSpectrum | str | Path, model: Model) -> MeasuredSpectrum:
    """The spectrum (read from a path at the model's spectrometer frequency); refused when it was recorded
    at another frequency (MHz) than the model's."""
    sf = model.spectrometer.frequency_mhz
    if isinstance(spectrum, (str, Path)):
        return read_spectrum(spectrum, frequency_mhz=sf)
    if spectrum.frequency_mhz is not None and abs(spectrum.frequency_mhz - sf) > 1e-3 * sf:
        raise InputError(f"the spectrum was recorded at {spectrum.frequency_mhz:.6g} MHz but the model is for "
                         f"{sf:.6g} MHz; check the nucleus and the spectrometer", source=spectrum.source)
    return spectrum


def chosen_region(region_ppm: tuple[float, float] | None, model: Model) -> tuple[tuple[float, float], str]:
    """The region (ppm) to fit and where it came from: `region_ppm`, else the model's [window], else a
    window about the model's shifts."""
    if region_ppm:
        return region_ppm, "region_ppm"
    if model.window_ppm:
        return model.window_ppm, "the model's [window] (no region_ppm given)"
    return default_window_ppm(model), "a window about the model's shifts (no region_ppm, no [window])"


def fit_region(spectrum: MeasuredSpectrum, model: Model, region_ppm: tuple[float, float] | None
               ) -> tuple[float, float, str]:
    """The fitted region (ppm, low to high, cut to the spectrum) and where it came from
    (:func:`chosen_region`).  Refused, naming that source, when fewer than MIN_POINTS points of the
    spectrum lie in it."""
    region, origin = chosen_region(region_ppm, model)
    lo, hi = sorted(region)
    first, last = float(spectrum.ppm.min()), float(spectrum.ppm.max())
    inside = int(((spectrum.ppm >= lo) & (spectrum.ppm <= hi)).sum())
    if inside < MIN_POINTS:
        shifts = model.shifts_hz() / model.spectrometer.frequency_mhz
        raise InputError(f"the fit region {lo:g} to {hi:g} ppm comes from {origin} and holds {inside} points of the "
                         f"spectrum, which covers {first:g} to {last:g} ppm (the model's shifts: "
                         f"{shifts.min():g} to {shifts.max():g} ppm); give region_ppm within the spectrum, or check "
                         "the model's shifts and the spectrum's referencing", source=spectrum.source, where="region_ppm")
    return max(lo, first), min(hi, last), origin


def shifts_outside(model: Model, lo: float, hi: float, origin: str) -> list[str]:
    """A note when none of the model's shifts lies in the fitted region `lo`-`hi` ppm (a slip in the region
    or in the shifts: the fit would then describe only the tails of the lines)."""
    shifts = model.shifts_hz() / model.spectrometer.frequency_mhz
    if ((shifts >= lo) & (shifts <= hi)).any():
        return []
    return [f"none of the model's shifts ({shifts.min():g} to {shifts.max():g} ppm) lies in the fitted region "
            f"{lo:g} to {hi:g} ppm (from {origin}); check the region or the model's shifts"]
