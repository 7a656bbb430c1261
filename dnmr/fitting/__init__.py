"""Fitting: the shared fit problem, one spectrum, a VT series, the global fit, posteriors and
magnetisation-transfer fits.  Imports the model layer, dnmr.engine, dnmr.io and dnmr.activation."""
