"""The engine: Liouville-space building blocks, spin systems, block Liouvillians, the resolvent
and the simulated spectrum.  Imports only the model layer (dnmr.errors, dnmr.nuclei, dnmr.model,
dnmr.kinetics)."""
