"""Platebook's engine: fit published triode models to measured plate curves, and use them."""

__version__ = "0.1.0"

#: The high-voltage caution every report, export and page carries (one wording, one place).
CAUTION = ("CAUTION: tube circuits and curve tracers work at lethal voltages; follow your local "
           "electrical codes and licensed practice.")
