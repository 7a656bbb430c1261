# %% [markdown]
# # Three-site cyclic exchange: the hydrides of OS-3
#
# Invented scenario: OS-3 is an invented osmium trihydride.  At low temperature its three hydrides are
# inequivalent (-8.10, -9.05 and -10.50 ppm at 500 MHz, coupled to one another by 2.5-6.5 Hz); a
# turnstile-like rotation carries H1 to the site of H2, H2 to that of H3 and H3 to that of H1.  The
# chemist wants to see how the spectrum changes with the rate, from three multiplets to one line, and what
# the fast-exchange spectrum is.  All numbers are invented (see model.toml).
#
# Run:  python three_site_cyclic.py [OUTDIR]     (default: ./three_site_cyclic-output, a new folder)

# %%
# Where the results go: the folder named on the command line (default below), which must be new or empty.
from pathlib import Path

from dnmr.io.output import script_output_folder

SCRIPT = globals().get("__file__")  # None in a notebook
HERE = Path(SCRIPT).resolve().parent if SCRIPT else Path.cwd()
OUT = script_output_folder("three_site_cyclic-output", SCRIPT)  # never among the inputs, never over earlier results

# %%
import numpy as np

import dnmr
from dnmr.reporting.plotting import plot_stack

# %% [markdown]
# ## 1. The model
# One state with three spins and one *mutual* exchange (`from` = `to`): the mapping
# {H1 -> H2, H2 -> H3, H3 -> H1} is a cyclic permutation.  dnmr adds the reverse cycle at the same rate,
# so each hydride leaves its site at 2k in total (k to each of the other two sites).

# %%
model = dnmr.load_model(HERE / "model.toml")
print(model.title)
print("shifts / ppm:", model.states[0].shifts_ppm, " couplings / Hz:", model.states[0].couplings_hz)

# %% [markdown]
# ## 2. A stack over rates
# `simulate_over(rates_per_s=...)` replaces the rate of the first process and simulates each on one grid.
# Exchange moves intensity, it does not make or lose it: the integral over all frequencies is 3 (three
# protons) at every rate.  Over this 3.8 ppm window it dips a few per cent at intermediate rates, where
# the lines are so broad that part of their Lorentzian tails lies outside the window.

# %%
rates = [1.0, 20.0, 80.0, 200.0, 500.0, 1500.0, 5000.0, 2e4, 1e5]
spectra, labels = dnmr.simulate_over(model, rates_per_s=rates)
for k, s in zip(rates, spectra):
    top = s.maxima_ppm(prominence=0.05)
    print(f"  k = {k:8.3g} s^-1: integral {s.integral():.3f}, {len(top)} maxima, tallest at "
          f"{s.ppm[np.argmax(s.intensity)]:.3f} ppm")
ax = plot_stack(spectra, labels, title="OS-3 hydrides, 500 MHz (simulated)")
ax.figure.savefig(OUT / "rate_stack.png", dpi=120, bbox_inches="tight")

# %% [markdown]
# ## 3. Where each pair of signals would coalesce
# `dnmr.coalescence` looks, for every pair of sites the process joins, at the spectrum between their two
# shifts and finds the rate at which its maxima there merge into the one of fast exchange.  With three
# sites the third one takes part too: both pairs that include the outer H3 line (-10.50 ppm) merge when
# that line does, so they share one rate.  Above the largest of these rates the spectrum is one broad
# line (compare k = 1500 s^-1 in the stack).

# %%
for c in dnmr.coalescence(model):
    print(f"  {c.pair.label:<30} Δν = {abs(c.shift_difference_hz):7.1f} Hz, maxima merge at k = {c.rate_per_s:.3g} s^-1")

# %% [markdown]
# ## 4. The fast-exchange limit
# When the rotation is fast every hydride visits all three sites equally: the shift averages to
# (-8.10 - 9.05 - 10.50) / 3 = -9.217 ppm, and each averaged coupling is (6.5 + 4.0 + 2.5) / 3 = 4.33 Hz.
# The three hydrides become magnetically equivalent, and a coupling among equivalent nuclei does not show:
# the spectrum is one line.  `fast_exchange_limit` says so in words; `averaged_model` is that system as
# a model, ready for `simulate`.

# %%
limit = dnmr.fast_exchange_limit(model)
print(limit.report())
averaged = dnmr.simulate(dnmr.averaged_model(model), spectra[0].ppm)
very_fast = dnmr.simulate(model.with_rates([1e7]), spectra[0].ppm)
print(f"averaged model: maxima at {averaged.maxima_ppm()} ppm;"
      f" full model at k = 1e7 s^-1: maxima at {very_fast.maxima_ppm(prominence=0.05)} ppm")

fig = very_fast.plot(label="full model, k = 1e7 s$^{-1}$").figure
averaged.plot(ax=fig.axes[0], ls="--", label="averaged model (no exchange)")
fig.axes[0].set_xlim(-9.1, -9.35)
fig.axes[0].set_title("OS-3: fast-exchange limit, 500 MHz (simulated)")
fig.axes[0].legend(frameon=False)
fig.savefig(OUT / "fast_limit.png", dpi=120, bbox_inches="tight")

# %% [markdown]
# ## 5. Write the results

# %%
lines = [model.title, "", "rate stack (k in s^-1; integral; number of maxima)"]
lines += [f"  {k:10.3g}  {s.integral():.4f}  {len(s.maxima_ppm(prominence=0.05))}" for k, s in zip(rates, spectra)]
lines += ["", limit.report()]
(OUT / "summary.txt").write_text("\n".join(lines) + "\n")
print(f"\nwritten to {OUT}: rate_stack.png, fast_limit.png, summary.txt")
