"""One exception family for Sillmark.

Every domain error also subclasses the built-in it resembles, so a caller may
catch either ``SillmarkError`` or, say, ``ValueError``. Messages say what was
wrong and what would be accepted; the command line and the web layer show them
as they are, without a traceback.
"""


class SillmarkError(Exception):
    """Base class of every error Sillmark raises on purpose."""


class InvalidDEM(SillmarkError, ValueError):
    """The DEM cannot be used as it is (format, bands, CRS, transform, size, values)."""


class InvalidOutlets(SillmarkError, ValueError):
    """The outlet specification is unusable (unknown kind, misses the grid, empty)."""


class InvalidParameter(SillmarkError, ValueError):
    """A parameter is out of range or of the wrong kind (connectivity, unit, location)."""


class LocationOutsideDEM(InvalidParameter):
    """A location lies outside the DEM or on a nodata cell."""


class InvalidProfile(SillmarkError, ValueError):
    """A water-surface profile file is unusable (not one centreline, too few stations)."""


class InvalidRefuges(SillmarkError, ValueError):
    """A refuge or road file is unusable (no geometry, misses the grid, all on nodata)."""
