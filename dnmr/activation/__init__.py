"""Activation analysis: Eyring and Arrhenius fits of rates, coalescence estimates and sample
temperatures from chemical-shift thermometers.  Imports the model layer and dnmr.io."""
