# %% [markdown]
# # Equivalent groups and a heteronuclear partner: the N-CH2CF3 amide TF-8
#
# Invented scenario: TF-8 is an invented N-methyl-N-(2,2,2-trifluoroethyl) pivalamide.  Below room
# temperature its 1H spectrum shows every signal twice, once for each rotamer about the amide C-N bond
# (E 64 %, Z 36 %): the N-CH2 as a quartet (three-bond coupling to the three fluorines of its CF3), the
# N-CH3 and the tert-butyl singlets.  The chemist wants the VT series, the coalescence temperature of each
# signal, and to see that the H-F splitting survives fast exchange while the rotamers' shifts average.
# All numbers are invented (see model.toml).
#
# Run:  python heteronuclear_groups.py [OUTDIR]     (default: ./heteronuclear_groups-output, a new folder)

# %%
# Where the results go: the folder named on the command line (default below), which must be new or empty.
from pathlib import Path

from dnmr.io.output import script_output_folder

SCRIPT = globals().get("__file__")  # None in a notebook
HERE = Path(SCRIPT).resolve().parent if SCRIPT else Path.cwd()
OUT = script_output_folder("heteronuclear_groups-output", SCRIPT)  # never among the inputs, never over earlier results

# %%
import time

import numpy as np

import dnmr
from dnmr.engine.blocks import lineshape_terms
from dnmr.reporting.plotting import plot_stack

# %% [markdown]
# ## 1. The model
# Four names stand for 17 nuclei: `[groups]` makes CH2 (2), Me (3), tBu (9) and CF3 (3) magnetically
# equivalent groups, and `[heteronuclei]` makes CF3 a 19F partner: it has no shift in the 1H spectrum,
# only its coupling to the CH2 protons (9.2 Hz, the same in both rotamers).

# %%
model = dnmr.load_model(HERE / "model.toml")
activation = dnmr.ActivationParameters.of_exchange(model.exchanges[0])
sf = model.spectrometer.frequency_mhz
j_hf = model.states[0].coupling("CH2", "CF3")
print(model.title)
print(f"groups {model.groups}, heteronuclei {model.heteronuclei}; {activation.describe()}")

# %% [markdown]
# ## 2. The quartet is binomial
# With the exchange stopped, each rotamer's CH2 signal is four lines J(H,F) apart whose areas go
# 1 : 3 : 3 : 1, the binomial pattern of three equivalent spin-1/2 neighbours (common practice: Pascal's
# triangle).  The engine does not write the CF3 out as eight product states; it treats it as one spin-3/2
# particle plus a spin-1/2 particle counted twice (its total-spin sectors).  The line areas come straight
# from the engine's Lorentzian terms.

# %%
terms = lineshape_terms(model.with_rates([0.0]))
centre_e = model.states[0].shifts_ppm["CH2"] * sf
areas = [terms.amplitudes.real[np.abs(terms.line_frequencies_hz - (centre_e + m * j_hf)) < 1e-6].sum() / 2
         for m in (-1.5, -0.5, 0.5, 1.5)]
ratios = np.array(areas) / areas[0]
print("E rotamer, CH2 quartet line areas relative to the outer line: "
      + " : ".join(f"{r:.9f}" for r in ratios))
binomial_error = float(np.abs(ratios - [1, 3, 3, 1]).max())
print(f"largest difference from 1 : 3 : 3 : 1: {binomial_error:.1e}")

# %% [markdown]
# ## 3. The same molecule written nucleus by nucleus
# As a check: two CH2 protons, three methyl and nine tert-butyl protons as single spins, three single
# fluorines.  The spectra must agree to rounding error.  Here the saving is modest, because the engine
# cuts nuclei that nothing couples apart either way; it is large where groups couple to other spins
# (two exchanging N-CH3 groups coupled to one more proton: about 60 times, benchmarks/engine_speed.py).

# %%
def spin_by_spin(model: dnmr.Model) -> dnmr.Model:
    """`model` with every group written out as its individual nuclei (same shifts, same couplings)."""
    members = {g: [f"{g}{i + 1}" for i in range(n)] for g, n in model.groups.items()}
    states = []
    for s in model.states:
        shifts = {m: v for g, v in s.shifts_ppm.items() for m in members[g]}
        couplings = {f"{h}-{f}": s.coupling("CH2", "CF3") for h in members["CH2"] for f in members["CF3"]}
        states.append(dnmr.State(s.name, shifts, couplings, linewidth_hz=s.linewidth_hz, population=s.population))
    return dnmr.Model(model.spectrometer, states, model.exchanges, window_ppm=model.window_ppm,
                      points=model.points, heteronuclei={f: "19F" for f in members["CF3"]},
                      temperature_k=model.temperature_k)


written_out = spin_by_spin(model)
at_340 = model.at_temperature(340.0)
t0 = time.process_time()
grouped_spectrum = dnmr.simulate(at_340)
t_groups = time.process_time() - t0
t0 = time.process_time()
single_spectrum = dnmr.simulate(written_out.at_temperature(340.0))
t_single = time.process_time() - t0
difference = float(np.abs(grouped_spectrum.intensity - single_spectrum.intensity).max() / single_spectrum.intensity.max())
print(f"340 K: groups {t_groups * 1e3:.1f} ms, nucleus by nucleus {t_single * 1e3:.1f} ms;"
      f" largest difference {difference:.1e} of the tallest peak")

# %% [markdown]
# ## 4. The VT series
# `simulate_over` evaluates the model at each temperature (rates by Eyring); the tert-butyl singlets
# (12 Hz apart at 400 MHz) merge first, then the methyls (36 Hz), then the CH2 quartets (68 Hz), each
# line of one rotamer's quartet with the same line of the other's.

# %%
temperatures_k = [230, 255, 268, 275, 282, 288, 295, 310, 340, 400]
spectra, labels = dnmr.simulate_over(model, temperatures_k=temperatures_k)
ax = plot_stack(spectra, labels, title="TF-8, 400 MHz (simulated)")
ax.figure.savefig(OUT / "vt_stack.png", dpi=120, bbox_inches="tight")
coalescence = dnmr.predict_coalescence(model, activation, frequencies_mhz=[400.13, 600.13])
for c in coalescence:
    print(f"  {c.proton_mhz:.0f} MHz  {c.pair.label:<18} |Δν| {abs(c.shift_difference_hz):6.2f} Hz"
          f"  k_c {c.rate_per_s:8.2f} s^-1  T_c {c.temperature_k:6.1f} K")

# %% [markdown]
# ## 5. Fast exchange: shifts average, the H-F coupling stays
# At 400 K the rotation is fast on every signal's timescale at 400 MHz.  The averaged spin system has each
# group at its population-weighted shift; the CH2 keeps its 9.2 Hz coupling to the CF3, because exchange
# does not make a proton equivalent to a fluorine, so the hot CH2 signal is still a 1:3:3:1 quartet.
#
# Caution: 400 K is above the boiling point of many NMR solvents (toluene-d8 boils near 384 K); this is a
# simulation.  Choose the solvent with `dnmr plan ... --solvent`, and for a real sample follow your
# facility's rules on heating sealed tubes and the probe's temperature limits.

# %%
view = dnmr.timescale_view(model, temperature_k=400.0)
print(view.report())
hot = dnmr.simulate(model.at_temperature(400.0))
quartet = [p for p in hot.maxima_ppm() if 3.9 < p < 4.2]
spacing_hz = float(np.diff(sorted(quartet)).mean() * sf)
weighted = sum(p * s.shifts_ppm["CH2"] for p, s in zip(model.populations(), model.states))
print(f"400 K: CH2 quartet of {len(quartet)} lines around {np.mean(quartet):.4f} ppm (population-weighted"
      f" shift {weighted:.4f} ppm), spacing {spacing_hz:.2f} Hz: the H-F coupling of {j_hf} Hz stays")

# %% [markdown]
# ## 6. Write the results

# %%
summary = "\n".join([
    model.title,
    activation.describe(),
    "",
    "CH2 quartet line areas (E, exchange stopped): " + " : ".join(f"{r:.9f}" for r in ratios),
    f"groups against nucleus by nucleus at 340 K: largest difference {difference:.1e}",
    "",
    "coalescence (k in s^-1, T in K)",
    *(f"  {c.proton_mhz:.0f} MHz  {c.pair.label:<18} k_c = {c.rate_per_s:8.2f}  T_c = {c.temperature_k:6.1f}"
      for c in coalescence),
    "",
    view.report(),
])
(OUT / "summary.txt").write_text(summary + "\n")
print(f"\nwritten to {OUT}: vt_stack.png, summary.txt")
