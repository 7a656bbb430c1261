# %% [markdown]
# # One barrier from 0.2 to 500 s^-1: selective inversion when cold, lineshapes when warm (RX-4)
#
# Invented scenario: RX-4 is an invented N-aryl amide whose aryl rotation interconverts two rotamers,
# syn (about 62 %) and anti, each with one OCH3 singlet (3.83 and 3.74 ppm at 400 MHz, 36 Hz apart).
# Between 290 and 320 K the two singlets broaden and coalesce: lineshapes give the rate.  From 246 to
# 264 K the lines are sharp and a lineshape fit gives only an upper bound, but a selective inversion of
# the syn singlet still sees the rotation carry inverted magnetisation to anti within T1.  One Eyring
# analysis over both ranges (74 K) fixes ΔH‡ and ΔS‡ much better than either alone.  All numbers
# are invented (see model.toml: ΔH‡ = 60 kJ/mol, ΔS‡ = -12 J/(mol K)); the "measured" data are
# simulated by dnmr itself, with the true rates written next to them.
#
# Run:  python transfer_and_lineshape.py [OUTDIR]     (default: ./transfer_and_lineshape-output, a new folder)

# %%
# Where the results go: the folder named on the command line (default below), which must be new or empty.
from pathlib import Path

from dnmr.io.output import script_output_folder

SCRIPT = globals().get("__file__")  # None in a notebook
HERE = Path(SCRIPT).resolve().parent if SCRIPT else Path.cwd()
OUT = script_output_folder("transfer_and_lineshape-output", SCRIPT)  # never among the inputs

# %%
import shutil

import numpy as np

import dnmr
from dnmr.engine.longitudinal import LongitudinalSystem
from dnmr.fitting.series import fit_series
from dnmr.fitting.transfer import run_transfer

model = dnmr.load_model(HERE / "model.toml")
data = OUT / "data"
(data / "spectra").mkdir(parents=True)
shutil.copy(HERE / "model.toml", data / "model.toml")
rng = np.random.default_rng(20261203)
truth = ["# RX-4 synthetic data: the true forward rate syn -> anti (invented)", "temperature_k,rate_per_s,method"]

# %% [markdown]
# ## 1. Selective inversion at low temperature
# At each temperature: invert the syn singlet (efficiency 0.96), wait a delay from 3 ms to 8 s, read both
# singlets' integrals.  R1 (from the model, 1.6 and 1.9 s^-1) is what the fit has to separate from the
# exchange; the integrals carry noise of 0.4 % of the syn equilibrium integral.

# %%
delays_s = np.array([0.003, 0.01, 0.025, 0.05, 0.1, 0.17, 0.27, 0.4, 0.6, 0.85, 1.2, 1.7, 2.5, 3.5, 5.0, 8.0])
cold_k = [246.0, 252.0, 258.0, 264.0]
experiments = []
for t in cold_k:
    system = LongitudinalSystem.from_model(model.at_temperature(t))
    integrals = 1000.0 * system.evolve(system.inverted("syn", efficiency=0.96), delays_s)
    integrals += rng.normal(size=integrals.shape) * 0.004 * 1000.0 * system.equilibrium[0]
    table = ["delay_s,syn,anti"] + [f"{d!r},{a:.3f},{b:.3f}" for d, (a, b) in zip(delays_s.tolist(), integrals)]
    (data / f"inversion_{t:.0f}K.csv").write_text("\n".join(table) + "\n")
    (data / f"inversion_{t:.0f}K.toml").write_text(
        f'title = "RX-4 selective inversion of syn at {t:.0f} K (invented, synthetic)"\n'
        f'model = "model.toml"\ntemperature_k = {t}\nexperiment = "inversion"\ndata = "inversion_{t:.0f}K.csv"\n\n'
        '[options]\ninverted = ["syn"]\n')
    experiments.append(data / f"inversion_{t:.0f}K.toml")
    truth.append(f"{t},{float(model.at_temperature(t).rates()[0])!r},inversion")

# %% [markdown]
# ## 2. Lineshapes at high temperature
# Spectra at four temperatures around coalescence, with noise at 1/100 of the tallest point of the
# coldest one, written as two-column text and listed in a series file.

# %%
hot_k = [290.0, 300.0, 310.0, 320.0]
ppm = np.linspace(3.55, 4.0, 1800)
scale = 1.0e4 / dnmr.simulate(model.at_temperature(hot_k[0]), ppm).intensity.max()
series = ['# VT series of the invented RX-4 (synthetic spectra)', 'model = "model.toml"', "",
          "[fit]", "region_ppm = [3.6, 3.95]", ""]
for t in hot_k:
    y = scale * dnmr.simulate(model.at_temperature(t), ppm).intensity + rng.normal(0.0, 1.0e4 / 100, ppm.size)
    name = f"spectra/rx4_{t:.0f}K.txt"
    np.savetxt(data / name, np.column_stack([ppm[::-1], y[::-1]]), fmt="%.6f", delimiter="\t",
               header=f"RX-4 (invented), 1H 400.13 MHz, {t:.0f} K, synthetic\nppm\tintensity")
    series += ["[[spectrum]]", f'file = "{name}"', f"temperature_k = {t}", ""]
    truth.append(f"{t},{float(model.at_temperature(t).rates()[0])!r},lineshape")
(data / "series.toml").write_text("\n".join(series))
(data / "truth.csv").write_text("\n".join(truth) + "\n")

# %% [markdown]
# ## 3. Fit both
# `run_transfer` fits each inversion experiment (rate, R1 of both sites, both equilibrium integrals and
# the inversion efficiency) and writes its own rates.csv; `fit_series` fits the lineshapes.

# %%
tables = []
for path in experiments:
    fit = run_transfer(path, OUT / f"si-{path.stem.split('_')[1]}")
    print(fit.report(), "\n")
    tables.append(OUT / f"si-{path.stem.split('_')[1]}" / "rates.csv")
lineshapes = fit_series(data / "series.toml", OUT / "lineshape-fit", workers=1, progress=False)
print(lineshapes.report(), "\n")
tables.append(OUT / "lineshape-fit" / "rates.csv")

# %% [markdown]
# ## 4. One Eyring analysis over both methods
# `eyring_fit_file` takes every rates table at once (the lineshape table and each inversion table) and
# fits the rows together; each rate keeps its method (lineshape where the table names none), which the
# report lists and the figure marks.  On the command line:
# `dnmr eyring lineshape-fit/rates.csv si-*/rates.csv --plot eyring.png`.

# %%
from dnmr.io.output import save_figure

both = dnmr.eyring_fit_file(tables)[0]
print(both.report())
save_figure(both.plot(), OUT / "eyring.png")
lineshape_only = dnmr.eyring_fit_file(OUT / "lineshape-fit" / "rates.csv")[0]
summary = [
    "RX-4 (invented): ΔH‡ and ΔS‡ of the aryl rotation; truth 60.0 kJ/mol and -12.0 J/(mol K)",
    f"lineshapes alone ({len(lineshape_only.rate_per_s)} rates):        ΔH‡ = {lineshape_only.enthalpy_kj_mol:.2f} ± "
    f"{lineshape_only.enthalpy_stderr:.2f} kJ/mol, ΔS‡ = {lineshape_only.entropy_j_mol_k:.1f} ± "
    f"{lineshape_only.entropy_stderr:.1f} J/(mol K)",
    f"inversion and lineshapes ({len(both.rate_per_s)} rates): ΔH‡ = {both.enthalpy_kj_mol:.2f} ± {both.enthalpy_stderr:.2f} "
    f"kJ/mol, ΔS‡ = {both.entropy_j_mol_k:.1f} ± {both.entropy_stderr:.1f} J/(mol K)",
    f"the error of ΔS‡ shrinks {lineshape_only.entropy_stderr / both.entropy_stderr:.1f}-fold",
]
print("\n".join(summary))
(OUT / "summary.txt").write_text("\n".join(summary) + "\n")
