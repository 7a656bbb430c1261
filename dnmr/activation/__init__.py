"""Activation analysis: from rates to ΔH‡, ΔS‡ and ΔG‡, and the sample temperatures behind them.

* rates, rate_table — a series of rates of one process; rates tables (CSV) read into series;
* line_fit — the Eyring and Arrhenius lines by generalised least squares with temperature errors;
* eyring, eyring_result, eyring_report — the Eyring analysis, its result and its readable report;
* posterior — posterior samples of ΔH‡ and ΔS‡ (optional emcee);
* study — the whole analysis in one call (``dnmr eyring``: posteriors, figures, tables);
* coalescence — a quick ΔG‡ from a coalescence temperature;
* thermometers, temperature_calibration, temperature_errors — sample temperatures from shift
  thermometers, set-point calibrations, and the independent and shared errors of temperatures;
* parameters — activation parameters as given or estimated (ActivationParameters, ActivationEstimate).

Imports the base layer and dnmr.io only (never dnmr.fitting); the figure and table methods of the result
objects import dnmr.reporting when called.
"""
