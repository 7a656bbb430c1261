# %% [markdown]
# # Non-mutual exchange between conformers with different couplings: the chair flip of CX-5
#
# Invented scenario: CX-5 is an invented 2-substituted oxane.  Its CH-CH2 fragment (three coupled
# protons) looks different in the two chairs: with the substituent equatorial (about 77 % at 200 K) Hx is
# axial and shows a large 11.2 Hz axial-axial coupling; in the other chair every vicinal coupling is
# small and every shift has moved.  The chemist wants to see the VT behaviour, to get realistic test
# spectra (noise, baseline, a small phase error and referencing drift) before the real ones arrive, and
# to try the fit on one of them.  All numbers are invented (see model.toml); the "measured" spectra are
# simulated by dnmr itself, with the true values written next to them.
#
# Run:  python conformers_couplings.py [OUTDIR]     (default: ./conformers_couplings-output, a new folder)

# %%
# Where the results go: the folder named on the command line (default below), which must be new or empty.
from pathlib import Path

from dnmr.io.output import script_output_folder

SCRIPT = globals().get("__file__")  # None in a notebook
HERE = Path(SCRIPT).resolve().parent if SCRIPT else Path.cwd()
OUT = script_output_folder("conformers_couplings-output", SCRIPT)  # never among the inputs, never over earlier results

# %%
import shutil

import numpy as np

import dnmr
from dnmr.fitting.spectrumfit import FitOptions, fit_spectrum
from dnmr.reporting.plotting import plot_stack

# %% [markdown]
# ## 1. The model at a few temperatures
# Populations are given as free energies, so they follow Boltzmann at each temperature; the rate of the
# flip eq -> ax follows Eyring (ΔH‡ 44 kJ/mol, ΔS‡ -2 J/(mol K)); the reverse rate follows from detailed
# balance.

# %%
model = dnmr.load_model(HERE / "model.toml")
temperatures_k = [200.0, 215.0, 230.0, 250.0]
print(model.title)
for t in temperatures_k:
    here = model.at_temperature(t)
    p_eq, p_ax = here.populations()
    print(f"  {t:.0f} K: k(eq->ax) = {here.rates()[0]:8.4g} s^-1, populations eq {p_eq:.3f} / ax {p_ax:.3f}")

spectra, labels = dnmr.simulate_over(model, temperatures_k=[190.0, *temperatures_k, 280.0])
ax = plot_stack(spectra, labels, title="CX-5, 400 MHz (simulated, no noise)")
ax.figure.savefig(OUT / "vt_stack.png", dpi=120, bbox_inches="tight")

# %% [markdown]
# ## 2. Synthetic "measured" spectra
# Each spectrum is the exact lineshape at its temperature with what a real one carries: an arbitrary
# intensity scale, Gaussian noise (1/250 of the tallest point of the coldest spectrum), a sloping
# baseline, a zero-order phase error (a little dispersion mixed in) and a small referencing offset.
# They are written as two-column text (ppm, intensity; high ppm first), which `read_spectrum` reads.

# %%
rng = np.random.default_rng(20261202)
data = OUT / "data"
(data / "spectra").mkdir(parents=True)
shutil.copy(HERE / "model.toml", data / "model.toml")
sf = model.spectrometer.frequency_mhz
ppm = np.linspace(3.0, 4.6, 3200)
scale = 1.0e5 / dnmr.simulate(model.at_temperature(temperatures_k[0]), ppm).intensity.max()
sigma = 1.0e5 / 250
truth = ["# CX-5 synthetic spectra: the true values (invented)", "temperature_k,rate_per_s,phase_deg,offset_hz"]
series = ["# VT series of the invented CX-5 (synthetic spectra)", 'model = "model.toml"', "",
          "[fit]", "region_ppm = [3.3, 4.3]", ""]
files = {}
for t in temperatures_k:
    phase_deg, offset_hz = rng.uniform(-4.0, 4.0), rng.uniform(-1.0, 1.0)
    lines = dnmr.simulate(model.at_temperature(t), ppm - offset_hz / sf)  # lines moved by +offset_hz
    phi = np.radians(phase_deg)
    y = scale * (np.cos(phi) * lines.intensity + np.sin(phi) * lines.dispersion)
    y += sigma * (2.0 + 1.5 * (ppm - 3.8)) + rng.normal(0.0, sigma, ppm.size)
    name = f"spectra/cx5_{t:.0f}K.txt"
    np.savetxt(data / name, np.column_stack([ppm[::-1], y[::-1]]), fmt="%.6f", delimiter="\t",
               header=f"CX-5 (invented), 1H {sf} MHz, {t:.0f} K, synthetic\nppm\tintensity")
    files[t] = data / name
    truth.append(f"{t},{float(model.at_temperature(t).rates()[0])!r},{phase_deg:.3f},{offset_hz:.3f}")
    series += ["[[spectrum]]", f'file = "{name}"', f"temperature_k = {t}", ""]
(data / "truth.csv").write_text("\n".join(truth) + "\n")
(data / "series.toml").write_text("\n".join(series))

# %% [markdown]
# ## 3. Fit one spectrum
# `fit_spectrum` reads the file, sets the model's temperature (populations and starting rate), estimates
# the noise outside the fitted region, scans the rate over nine decades (so no starting guess is needed),
# refines the rate with amplitude, baseline, phase, offset and a shared linewidth, and profiles chi-square
# over log k to tell an error bar from a bound.  Shifts, couplings and populations stay as in the model.

# %%
t_fit = 230.0
options = FitOptions(region_ppm=(3.3, 4.3), baseline_order=1, phase="zero-order", linewidth="shared")
fit = fit_spectrum(files[t_fit], model, temperature_k=t_fit, options=options)
print()
print(fit.report())
true_k = model.at_temperature(t_fit).rates()[0]
estimate = fit.rate("chair flip")
print(f"\ntrue k(eq->ax) at {t_fit:.0f} K = {true_k:.4g} s^-1; fitted {estimate.describe()}")
if estimate.status == "determined":
    print(f"difference = {(estimate.rate_per_s - true_k) / estimate.rate_stderr:+.2f} standard errors")
fit.plot().savefig(OUT / f"fit_{t_fit:.0f}K.png", dpi=120, bbox_inches="tight")
(OUT / f"fit_{t_fit:.0f}K.txt").write_text(fit.report() + "\n")
print(f"\nwritten to {OUT}: vt_stack.png, data/ (model, series.toml, spectra, truth.csv), "
      f"fit_{t_fit:.0f}K.txt, fit_{t_fit:.0f}K.png")
