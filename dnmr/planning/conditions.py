"""The model under the conditions of an experiment: another magnet, another temperature.

Fields are given as 1H frequencies (MHz); shifts stay in ppm, so shift differences in Hz scale with the
field while couplings and linewidths do not.  At a temperature, the processes with activation
parameters run at their Eyring rates, and populations given as free energies follow the Boltzmann
distribution.  The temperature at which a process reaches a target rate is solved for by repeated
substitution where the target itself moves with the populations.
"""
from __future__ import annotations

import math
from collections.abc import Callable, Sequence

from dnmr.activation.parameters import ActivationParameters
from dnmr.errors import InputError
from dnmr.model import Model
from dnmr.modelparts import Spectrometer

def process_activations(model: Model, activation: ActivationParameters | None = None,
                        process: str | None = None) -> dict[int, ActivationParameters]:
    """Activation parameters of each process: `activation` for `process` (or for every process when
    `process` is None), otherwise what the model file gives; processes given only a rate are absent.

    Raises
    ------
    InputError
        When `process` names no process of the model.
    """
    names = model.process_names()
    if process is not None and process not in names:
        raise InputError(f'unknown exchange process "{process}"; processes are {", ".join(names)}', where="process")
    out: dict[int, ActivationParameters] = {}
    for i, (name, exchange) in enumerate(zip(names, model.exchanges)):
        given = activation if activation is not None and process in (None, name) else None
        found = given or ActivationParameters.of_exchange(exchange)
        if found is not None:
            out[i] = found
    return out


def model_at(model: Model, temperature_k: float, activations: dict[int, ActivationParameters]) -> Model:
    """`model` at `temperature_k` (K), the processes in `activations` at their Eyring rates."""
    moved = model.at_temperature(temperature_k)
    rates = moved.rates()
    for i, act in activations.items():
        rates[i] = act.rate_at(temperature_k)
    return moved.with_rates(rates)


def at_field(model: Model, proton_mhz: float) -> Model:
    """`model` on a magnet whose 1H frequency is `proton_mhz` (MHz), same nucleus, shifts in ppm kept."""
    return model.replace(spectrometer=Spectrometer.from_proton_mhz(proton_mhz, model.spectrometer.nucleus))


def checked_fields(model: Model, frequencies_mhz: Sequence[float] | None) -> list[float]:
    """Fields (1H MHz) to look at: those given, or the model's own."""
    if frequencies_mhz is None:
        return [model.spectrometer.proton_mhz]
    values = [float(f) for f in frequencies_mhz]
    if not values or not all(math.isfinite(f) and f > 0 for f in values):
        raise InputError(f"spectrometer frequencies must be positive MHz (1H), got {list(frequencies_mhz)!r}",
                         where="frequencies_mhz")
    return values


def populations_follow_temperature(model: Model) -> bool:
    """True when the populations come from free energies (and so change with temperature)."""
    return model.states[0].population is None


def solve_temperature(activation: ActivationParameters, rate_at: Callable[[float | None], float | None],
                      temperature_dependent: bool, tolerance_k: float = 1e-3, max_rounds: int = 50) -> float | None:
    """Temperature (K) at which the Eyring rate meets a target rate that may itself depend on temperature.

    Parameters
    ----------
    activation : ActivationParameters
    rate_at : callable
        Target forward rate (s^-1) at a temperature (K); called with None first (the model as given).
    temperature_dependent : bool
        Whether the target changes with temperature (populations from free energies); then the
        temperature is found by repeated substitution until it moves less than `tolerance_k` (K).
    """
    t = None
    for _ in range(max_rounds):
        rate = rate_at(t)
        if rate is None or not rate > 0:
            return None
        t_new = activation.temperature_at(rate)
        if t_new is None or not temperature_dependent or (t is not None and abs(t_new - t) < tolerance_k):
            return t_new
        t = t_new
    raise InputError("the temperature did not settle: the populations change too fast with temperature",
                     where="free_energy_kj_mol")
