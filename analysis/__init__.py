"""Sillmark's computation: DEM reading, outlets, the Priority-Flood spill engine.

Nothing in this package imports Flask or anything from :mod:`webapp`.
"""

from analysis.errors import SillmarkError

__all__ = ["SillmarkError"]

SCREENING_CAUTION = (
    "Screening analysis of surface connectivity on a DEM, not a hydraulic model. "
    "Decisions rest with a licensed engineer or hydrologist and the local "
    "floodplain regulations and codes."
)
