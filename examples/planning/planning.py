# %% [markdown]
# # Planning a VT study for a given barrier: AZ-2 at 300, 400 and 600 MHz
#
# Invented scenario: AZ-2 is an invented N,N-dimethyl heteroaryl amide.  At room temperature its two
# N-methyl singlets are 0.19 ppm apart; a related amide had a rotation barrier of about 72 kJ/mol, so
# the chemist expects ΔG‡ near that.  Before booking magnet time they want to know, at each of the three
# spectrometers they can use (300, 400, 600 MHz): where the singlets coalesce, which temperatures to run,
# whether their usual solvent (CDCl3) stays liquid there, and what to watch out for.  All numbers are
# invented (see model.toml).
#
# Run:  python planning.py [OUTDIR]     (default: ./planning-output, a new folder)

# %%
# Where the results go: the folder named on the command line (default below), which must be new or empty.
from pathlib import Path

from dnmr.io.output import script_output_folder

SCRIPT = globals().get("__file__")  # None in a notebook
HERE = Path(SCRIPT).resolve().parent if SCRIPT else Path.cwd()
OUT = script_output_folder("planning-output", SCRIPT)  # never among the inputs, never over earlier results

# %%
import dnmr

# %% [markdown]
# ## 1. The model and the barrier to plan for
# The model gives shifts, linewidth and populations; its rate is a placeholder.  The guess of the barrier
# comes in as `ActivationParameters`: here ΔG‡ = 72 kJ/mol taken as the same at every temperature
# (`from_gibbs`, i.e. ΔS‡ = 0); give ΔH‡ and ΔS‡ instead if you have them.

# %%
model = dnmr.load_model(HERE / "model.toml")
barrier = dnmr.ActivationParameters.from_gibbs(72.0)
fields_mhz = [300.0, 400.0, 600.0]
print(model.title)
print("planning for", barrier.describe())

# %% [markdown]
# ## 2. First check: the usual solvent
# `plan_experiment` with `solvent=` keeps every planned temperature inside the solvent's liquid range
# (10 K from its melting and boiling points) and the probe's range, and warns about coalescence
# temperatures outside it.  It also lists solvents that are liquid around every coalescence temperature.

# %%
chloroform = dnmr.plan_experiment(model, barrier, frequencies_mhz=fields_mhz, solvent=dnmr.solvent("CDCl3"))
for c in chloroform.coalescence:
    print(f"  {c.proton_mhz:5.0f} MHz: coalescence at k = {c.rate_per_s:.4g} s^-1, T_c = {c.temperature_k:.1f} K")
for warning in chloroform.solvent_warnings:
    print("  warning:", warning.message)
print("  liquid around every coalescence temperature:", ", ".join(chloroform.covering_solvents))

# %% [markdown]
# CDCl3 boils (334 K) well below every coalescence temperature, so the spectra would only show the slow
# side.  Toluene-d8 (bp 384 K) covers it; the plan follows with that solvent.

# %% [markdown]
# ## 3. The plan
# For every field: the coalescence rate and temperature (from the engine, with the model's linewidth and
# in the narrow-line limit), the range of temperatures in which the spectrum measures the rate, and the
# recommended temperatures, chosen to make ΔH‡ and ΔS‡ as well determined as possible (D-optimal, at the
# given signal-to-noise), each with the reason it is there and the predicted (noise-only, lower-bound)
# standard errors.

# %%
plan = dnmr.plan_experiment(model, barrier, frequencies_mhz=fields_mhz, solvent=dnmr.solvent("toluene-d8"),
                            signal_to_noise=150.0, spectra=8, min_step_k=5.0)
print()
print(plan.report())
for field_plan in plan.fields:
    print(f"  {field_plan.proton_mhz:5.0f} MHz: run at " + ", ".join(f"{t:.0f}" for t in field_plan.temperatures_k) + " K")

# %% [markdown]
# ## 4. The cautions
# The plan carries the safety cautions of VT work; they are part of the report above and listed here on
# their own.  They do not replace your facility's rules and training.

# %%
print("\nCautions:")
for caution in plan.cautions:
    print("  -", caution)

# %% [markdown]
# ## 5. Figures and files
# `plan.plot()` draws the predicted spectra at the planned temperatures, one panel per field;
# `timescale_view(...).plot()` the slow / intermediate / fast bands against temperature.

# %%
plan.plot().savefig(OUT / "planned_stacks.png", dpi=110, bbox_inches="tight")
view = dnmr.timescale_view(model, barrier, frequencies_mhz=fields_mhz)
view.plot().savefig(OUT / "regimes.png", dpi=110, bbox_inches="tight")
(OUT / "plan_cdcl3.txt").write_text(chloroform.report() + "\n")
(OUT / "plan_toluene-d8.txt").write_text(plan.report() + "\n")
(OUT / "timescale.txt").write_text(view.report() + "\n")
print(f"\nwritten to {OUT}: planned_stacks.png, regimes.png, plan_cdcl3.txt, plan_toluene-d8.txt, timescale.txt")
