"""Vertical units of a site and conversions to SI.

Elevations keep the unit they were surveyed in. Areas and volumes are shown in
m², ha and m³ on metric sites and in ft², acres and acre-ft on sites whose
heights are in feet (:func:`area_units`).

References
----------
NIST Handbook 44 (2023), Appendix C: 1 international foot = 0.3048 m exactly;
1 US survey foot = 1200/3937 m exactly; 1 acre = 43 560 ft² (international
acre = 4046.8564224 m²).
"""

from __future__ import annotations

import dataclasses
import enum

import numpy as np

from sillmark.errors import InvalidParameter


class VerticalUnit(str, enum.Enum):
    """Unit of the elevations in a DEM."""

    METRE = "m"
    FOOT = "ft"
    US_SURVEY_FOOT = "us-ft"

    @property
    def metres(self) -> float:
        """Length of one unit in metres."""
        return _METRES[self]

    @property
    def symbol(self) -> str:
        """Short symbol shown beside figures."""
        return _SYMBOL[self]

    @property
    def is_feet(self) -> bool:
        return self is not VerticalUnit.METRE

    @classmethod
    def parse(cls, text: str | "VerticalUnit") -> "VerticalUnit":
        """Read a unit from user text (``m``, ``metre``, ``ft``, ``us-ft`` ...)."""
        if isinstance(text, VerticalUnit):
            return text
        key = str(text).strip().lower().replace("_", "-").replace(" ", "-")
        try:
            return _ALIASES[key]
        except KeyError:
            raise InvalidParameter(
                f"unknown vertical unit {text!r}; use one of: m (metres), "
                "ft (international feet), us-ft (US survey feet)"
            ) from None


_METRES = {
    VerticalUnit.METRE: 1.0,
    VerticalUnit.FOOT: 0.3048,
    VerticalUnit.US_SURVEY_FOOT: 1200.0 / 3937.0,
}
_SYMBOL = {VerticalUnit.METRE: "m", VerticalUnit.FOOT: "ft", VerticalUnit.US_SURVEY_FOOT: "US ft"}
_ALIASES = {
    "m": VerticalUnit.METRE,
    "metre": VerticalUnit.METRE,
    "metres": VerticalUnit.METRE,
    "meter": VerticalUnit.METRE,
    "meters": VerticalUnit.METRE,
    "ft": VerticalUnit.FOOT,
    "foot": VerticalUnit.FOOT,
    "feet": VerticalUnit.FOOT,
    "international-foot": VerticalUnit.FOOT,
    "international-feet": VerticalUnit.FOOT,
    "us-ft": VerticalUnit.US_SURVEY_FOOT,
    "usft": VerticalUnit.US_SURVEY_FOOT,
    "us-survey-foot": VerticalUnit.US_SURVEY_FOOT,
    "us-survey-feet": VerticalUnit.US_SURVEY_FOOT,
    "survey-foot": VerticalUnit.US_SURVEY_FOOT,
}

#: One international acre in square metres (NIST Handbook 44, Appendix C).
ACRE_M2 = 4046.8564224
#: One acre-foot in cubic metres (43 560 ft³ with the international foot).
ACRE_FOOT_M3 = 43560.0 * 0.3048**3


# Column-name suffixes and long names of the vertical units. The long names are
# the unit names of the EPSG registry as PROJ spells them (EPSG 9001, 9002, 9003).
_UNIT_SUFFIX = {VerticalUnit.METRE: "m", VerticalUnit.FOOT: "ft", VerticalUnit.US_SURVEY_FOOT: "us_ft"}
_UNIT_NAME = {
    VerticalUnit.METRE: "metre",
    VerticalUnit.FOOT: "foot",
    VerticalUnit.US_SURVEY_FOOT: "US survey foot",
}


def unit_of(grid) -> VerticalUnit:
    """The vertical unit of a DEM or grid (its ``vertical_unit`` attribute)."""
    return VerticalUnit.parse(grid.vertical_unit)


def unit_suffix(unit: VerticalUnit | str) -> str:
    """Column-name suffix of a vertical unit: ``m``, ``ft`` or ``us_ft``.

    Examples
    --------
    >>> unit_suffix("us-ft")
    'us_ft'
    """
    return _UNIT_SUFFIX[VerticalUnit.parse(unit)]


def unit_name(unit: VerticalUnit | str) -> str:
    """Long name of a vertical unit as written in GeoTIFF band units and CSV comments."""
    return _UNIT_NAME[VerticalUnit.parse(unit)]


# What people read: plural names, never the internal codes (``us-ft``).
_UNIT_WORDS = {
    VerticalUnit.METRE: "metres",
    VerticalUnit.FOOT: "international feet",
    VerticalUnit.US_SURVEY_FOOT: "US survey feet",
}


def unit_words(unit: VerticalUnit | str) -> str:
    """A vertical unit as pages and messages name it: ``metres``, ``international
    feet`` or ``US survey feet``.

    Examples
    --------
    >>> unit_words("us-ft")
    'US survey feet'
    """
    return _UNIT_WORDS[VerticalUnit.parse(unit)]


#: Longest vertical datum name kept (a name, not a document).
DATUM_MAX_CHARS = 80
#: What is shown beside a level when the user gave no vertical datum.
NO_DATUM = "datum not stated"


def clean_datum(text: str | None) -> str | None:
    """The vertical datum as the user named it (e.g. ``NAVD88``, ``Ordnance Datum
    Newlyn``), trimmed; None when blank.

    Raises
    ------
    InvalidParameter
        The name is longer than :data:`DATUM_MAX_CHARS` characters or holds
        control characters.

    Examples
    --------
    >>> clean_datum("  NAVD88 ")
    'NAVD88'
    >>> clean_datum("") is None
    True
    """
    if text is None:
        return None
    name = " ".join(str(text).split())
    if not name:
        return None
    if any(not ch.isprintable() for ch in name):
        raise InvalidParameter(
            "the vertical datum holds control characters; give its name in plain text, "
            "e.g. NAVD88 or Ordnance Datum Newlyn"
        )
    if len(name) > DATUM_MAX_CHARS:
        raise InvalidParameter(
            f"the vertical datum is {len(name)} characters long; give its name in at most "
            f"{DATUM_MAX_CHARS} characters, e.g. NAVD88 or Ordnance Datum Newlyn"
        )
    return name


def datum_phrase(datum: str | None) -> str:
    """What follows a level: ``above NAVD88``, or ``datum not stated``.

    Examples
    --------
    >>> datum_phrase("NAVD88"), datum_phrase(None)
    ('above NAVD88', 'datum not stated')
    """
    return f"above {datum}" if datum else NO_DATUM


def level_text(value: float, unit: VerticalUnit | str, datum: str | None) -> str:
    """A level as people read it: ``47.60 m above NAVD88`` or ``47.60 m, datum not stated``.

    Examples
    --------
    >>> level_text(47.6, "m", "NAVD88")
    '47.60 m above NAVD88'
    >>> level_text(12.0, "us-ft", None)
    '12.00 US ft, datum not stated'
    """
    symbol = VerticalUnit.parse(unit).symbol
    sep = " " if datum else ", "
    return f"{value:.2f} {symbol}{sep}{datum_phrase(datum)}"


# --------------------------------------------------------------------------- areas and volumes

#: One international square foot in square metres (0.3048² exactly).
SQUARE_FOOT_M2 = 0.3048**2


@dataclasses.dataclass(frozen=True)
class AreaUnits:
    """The units areas and volumes are shown and exported in, for one site.

    Metric sites read m², ha and m³; sites whose heights are in feet (either
    foot) read ft², acres and acre-ft. :func:`area_units` picks them from the
    site's vertical unit, so every page, chart, table and export agrees.

    Attributes
    ----------
    small_area, large_area, volume : str
        Symbols as people read them (``m²``, ``ha``, ``m³`` or ``ft²``,
        ``acres``, ``acre-ft``).
    small_area_m2, large_area_m2, volume_m3 : float
        Size of one of each unit in m² or m³.
    small_area_key, large_area_key, volume_key : str
        Suffixes of column and JSON key names (``m2``, ``ha``, ``m3`` or
        ``ft2``, ``acres``, ``acre_ft``).
    """

    small_area: str
    small_area_m2: float
    small_area_key: str
    large_area: str
    large_area_m2: float
    large_area_key: str
    volume: str
    volume_m3: float
    volume_key: str

    @property
    def is_metric(self) -> bool:
        return self.volume_key == "m3"

    def small(self, m2):
        """An area (m², scalar or array) in the small area unit (m² or ft²)."""
        return _scaled(m2, self.small_area_m2)

    def large(self, m2):
        """An area (m², scalar or array) in the large area unit (ha or acres)."""
        return _scaled(m2, self.large_area_m2)

    def vol(self, m3):
        """A volume (m³, scalar or array) in the volume unit (m³ or acre-ft)."""
        return _scaled(m3, self.volume_m3)

    def as_dict(self) -> dict:
        """The units as the browser pages receive them (symbols, keys and sizes)."""
        return dataclasses.asdict(self)


def _scaled(value, size: float):
    if value is None:
        return None
    if isinstance(value, (int, float)):
        return float(value) / size
    return np.asarray(value, dtype=np.float64) / size


_METRIC_AREAS = AreaUnits("m²", 1.0, "m2", "ha", 1e4, "ha", "m³", 1.0, "m3")
# Feet sites: international square feet, acres and acre-feet whichever foot the
# heights are in (the US survey foot is 2 ppm longer, so its acre differs by 4 ppm).
_FEET_AREAS = AreaUnits("ft²", SQUARE_FOOT_M2, "ft2", "acres", ACRE_M2, "acres",
                        "acre-ft", ACRE_FOOT_M3, "acre_ft")


def area_units(unit: VerticalUnit | str) -> AreaUnits:
    """The area and volume units of a site whose heights are in ``unit``.

    Examples
    --------
    >>> area_units("m").large_area, area_units("us-ft").large_area
    ('ha', 'acres')
    >>> round(area_units("ft").large(4046.8564224), 6)
    1.0
    """
    return _FEET_AREAS if VerticalUnit.parse(unit).is_feet else _METRIC_AREAS


def own_unit_columns(unit: VerticalUnit | str, *, area_m2=None, volume_m3=None,
                     area_name: str = "area", volume_name: str = "volume") -> dict:
    """Columns (or properties) in a feet site's own area and volume units.

    Tables and files keep their SI columns (``area_m2``, ``area_ha``,
    ``volume_m3``) on every site, so files of different sites compare; a site
    whose heights are in feet gets these beside them, each unit in its name:
    ``{area_name}_ft2``, ``{area_name}_acres`` and ``{volume_name}_acre_ft``.
    Metric sites get none (their own units are the SI ones).

    Examples
    --------
    >>> own_unit_columns("m", area_m2=[1e4])
    {}
    >>> cols = own_unit_columns("ft", area_m2=4046.8564224, volume_m3=ACRE_FOOT_M3)
    >>> [(k, round(float(v), 3)) for k, v in cols.items()]
    [('area_ft2', 43560.0), ('area_acres', 1.0), ('volume_acre_ft', 1.0)]
    """
    units = area_units(unit)
    if units.is_metric:
        return {}
    out: dict = {}
    if area_m2 is not None:
        out[f"{area_name}_{units.small_area_key}"] = units.small(area_m2)
        out[f"{area_name}_{units.large_area_key}"] = units.large(area_m2)
    if volume_m3 is not None:
        out[f"{volume_name}_{units.volume_key}"] = units.vol(volume_m3)
    return out
