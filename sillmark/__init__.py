"""Sillmark: screening analysis of which low ground a water level reaches, from a site DEM.

The computation lives in :mod:`analysis`; this package holds the command line.
"""

__version__ = "0.1.0"
