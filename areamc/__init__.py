"""areamc: Monte Carlo areas of polygon layers, with confidence intervals and exact checks."""

__version__ = "0.1.0"
