# %% [markdown]
# # An AB pair swapped by mutual exchange: the ring flip of DB-7
#
# Invented scenario: DB-7 is an invented dibenzo-fused seven-membered ring.  Its bridging CH2 protons are
# diastereotopic while the ring is frozen (an AB quartet, 0.36 ppm apart at 400 MHz, 2J = -13.4 Hz); the
# ring flip swaps them.  The chemist wants the VT series, the coalescence rate and temperature (and a
# check against the Kurland-Rubin-Wise formula), and to see why the hot spectrum is a single line with no
# trace of the 13.4 Hz coupling.  All numbers are invented (see model.toml).
#
# Run:  python ab_mutual.py [OUTDIR]     (default: ./ab_mutual-output, a new folder)

# %%
# Where the results go: the folder named on the command line (default below), which must be new or empty.
from pathlib import Path

from dnmr.io.output import script_output_folder

SCRIPT = globals().get("__file__")  # None in a notebook
HERE = Path(SCRIPT).resolve().parent if SCRIPT else Path.cwd()
OUT = script_output_folder("ab_mutual-output", SCRIPT)  # never among the inputs, never over earlier results

# %%
import math

import dnmr
from dnmr.reporting.plotting import plot_stack

# %% [markdown]
# ## 1. The model and its slow-exchange spectrum
# One state, two coupled spins, one mutual exchange {Ha -> Hb, Hb -> Ha}.  Strong coupling is exact: with
# the rate switched off the spectrum is the AB quartet, whose lines sit at the centre
# +/- (C + J)/2 and +/- (C - J)/2 with C = sqrt(dnu^2 + J^2) (any NMR text).

# %%
model = dnmr.load_model(HERE / "model.toml")
sf = model.spectrometer.frequency_mhz
shifts = model.states[0].shifts_ppm
dnu_hz = abs(shifts["Hb"] - shifts["Ha"]) * sf
j_hz = model.states[0].coupling("Ha", "Hb")
centre_ppm = (shifts["Ha"] + shifts["Hb"]) / 2
c_hz = math.hypot(dnu_hz, j_hz)
quartet_ppm = sorted(centre_ppm + sign * (c_hz + s2 * abs(j_hz)) / 2 / sf for sign in (1, -1) for s2 in (1, -1))
frozen = dnmr.simulate(model.with_rates([0.0]))
print(model.title)
print(f"Δν = {dnu_hz:.2f} Hz, J = {j_hz} Hz")
print("AB quartet, closed form / ppm:", ", ".join(f"{p:.4f}" for p in reversed(quartet_ppm)))
print("AB quartet, engine / ppm:     ", ", ".join(f"{p:.4f}" for p in frozen.maxima_ppm()))

# %% [markdown]
# ## 2. The VT stack

# %%
activation = dnmr.ActivationParameters.of_exchange(model.exchanges[0])  # ΔH‡ and ΔS‡ from the model file
temperatures_k = [230, 260, 280, 290, 297, 305, 320, 350, 400]
spectra, labels = dnmr.simulate_over(model, temperatures_k=temperatures_k)
ax = plot_stack(spectra, labels, title="DB-7, CH$_2$, 400 MHz (simulated)")
ax.figure.savefig(OUT / "vt_stack.png", dpi=120, bbox_inches="tight")

# %% [markdown]
# ## 3. Coalescence against Kurland, Rubin & Wise
# For an AB pair the two inner lines merge when the centre of the quartet turns from a minimum into a
# maximum.  In the narrow-line limit this happens at k_c = (pi / sqrt 2) sqrt(dnu^2 + 6 J^2)
# (Kurland, Rubin & Wise, J. Chem. Phys. 40, 2426 (1964)); with J = 0 it is Gutowsky-Holm's pi dnu / sqrt 2.

# %%
engine = dnmr.predict_coalescence(model, activation)[0]
k_krw = math.pi / math.sqrt(2.0) * math.hypot(dnu_hz, math.sqrt(6.0) * j_hz)
t_krw = activation.temperature_at(k_krw)
k_gh = math.pi * dnu_hz / math.sqrt(2.0)
print(f"engine, 0.9 Hz lines:      k_c = {engine.rate_per_s:.6g} s^-1, T_c = {engine.temperature_k:.2f} K")
print(f"engine, narrow-line limit: k_c = {engine.narrow_limit_rate_per_s:.6g} s^-1, T_c = {engine.narrow_limit_temperature_k:.2f} K")
print(f"Kurland-Rubin-Wise:        k_c = {k_krw:.6g} s^-1, T_c = {t_krw:.2f} K"
      f"  (relative difference {engine.narrow_limit_rate_per_s / k_krw - 1:.1e})")
print(f"ignoring the coupling (Gutowsky-Holm) would give k_c = {k_gh:.4g} s^-1, T_c = {activation.temperature_at(k_gh):.2f} K")

# %% [markdown]
# ## 4. Fast exchange: the averaged system
# `timescale_view` gives the temperatures where the flip is slow, intermediate or fast at this field, and
# at a chosen temperature the averaged spin system.  Averaged over the flip, Ha and Hb have the same shift
# (3.80 ppm) and, being only two, couple alike to everything else: they are magnetically equivalent, an
# A2 system.  The coupling between equivalent nuclei moves all levels of each observable manifold alike,
# so it does not show: one line.  `averaged_model` is that system as a model without exchange.

# %%
view = dnmr.timescale_view(model, temperature_k=440.0)
print(view.report())
fig = view.plot()
fig.savefig(OUT / "regimes.png", dpi=120, bbox_inches="tight")

averaged = dnmr.averaged_model(model)
a2 = dnmr.simulate(averaged, frozen.ppm)
hot = dnmr.simulate(model.at_temperature(440.0), frozen.ppm)
print(f"averaged model: maxima at {a2.maxima_ppm()} ppm (coupling {averaged.states[0].coupling('Ha', 'Hb')} Hz"
      " kept in the model, invisible in the spectrum)")
print(f"full model at 440 K (k = {activation.rate_at(440.0):.3g} s^-1): maxima at {hot.maxima_ppm()} ppm")
fig = hot.plot(label="full model, 440 K").figure
a2.plot(ax=fig.axes[0], ls="--", label="averaged model (A$_2$, no exchange)")
fig.axes[0].set_xlim(3.86, 3.74)
fig.axes[0].set_title("DB-7: fast exchange, 400 MHz (simulated)")
fig.axes[0].legend(frameon=False)
fig.savefig(OUT / "fast_limit.png", dpi=120, bbox_inches="tight")

# %% [markdown]
# ## 5. Write the results

# %%
summary = "\n".join([
    model.title,
    f"Δν = {dnu_hz:.3f} Hz, J = {j_hz} Hz; {activation.describe()}",
    "",
    "coalescence (k in s^-1, T in K)",
    f"  engine, 0.9 Hz lines         k_c = {engine.rate_per_s:10.6g}  T_c = {engine.temperature_k:7.2f}",
    f"  engine, narrow-line limit    k_c = {engine.narrow_limit_rate_per_s:10.6g}  T_c = {engine.narrow_limit_temperature_k:7.2f}",
    f"  Kurland-Rubin-Wise 1964      k_c = {k_krw:10.6g}  T_c = {t_krw:7.2f}",
    "",
    view.report(),
])
(OUT / "summary.txt").write_text(summary + "\n")
print(f"\nwritten to {OUT}: vt_stack.png, regimes.png, fast_limit.png, summary.txt")
