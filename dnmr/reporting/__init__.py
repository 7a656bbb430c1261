"""Figures, the HTML report, supporting-information tables and notebook views.  May import every
wing below the command line."""
