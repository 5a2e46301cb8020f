"""Sillmark: screening analysis of which low ground a water level reaches, from a site DEM.

The package is layered, and imports run one way only (checked by the test
suite's import contract):

- :mod:`sillmark.grid`: what sits on a grid (DEM reading and checks, CRS
  helpers, outlets);
- :mod:`sillmark.engine`: the Priority-Flood engine;
- :mod:`sillmark.products`: what is derived from a flood result;
- :mod:`sillmark.io`: file formats;
- :mod:`sillmark.cli` and :mod:`sillmark.web`: the command line and the browser app.
"""

__version__ = "0.1.0"

#: The caution every map, report and export carries.
SCREENING_CAUTION = (
    "Screening analysis of surface connectivity on a DEM, not a hydraulic model. "
    "Decisions rest with a licensed engineer or hydrologist and the local "
    "floodplain regulations and codes."
)
