# %% [markdown]
# # Temperature calibration: from methanol readings to an Eyring analysis on true sample temperatures
#
# Invented scenario: a chemist measured exchange rates of an invented compound, PX-4, at eleven set-points
# of a VT unit between 215 and 315 K.  The set-point is the temperature of the gas stream, not of the
# sample; to know the sample temperature they ran a methanol thermometer tube at ten set-points and read
# the shift difference between the OH and CH3 lines.  They want a calibration table, the rates on true
# temperatures, and ΔH‡, ΔS‡ and ΔG‡ whose errors include the uncertainty of the calibration.  The probe's
# behaviour (true T = 0.975 x set-point + 8.0 K), the readings and the rates are all invented.
#
# Safety: methanol is toxic (by swallowing, breathing its vapour and through the skin) and highly
# flammable.  Use a sealed standard thermometer tube, never heat it past what it is made for, stay inside
# the probe's rated range and follow your facility's rules.
#
# Run:  python temperature_calibration.py [OUTDIR]     (default: ./temperature_calibration-output)

# %%
# Where the results go: the folder named on the command line (default below), which must be new or empty.
from pathlib import Path

from dnmr.io.output import script_output_folder

SCRIPT = globals().get("__file__")  # None in a notebook
HERE = Path(SCRIPT).resolve().parent if SCRIPT else Path.cwd()
OUT = script_output_folder("temperature_calibration-output", SCRIPT)  # never among the inputs, never over earlier results

# %%
import numpy as np

import dnmr
from dnmr.activation.thermometers import THERMOMETER_CAUTIONS, get_thermometer

print(THERMOMETER_CAUTIONS)  # read these before using the thermometer tubes
rng = np.random.default_rng(20261203)


def probe_truth(setpoint_k):
    """The invented probe: sample temperature (K) at a set-point (K). Unknown to the chemist."""
    return 0.975 * np.asarray(setpoint_k, dtype=float) + 8.0


# %% [markdown]
# ## 1. Methanol readings at the calibration set-points
# Methanol's OH line moves with temperature, its CH3 line hardly: dd = delta(OH) - delta(CH3) in ppm gives
# T = 409.0 - 36.54 dd - 21.85 dd^2 K, valid 178-330 K (Ammann, Meier & Merbach, J. Magn. Reson. 46, 319
# (1982)).  Here the readings are made up from the invented probe with a reading error of 0.003 ppm;
# `thermometer_reading` turns each into a temperature (and refuses one outside the calibrated range).

# %%
methanol = get_thermometer("methanol")
calibration_setpoints = np.array([190.0, 205, 220, 235, 250, 265, 280, 295, 310, 325])
readings = []
print("\nset-point / K   Δδ / ppm   methanol T / K")
for s in calibration_setpoints:
    dd = round(methanol.shift_difference(float(probe_truth(s))) + rng.normal(0.0, 0.003), 4)
    reading = dnmr.thermometer_reading(dd, "methanol")
    readings.append(reading)
    print(f"  {s:10.1f}   {dd:8.4f}   {reading.temperature_k:8.2f}")

# %% [markdown]
# ## 2. The same from a thermometer spectrum
# Usually you read dd off the spectrum; `temperature_from_spectrum` finds the two lines itself (the CH3 is
# the line group with the largest integral, the OH the largest one downfield of it) and checks their
# integral ratio.  The spectrum is simulated here with a model built in Python: CH3 as a group of three
# protons and OH, no exchange process (the OH-CH3 coupling is not resolved), plus noise.

# %%
s_spectrum = 250.0
dd_true = methanol.shift_difference(float(probe_truth(s_spectrum)))
state = dnmr.State("methanol", {"CH3": 3.34, "OH": 3.34 + dd_true}, linewidth_hz=1.5, population=1)
thermometer_model = dnmr.Model(dnmr.Spectrometer(400.13), [state], [], groups={"CH3": 3},
                               title="methanol thermometer (simulated)")
ppm = np.linspace(2.5, 6.5, 8000)
line = dnmr.simulate(thermometer_model, ppm).intensity
intensity = line / line.max() * 1e4 + rng.normal(0.0, 5.0, ppm.size)
spectrum_file = OUT / f"methanol_{s_spectrum:.0f}K.txt"
np.savetxt(spectrum_file, np.column_stack([ppm[::-1], intensity[::-1]]), fmt="%.6f", delimiter="\t",
           header=f"methanol thermometer (simulated), 1H 400.13 MHz, set-point {s_spectrum:.0f} K\nppm\tintensity")
from_spectrum = dnmr.temperature_from_file(spectrum_file, "methanol", frequency_mhz=400.13)
print()
print(from_spectrum.report())

# %% [markdown]
# ## 3. The calibration table
# A straight line from set-point to sample temperature (degree 1, the usual choice; 2 or 3 for a probe
# that bends).  Its coefficients carry an uncertainty from the scatter of the points; applied to new
# set-points it gives temperatures whose errors are correlated (they share the curve).  The table is
# written as calibration.csv (setpoint_k, temperature_k), which `dnmr eyring --calibration` reads.

# %%
measured_k = np.array([r.temperature_k for r in readings])
calibration = dnmr.fit_temperature_calibration(calibration_setpoints, measured_k, degree=1)
print()
print(calibration.report())
(OUT / "calibration.csv").write_text("setpoint_k,temperature_k\n" + "".join(
    f"{s:.1f},{t:.3f}\n" for s, t in zip(calibration_setpoints, measured_k)))

# %% [markdown]
# ## 4. The rates table (as recorded: at set-points)
# PX-4's rates (invented truth: ΔH‡ = 52.0 kJ/mol, ΔS‡ = -12.0 J/(mol K)) were "measured" at the true
# sample temperatures with 3 % errors, but the lab book has the set-points.

# %%
true_activation = dnmr.ActivationParameters(52.0, -12.0)
rate_setpoints = np.arange(215.0, 316.0, 10.0)
true_k = np.array([true_activation.rate_at(t) for t in probe_truth(rate_setpoints)])
measured_rates = true_k * np.exp(rng.normal(0.0, 0.03, true_k.size))
(OUT / "rates.csv").write_text("temperature_k,process,rate_per_s,rate_stderr\n" + "".join(
    f"{s:.1f},ring inversion,{k:.5g},{0.03 * k:.3g}\n" for s, k in zip(rate_setpoints, measured_rates)))

# %% [markdown]
# ## 5. Eyring analysis, without and with the calibration
# Without it, the set-points are taken as sample temperatures: the errors look small but the numbers are
# biased.  With it, `eyring_fit_file(..., calibration=...)` replaces each set-point by the calibrated
# temperature and carries the calibration's covariance into ΔH‡, ΔS‡ and ΔG‡ (by Monte Carlo over the
# temperatures, with a fixed seed so the report is reproducible).

# %%
naive = dnmr.eyring_fit_file(OUT / "rates.csv")[0]
calibrated = dnmr.eyring_fit_file(OUT / "rates.csv", calibration=calibration)[0]
print()
print(calibrated.report())
t_mid = calibrated.harmonic_mean_temperature_k
table = [f"{'':26} {'ΔH‡ / kJ/mol':>16} {'ΔS‡ / J/(mol K)':>18} {f'ΔG‡({t_mid:.0f} K) / kJ/mol':>24}",
         f"{'truth (invented)':26} {true_activation.enthalpy_kj_mol:9.2f}        {true_activation.entropy_j_mol_k:11.1f}"
         f"        {true_activation.gibbs_kj_mol(t_mid):17.3f}"]
for name, result in (("set-points taken as true", naive), ("calibrated temperatures", calibrated)):
    gibbs = result.gibbs(t_mid)
    table.append(f"{name:26} {result.enthalpy_kj_mol:9.2f} ± {result.enthalpy_stderr:4.2f}"
                 f" {result.entropy_j_mol_k:11.1f} ± {result.entropy_stderr:4.1f} {gibbs.value:17.3f} ± {gibbs.stderr:5.3f}")
print("\n" + "\n".join(table))

# %% [markdown]
# ## 6. Write the results

# %%
calibrated.plot().savefig(OUT / "eyring_calibrated.png", dpi=120, bbox_inches="tight")
(OUT / "eyring_calibrated.txt").write_text(calibrated.report() + "\n")
(OUT / "comparison.txt").write_text("\n".join(table) + "\n\n" + calibration.report() + "\n\n" + THERMOMETER_CAUTIONS + "\n")
print(f"\nwritten to {OUT}: calibration.csv, rates.csv, {spectrum_file.name}, eyring_calibrated.txt,"
      " eyring_calibrated.png, comparison.txt")
