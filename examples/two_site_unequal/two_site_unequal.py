# %% [markdown]
# # Two-site exchange with unequal populations: the N-CH3 of MT-9
#
# Invented scenario: MT-9 is an invented thioformanilide whose N-CH3 singlet shows up twice below room
# temperature, once for each rotamer about the C-N bond (E 72 %, Z 28 %, 0.23 ppm apart at 400 MHz).
# The chemist wants to know what the variable-temperature (VT) series will look like, at which rate and
# temperature the two singlets coalesce, and how far the textbook equal-population formula is off.
# All numbers are invented (see model.toml).
#
# Run:  python two_site_unequal.py [OUTDIR]     (default: ./two_site_unequal-output, a new folder)

# %%
# Where the results go: the folder named on the command line (default below), which must be new or empty.
from pathlib import Path

from dnmr.io.output import script_output_folder

SCRIPT = globals().get("__file__")  # None in a notebook
HERE = Path(SCRIPT).resolve().parent if SCRIPT else Path.cwd()
OUT = script_output_folder("two_site_unequal-output", SCRIPT)  # never among the inputs, never over earlier results

# %%
import math

from scipy.optimize import brentq

import dnmr
from dnmr.reporting.plotting import plot_stack

# %% [markdown]
# ## 1. The model
# One spin name (a methyl group, `[groups] Me = 3`) in two states with different shifts and populations,
# one exchange process E -> Z given by its activation parameters; the reverse rate follows from detailed
# balance.

# %%
model = dnmr.load_model(HERE / "model.toml")
p_e, p_z = model.populations()
dnu_hz = abs(model.states[0].shifts_ppm["Me"] - model.states[1].shifts_ppm["Me"]) * model.spectrometer.frequency_mhz
activation = dnmr.ActivationParameters.of_exchange(model.exchanges[0])  # ΔH‡ and ΔS‡ from the model file
print(model.title)
print(f"populations E {p_e:.2f}, Z {p_z:.2f}; shift difference {dnu_hz:.2f} Hz at {model.spectrometer.frequency_mhz} MHz")

# %% [markdown]
# ## 2. The VT stack
# `simulate_over` evaluates the model at each temperature (rates by Eyring from ΔH‡ and ΔS‡) on one ppm
# grid; `plot_stack` draws them from the bottom up, enlarging broad traces (the factor is printed).

# %%
temperatures_k = [300, 320, 330, 335, 340, 345, 350, 370, 400]
spectra, labels = dnmr.simulate_over(model, temperatures_k=temperatures_k)
for t, s in zip(temperatures_k, spectra):
    print(f"  {t} K: k(E->Z) = {activation.rate_at(t):9.3g} s^-1, maxima at "
          + ", ".join(f"{p:.3f}" for p in s.maxima_ppm()) + " ppm")
ax = plot_stack(spectra, labels, title="MT-9, N-CH3, 400 MHz (simulated)")
ax.figure.savefig(OUT / "vt_stack.png", dpi=120, bbox_inches="tight")

# %% [markdown]
# ## 3. Coalescence from the engine
# `predict_coalescence` simulates the pair on its own and finds the forward rate k(E->Z) at which the two
# maxima become one, with the model's linewidth and in the narrow-line limit, and the temperature where
# Eyring reaches that rate.

# %%
engine = dnmr.predict_coalescence(model, activation)[0]
print(f"engine: k_c = {engine.rate_per_s:.4g} s^-1 at T_c = {engine.temperature_k:.2f} K (1.0 Hz lines);"
      f" narrow-line k_c = {engine.narrow_limit_rate_per_s:.6g} s^-1, T_c = {engine.narrow_limit_temperature_k:.2f} K")

# %% [markdown]
# ## 4. The closed form of Shanan-Atidi & Bar-Eli
# For two uncoupled sites with populations p_E > p_Z and infinitely narrow lines, coalescence happens
# where  |p_E - p_Z| = ((X^2 - 2) / 3)^(3/2) / X,  X = 2 pi dnu tau,  tau = 1 / (k_EZ + k_ZE)
# (Shanan-Atidi & Bar-Eli, J. Phys. Chem. 74, 961 (1970)).  With p_E k_EZ = p_Z k_ZE the forward rate is
# k_EZ = p_Z / tau.  For equal populations X = sqrt 2 and k = pi dnu / sqrt 2 (Gutowsky & Holm 1956).

# %%
def shanan_atidi_bar_eli(dp: float, dnu: float, p_minor: float) -> float:
    """Forward rate (s^-1, from the major site) at coalescence of two uncoupled sites, narrow lines."""
    def gap(x):
        return ((x * x - 2.0) / 3.0) ** 1.5 / x - abs(dp)

    x = math.sqrt(2.0) if dp == 0 else brentq(gap, math.sqrt(2.0), 1e3, xtol=1e-14)
    tau = x / (2.0 * math.pi * dnu)
    return p_minor / tau


k_closed = shanan_atidi_bar_eli(p_e - p_z, dnu_hz, p_z)
t_closed = activation.temperature_at(k_closed)
k_equal = math.pi * dnu_hz / math.sqrt(2.0)  # Gutowsky-Holm, the rate of each direction when p_E = p_Z
t_equal = activation.temperature_at(k_equal)
print(f"Shanan-Atidi & Bar-Eli: k_c = {k_closed:.6g} s^-1, T_c = {t_closed:.2f} K")
print(f"relative difference engine (narrow lines) vs closed form: {engine.narrow_limit_rate_per_s / k_closed - 1:.1e}")
print(f"the equal-population formula would put T_c at {t_equal:.1f} K instead")

# %% [markdown]
# ## 5. What the equal-population shortcut costs
# The quick estimate ΔG‡ = R T_c ln(sqrt 2 kB T_c / (pi h dnu)) assumes equal populations.  Compare it at
# the engine's T_c with the true ΔG‡ of the E -> Z process there.

# %%
quick = dnmr.coalescence_barrier(engine.temperature_k, dnu_hz)
true_gibbs = activation.gibbs_kj_mol(engine.temperature_k)
print(f"quick estimate ΔG‡(T_c) = {quick.gibbs_kj_mol:.2f} kJ/mol; true ΔG‡(E->Z) at T_c = {true_gibbs:.2f} kJ/mol")

# %% [markdown]
# ## 6. Write the results
# A short report and the spectrum at coalescence (CSV: ppm, hz, intensity, dispersion, high ppm first).

# %%
report = "\n".join([
    model.title,
    f"populations E {p_e:.3f} / Z {p_z:.3f}; Δν = {dnu_hz:.3f} Hz; {activation.describe()}",
    "",
    "coalescence (forward rate k(E->Z), s^-1; temperature, K)",
    f"  engine, 1.0 Hz lines          k_c = {engine.rate_per_s:10.6g}   T_c = {engine.temperature_k:7.2f}",
    f"  engine, narrow-line limit     k_c = {engine.narrow_limit_rate_per_s:10.6g}   T_c = {engine.narrow_limit_temperature_k:7.2f}",
    f"  Shanan-Atidi & Bar-Eli 1970   k_c = {k_closed:10.6g}   T_c = {t_closed:7.2f}",
    f"  equal populations (G-H 1956)  k_c = {k_equal:10.6g}   T_c = {t_equal:7.2f}   (wrong here)",
    "",
    f"quick equal-population ΔG‡(T_c) = {quick.gibbs_kj_mol:.2f} kJ/mol vs true {true_gibbs:.2f} kJ/mol",
])
(OUT / "coalescence.txt").write_text(report + "\n")
at_coalescence = dnmr.simulate(model.with_rates([engine.rate_per_s]))
at_coalescence.to_csv(OUT / "spectrum_at_coalescence.csv")
print(f"\nwritten to {OUT}: vt_stack.png, coalescence.txt, spectrum_at_coalescence.csv")
