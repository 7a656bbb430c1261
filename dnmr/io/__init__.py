"""Input and output: model files, measured spectra and raw FIDs, rate tables, safe atomic output,
bounded input files and progress lines.  Imports only the model layer."""
