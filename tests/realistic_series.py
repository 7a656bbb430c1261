"""Realistic variable-temperature series with known truth, made without dnmr's engine.

A chemist's spectra are never the model file's idealisation: the first-guess shifts and couplings are a
few Hz off, shifts and the referencing drift with temperature, every spectrum carries a small phase error
and a sloping baseline, and the intrinsic linewidth changes with temperature.  This module writes such
series (model file, spectra, series file with *no* fit options) from stated truths, so that the tests and
``benchmarks/error_coverage.py`` can run dnmr's defaults on them and compare every rate and ΔH‡, ΔS‡ with the
truth in units of the stated errors.

The lineshapes come from independent references only:

* uncoupled two-site exchange, equal or unequal populations: the closed form of McConnell,
  J. Chem. Phys. 28, 430 (1958) (``closed_forms.mcconnell_two_site``);
* an AB pair swapping its shifts (ring inversion): QuTiP's Lindblad Liouvillian
  (``reference_qutip.qutip_spectrum``).

Rates follow the Eyring equation with the CODATA constants of scipy.constants
(``reference_eyring.eyring_rate``, transmission coefficient 1); populations of unequal states follow the
van 't Hoff relation K = p_b / p_a = exp(-dH°/RT + dS°/R).  Nothing here imports dnmr.

The nuisances are modest and of the kind every measured series has (common practice):

* first-guess shifts off by 0.003–0.008 ppm and couplings by a few tenths of a Hz (the model file);
* true shifts linear in T (different slopes for the two sites), couplings too;
* referencing: a common offset drifting linearly with T plus a random part (Hz);
* zero-order phase error, uniform in +-``phase_deg`` per spectrum;
* a linear baseline whose ends reach +-``baseline_fraction`` of the tallest point;
* an intrinsic width linear in T (broader when cold);
* white Gaussian noise, its standard deviation the tallest point of the coldest spectrum / ``snr``.
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import constants

from closed_forms import mcconnell_two_site
from reference_eyring import eyring_rate
from reference_qutip import jumps_with_reverse, qutip_spectrum

REFERENCE_TEMPERATURE_K = 298.15
"""Temperature at which the scenario's shifts, couplings and linewidth are stated."""


@dataclass(frozen=True)
class Scenario:
    """A variable-temperature experiment with its truth and its nuisances.

    Shifts in ppm at ``REFERENCE_TEMPERATURE_K`` with slopes in ppm/K; couplings and widths in Hz;
    activation parameters of the forward process (kJ/mol, J/(mol K)); temperatures in K.
    """

    name: str
    kind: str                                   # "mutual-pair" | "two-state" | "ab-pair"
    nucleus: str
    frequency_mhz: float
    shifts_ppm: tuple[float, float]
    shift_slopes_ppm_per_k: tuple[float, float]
    enthalpy_kj_mol: float
    entropy_j_mol_k: float
    temperatures_k: tuple[float, ...]
    coupling_hz: float = 0.0                    # ab-pair only
    coupling_slope_hz_per_k: float = 0.0
    reaction_enthalpy_kj_mol: float = 0.0       # two-state only: dH° and dS° of A -> B
    reaction_entropy_j_mol_k: float = 0.0
    linewidth_hz: float = 1.0                   # intrinsic FWHM at the reference temperature
    linewidth_slope_hz_per_k: float = -0.004    # d(width)/dT: broader when cold
    window_ppm: tuple[float, float] = (0.0, 0.0)  # written spectrum; default: lines +- 0.5 ppm
    points: int = 4096
    snr: float = 150.0
    phase_deg: float = 8.0
    baseline_fraction: float = 0.02
    reference_drift_hz_per_k: float = 0.02
    reference_scatter_hz: float = 0.3
    shift_guess_errors_ppm: tuple[float, float] = (0.005, -0.004)
    coupling_guess_error_hz: float = 0.4
    linewidth_guess_hz: float = 1.5
    reference_line_ppm: float | None = None     # a non-exchanging singlet, same intrinsic width

    def replace(self, **changes) -> "Scenario":
        """A copy with some fields changed."""
        return dataclasses.replace(self, **changes)

    def shifts_at(self, temperature_k: float) -> tuple[float, float]:
        """True shifts (ppm) at `temperature_k`."""
        dt = temperature_k - REFERENCE_TEMPERATURE_K
        return tuple(s + m * dt for s, m in zip(self.shifts_ppm, self.shift_slopes_ppm_per_k))

    def coupling_at(self, temperature_k: float) -> float:
        """True coupling (Hz) at `temperature_k`."""
        return self.coupling_hz + self.coupling_slope_hz_per_k * (temperature_k - REFERENCE_TEMPERATURE_K)

    def linewidth_at(self, temperature_k: float) -> float:
        """True intrinsic FWHM (Hz) at `temperature_k`."""
        return self.linewidth_hz + self.linewidth_slope_hz_per_k * (temperature_k - REFERENCE_TEMPERATURE_K)

    def population_a(self, temperature_k: float) -> float:
        """Population of state A (two-state) at `temperature_k`; 0.5 for the mutual kinds."""
        if self.kind != "two-state":
            return 0.5
        gas = constants.R
        k_eq = math.exp(-self.reaction_enthalpy_kj_mol * 1e3 / (gas * temperature_k)
                        + self.reaction_entropy_j_mol_k / gas)
        return 1.0 / (1.0 + k_eq)

    def rate_at(self, temperature_k: float) -> float:
        """True forward rate constant (s^-1) of the model's process at `temperature_k` (Eyring)."""
        return float(eyring_rate(temperature_k, self.enthalpy_kj_mol, self.entropy_j_mol_k))

    def window(self) -> tuple[float, float]:
        """The ppm range written to each spectrum file."""
        if self.window_ppm != (0.0, 0.0):
            return self.window_ppm
        lines = list(self.shifts_ppm) + ([self.reference_line_ppm] if self.reference_line_ppm is not None else [])
        return min(lines) - 0.5, max(lines) + 0.5


def complex_spectrum(scenario: Scenario, temperature_k: float, freqs_hz: np.ndarray) -> np.ndarray:
    """The exchange lineshape S(nu) (per Hz, Re S integrates to the spins) of the true system at T."""
    sf = scenario.frequency_mhz
    nu_a, nu_b = (s * sf for s in scenario.shifts_at(temperature_k))
    width, k = scenario.linewidth_at(temperature_k), scenario.rate_at(temperature_k)
    if scenario.kind == "mutual-pair":        # two spins of one state trading sites: 2 x a half-half site pair
        return 2.0 * mcconnell_two_site(freqs_hz, nu_a, nu_b, k, 0.5, width, width)
    if scenario.kind == "two-state":          # one spin, state A -> state B at k (reverse by detailed balance)
        return mcconnell_two_site(freqs_hz, nu_a, nu_b, k, scenario.population_a(temperature_k), width, width)
    if scenario.kind == "ab-pair":
        j = scenario.coupling_at(temperature_k)
        state = {"shifts_hz": [nu_a, nu_b], "couplings_hz": [[0.0, j], [j, 0.0]],
                 "linewidth_hz": width, "population": 1.0}
        jumps = jumps_with_reverse([state], [{"source": 0, "target": 0, "permutation": [1, 0], "rate": k}])
        return qutip_spectrum(freqs_hz, [state], jumps)
    raise ValueError(f"unknown scenario kind {scenario.kind!r}")


def _reference_line(scenario: Scenario, temperature_k: float, freqs_hz: np.ndarray) -> np.ndarray:
    """A non-exchanging singlet (complex Lorentzian of unit area, Bloch equations) or zeros."""
    if scenario.reference_line_ppm is None:
        return np.zeros(len(freqs_hz), dtype=complex)
    nu0 = scenario.reference_line_ppm * scenario.frequency_mhz
    width = scenario.linewidth_at(temperature_k)
    return 2.0 / (math.pi * width + 2j * math.pi * (freqs_hz - nu0))


@dataclass(frozen=True)
class SeriesTruth:
    """What a written series really is: temperatures (K) and forward rates (s^-1) of its one process."""

    scenario: Scenario
    temperatures_k: tuple[float, ...]
    rates_per_s: tuple[float, ...]
    series_file: Path

    @property
    def enthalpy_kj_mol(self) -> float:
        return self.scenario.enthalpy_kj_mol

    @property
    def entropy_j_mol_k(self) -> float:
        return self.scenario.entropy_j_mol_k


def measured_spectrum(scenario: Scenario, temperature_k: float, rng: np.random.Generator,
                      noise_sigma: float | None = None) -> tuple[np.ndarray, np.ndarray, float]:
    """One measured spectrum: (ppm ascending, intensity, noise sigma) with every nuisance applied."""
    lo, hi = scenario.window()
    ppm = np.linspace(lo, hi, scenario.points)
    sf = scenario.frequency_mhz
    offset_hz = (scenario.reference_drift_hz_per_k * (temperature_k - REFERENCE_TEMPERATURE_K)
                 + rng.normal(0.0, scenario.reference_scatter_hz))
    freqs = ppm * sf - offset_hz               # lines appear `offset_hz` higher than their true shift
    s = complex_spectrum(scenario, temperature_k, freqs) + _reference_line(scenario, temperature_k, freqs)
    phase = math.radians(rng.uniform(-scenario.phase_deg, scenario.phase_deg))
    signal = (np.exp(1j * phase) * s).real
    height = float(np.max(np.abs(signal)))
    x = np.linspace(-1.0, 1.0, len(ppm))
    baseline = scenario.baseline_fraction * height * (rng.uniform(-1, 1) * x + rng.uniform(-0.5, 0.5))
    sigma = noise_sigma if noise_sigma is not None else height / scenario.snr
    return ppm, signal + baseline + rng.normal(0.0, sigma, len(ppm)), sigma


def _model_text(scenario: Scenario) -> str:
    """The chemist's first-guess model file: shifts and couplings a little off, a rough linewidth."""
    guess = [s + e for s, e in zip(scenario.shifts_at(REFERENCE_TEMPERATURE_K), scenario.shift_guess_errors_ppm)]
    head = (f'title = "{scenario.name} (first guesses)"\n\n[spectrometer]\nnucleus = "{scenario.nucleus}"\n'
            f"frequency_mhz = {scenario.frequency_mhz!r}\n\n")
    width = f"linewidth_hz = {scenario.linewidth_guess_hz!r}\n"
    if scenario.kind == "two-state":
        p_a = round(scenario.population_a(REFERENCE_TEMPERATURE_K), 2)
        return (head + f'[[state]]\nname = "A"\npopulation = {p_a!r}\n{width}shifts_ppm = {{ X = {guess[0]!r} }}\n\n'
                f'[[state]]\nname = "B"\npopulation = {round(1 - p_a, 2)!r}\n{width}'
                f'shifts_ppm = {{ X = {guess[1]!r} }}\n\n'
                '[[exchange]]\nname = "interconversion"\nfrom = "A"\nto = "B"\nrate_per_s = 10.0\n')
    couplings = ""
    if scenario.kind == "ab-pair":
        j = scenario.coupling_at(REFERENCE_TEMPERATURE_K) + scenario.coupling_guess_error_hz
        couplings = f'couplings_hz = {{ "Ha-Hb" = {j!r} }}\n'
    return (head + f'[[state]]\nname = "M"\npopulation = 1.0\n{width}'
            f"shifts_ppm = {{ Ha = {guess[0]!r}, Hb = {guess[1]!r} }}\n{couplings}\n"
            '[[exchange]]\nname = "swap"\nfrom = "M"\nto = "M"\nspins = { Ha = "Hb", Hb = "Ha" }\nrate_per_s = 10.0\n')


def write_series(folder: Path, scenario: Scenario, seed: int) -> SeriesTruth:
    """Write model.toml, spectra/*.csv and series.toml (no fit options) into `folder`.

    The noise level is set once, from the coldest spectrum's tallest point, and kept for the series
    (the same sample and acquisition at every temperature).
    """
    folder = Path(folder)
    (folder / "spectra").mkdir(parents=True, exist_ok=True)
    (folder / "model.toml").write_text(_model_text(scenario))
    rng = np.random.default_rng(seed)
    temperatures = sorted(scenario.temperatures_k)
    sigma = None
    entries = []
    for t in temperatures:
        ppm, y, sigma = measured_spectrum(scenario, t, rng, sigma)
        name = f"spectra/t{t:.1f}K.csv"
        rows = "\n".join(f"{float(p)!r},{float(v)!r}" for p, v in zip(ppm[::-1], y[::-1]))
        (folder / name).write_text("ppm,intensity\n" + rows + "\n")
        entries.append(f'[[spectrum]]\nfile = "{name}"\ntemperature_k = {t!r}\n')
    series = folder / "series.toml"
    series.write_text('model = "model.toml"\n\n' + "\n".join(entries))
    rates = tuple(scenario.rate_at(t) for t in temperatures)
    return SeriesTruth(scenario, tuple(temperatures), rates, series)


def _temperatures(lo: float, hi: float, n: int) -> tuple[float, ...]:
    return tuple(float(t) for t in np.round(np.linspace(lo, hi, n), 1))


# Scenarios (invented compounds; parameters chosen so that coalescence falls mid-range).
N_METHYL_AMIDE = Scenario(
    name="N,N-dimethyl amide rotation (N-methyl pair, 1H 400 MHz)", kind="mutual-pair", nucleus="1H",
    frequency_mhz=400.13, shifts_ppm=(2.95, 3.10), shift_slopes_ppm_per_k=(-0.0002, 0.0001),
    enthalpy_kj_mol=62.0, entropy_j_mol_k=-4.0, temperatures_k=_temperatures(265.0, 355.0, 10))
"""Two equally populated methyl singlets 60 Hz apart; coalescence near 310 K."""

UNEQUAL_ISOMERS = Scenario(
    name="E/Z isomers of an invented carbamate (13C 100.6 MHz)", kind="two-state", nucleus="13C",
    frequency_mhz=100.61, shifts_ppm=(41.20, 42.05), shift_slopes_ppm_per_k=(0.0010, -0.0008),
    enthalpy_kj_mol=61.0, entropy_j_mol_k=2.0, reaction_enthalpy_kj_mol=2.5, reaction_entropy_j_mol_k=1.0,
    temperatures_k=_temperatures(255.0, 345.0, 10), linewidth_hz=1.8, linewidth_guess_hz=2.5,
    shift_guess_errors_ppm=(0.06, -0.05))
"""Unequal populations (about 0.7 : 0.3), 86 Hz apart; 13C shifts off by 5-6 Hz in the model file."""

AB_RING_INVERSION = Scenario(
    name="Ring inversion of an invented spiro-lactone (AB pair, 1H 500 MHz)", kind="ab-pair", nucleus="1H",
    frequency_mhz=500.13, shifts_ppm=(3.62, 3.71), shift_slopes_ppm_per_k=(0.0001, -0.0001),
    coupling_hz=-12.5, coupling_slope_hz_per_k=0.002, enthalpy_kj_mol=55.0, entropy_j_mol_k=-8.0,
    temperatures_k=_temperatures(235.0, 325.0, 10), shift_guess_errors_ppm=(0.004, -0.006),
    coupling_guess_error_hz=0.5)
"""A geminal CH2 pair 45 Hz apart with J = -12.5 Hz; the model file's J is 0.5 Hz off."""

SCENARIOS = {s.kind: s for s in (N_METHYL_AMIDE, UNEQUAL_ISOMERS, AB_RING_INVERSION)}
