"""Make the bundled demo data: a synthetic VT series of the invented lactam DX-7.

Scenario (invented): DX-7 is an N-aryl lactam whose ring CH2 protons (Ha, Hb) are diastereotopic.
Rotation about the N-aryl bond interconverts a syn and an anti rotamer (about 64 : 36 at room
temperature) and swaps the environments of Ha and Hb.  A chemist ran 1H spectra at 400.13 MHz in
toluene-d8 from 250 to 375 K (probe set-points) and calibrated the probe with methanol and ethylene
glycol thermometers.

Everything here is invented and stated; `dnmr demo` fits these spectra and compares the recovered
barrier with the truth written to `truth.toml`:

- activation parameters: ΔH‡ = 64.0 kJ/mol, ΔS‡ = -6.0 J/(mol K) (aryl rotation, syn -> anti);
- rotamer free energy: anti 1.42 kJ/mol above syn;
- shifts drift linearly with temperature (slopes below, ppm/K, about 298.15 K);
- intrinsic linewidth 1.2 Hz at 298 K, narrowing slightly when hot (viscosity);
- true sample temperature = 1.009 x set-point - 3.4 K (the probe reads a little off);
- noise: Gaussian, 1/400 of the tallest slow-exchange peak; baseline: small offset and tilt.

Run from the repository root (reads truth_model.toml; rewrites series.toml, truth.toml, calibration.csv and spectra/ in dnmr/data/demo):

    python examples/make_demo_data.py
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

import dnmr

HERE = Path(__file__).resolve().parent
DEMO = HERE.parent / "dnmr" / "data" / "demo"
SEED = 20261201
SETPOINTS_K = [250, 258, 265, 272, 280, 290, 300, 305, 310, 315, 320, 325, 330, 340, 350, 362, 375]
SLOW_EXCHANGE_BELOW_K = 276  # set-points whose spectra fix the shifts and their temperature trend
SHIFT_SLOPES_PPM_PER_K = {"syn": {"Ha": -2.0e-4, "Hb": 1.2e-4}, "anti": {"Ha": 1.5e-4, "Hb": -1.0e-4}}
REFERENCE_K = 298.15
NOISE_FRACTION = 1 / 400
REGION_PPM = (4.15, 4.95)


def true_temperature(setpoint_k: float) -> float:
    """The sample temperature (K) at a probe set-point (K) in this invented scenario."""
    return 1.009 * setpoint_k - 3.4


def model_at(base: dnmr.Model, temperature_k: float) -> dnmr.Model:
    """The true model at `temperature_k`: drifting shifts, slightly narrower lines when hot."""
    states = []
    for state in base.states:
        slopes = SHIFT_SLOPES_PPM_PER_K[state.name]
        shifts = {n: v + slopes[n] * (temperature_k - REFERENCE_K) for n, v in state.shifts_ppm.items()}
        width = state.linewidth_hz * (1.0 - 0.0015 * (temperature_k - REFERENCE_K))
        states.append(state.__class__(state.name, shifts, state.couplings_hz, width,
                                      free_energy_kj_mol=state.free_energy_kj_mol))
    return base.replace(states=tuple(states), temperature_k=temperature_k)


def main() -> None:
    rng = np.random.default_rng(SEED)
    base = dnmr.load_model(DEMO / "truth_model.toml")
    ppm = np.linspace(4.05, 5.05, 4096)
    coldest = dnmr.simulate(model_at(base, true_temperature(SETPOINTS_K[0])), ppm)
    scale = 1.0e6 / coldest.intensity.max()  # arbitrary units, as a spectrometer writes them
    sigma = NOISE_FRACTION * 1.0e6
    (DEMO / "spectra").mkdir(exist_ok=True)
    series = ['# VT series of the invented demo compound DX-7 (made by examples/make_demo_data.py)',
              'model = "model.toml"', "", "[fit]", f"region_ppm = [{REGION_PPM[0]}, {REGION_PPM[1]}]",
              '# the shifts drift with temperature; in fast exchange the spectrum cannot show them, so take them',
              '# (with their trend) from the slow-exchange spectra; the rotamer populations are fitted too', 'shifts = "slow-exchange-trend"', 'populations = "free"',
              f"slow_exchange_below_k = {SLOW_EXCHANGE_BELOW_K}", ""]
    for setpoint in SETPOINTS_K:
        t_true = true_temperature(setpoint)
        spectrum = dnmr.simulate(model_at(base, t_true), ppm)
        x = (ppm - ppm.mean()) / np.ptp(ppm)
        baseline = sigma * (3.0 + 2.0 * x) * rng.uniform(0.5, 1.5)
        y = spectrum.intensity * scale + baseline + rng.normal(0.0, sigma, ppm.size)
        name = f"spectra/dx7_{setpoint}K.txt"
        rows = "\n".join(f"{p:.6f}\t{v:.3f}" for p, v in zip(ppm[::-1], y[::-1]))
        (DEMO / name).write_text(f"# DX-7, 1H 400.13 MHz, toluene-d8, set-point {setpoint} K\n# ppm\tintensity\n{rows}\n")
        series += ["[[spectrum]]", f'file = "{name}"', f"temperature_k = {setpoint:.1f}", ""]
    (DEMO / "series.toml").write_text("\n".join(series))
    calibration = ["setpoint_k,temperature_k"]
    for setpoint in (250, 270, 290, 310, 330, 350, 370, 390):
        calibration.append(f"{setpoint},{true_temperature(setpoint) + rng.normal(0, 0.2):.2f}")
    (DEMO / "calibration.csv").write_text("\n".join(calibration) + "\n")
    exchange = base.exchanges[0]
    (DEMO / "truth.toml").write_text(
        "# The invented truth behind the demo spectra (examples/make_demo_data.py)\n"
        f"enthalpy_kj_mol = {exchange.enthalpy_kj_mol}\n"
        f"entropy_j_mol_k = {exchange.entropy_j_mol_k}\n"
        f"gibbs_298_kj_mol = {exchange.enthalpy_kj_mol - 298.15 * exchange.entropy_j_mol_k / 1000:.4f}\n"
        f"anti_free_energy_kj_mol = {base.states[1].free_energy_kj_mol}\n"
        'sample_temperature = "1.009 x setpoint - 3.4 K"\n'
        f"noise_sigma = {sigma}\n"
        f"seed = {SEED}\n")
    print(f"wrote {len(SETPOINTS_K)} spectra, series.toml, calibration.csv and truth.toml into {DEMO}")


if __name__ == "__main__":
    main()
