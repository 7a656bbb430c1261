"""Figures, the HTML report, supporting-information tables, and simulated spectra written to files (the
table and figure of ``dnmr simulate``, the stack of ``dnmr stack``).  May import every wing below the
command line."""
