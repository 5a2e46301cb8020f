"""Elevation values: float32 as the engine computes, nodata as NaN, and the checks that
refuse values no survey holds (fill codes, wrong scales, integers float32 cannot keep).
"""

from __future__ import annotations

import math

import numpy as np

from sillmark.errors import (
    InvalidDEM,
)

# Integers up to 2**24 in magnitude are exact in float32 (24-bit significand).
_FLOAT32_EXACT_INT = 2**24


_FLOAT32_MAX = float(np.finfo(np.float32).max)


#: Largest elevation magnitude :func:`read_dem` accepts, in the DEM's vertical unit
#: (metres or feet): the Earth's surface spans about -11 000 m to +8 850 m
#: (-36 100 ft to +29 000 ft), so a value beyond 10**8 is a fill code or a wrong
#: scale (integers up to 2**24, kept exactly, stay below it).
MAX_ABS_ELEVATION = 100_000_000.0


def nodata_as_json(value: float | None) -> float | str | None:
    """A declared nodata value as JSON may hold it.

    A finite value stays a number; NaN and the infinities, which JSON has no
    number for (RFC 8259, section 6), become the strings ``"NaN"``,
    ``"Infinity"`` and ``"-Infinity"``; None stays None.

    Examples
    --------
    >>> nodata_as_json(-9999.0), nodata_as_json(float("nan")), nodata_as_json(float("-inf"))
    (-9999.0, 'NaN', '-Infinity')
    """
    if value is None:
        return None
    value = float(value)
    if math.isfinite(value):
        return value
    if math.isnan(value):
        return "NaN"
    return "Infinity" if value > 0 else "-Infinity"


def nodata_from_json(value: float | str | None) -> float | None:
    """The inverse of :func:`nodata_as_json`.

    Examples
    --------
    >>> nodata_from_json("-Infinity"), nodata_from_json(-9999.0), nodata_from_json(None)
    (-inf, -9999.0, None)
    """
    return None if value is None else float(value)


def to_float32_elevation(
    raw: np.ndarray,
    nodata: float | None,
    *,
    scale: float = 1.0,
    offset: float = 0.0,
    hidden: np.ndarray | None = None,
    owned: bool,
    label: str,
    allow_empty: bool = False,
) -> np.ndarray:
    """Missing values to NaN, integers to float32 exactly, -0.0 to +0.0.

    ``owned`` says the caller's array may be modified in place; ``allow_empty``
    accepts an array that is all nodata (a window of a larger grid).
    """
    invalid = nodata_mask(raw, nodata)
    if hidden is not None:
        invalid |= hidden
    if invalid.all() and not allow_empty:
        raise InvalidDEM(
            f"every cell of {label} is nodata; give a DEM with at least one elevation "
            "(check the declared nodata value)"
        )
    scaled = scale != 1.0 or offset != 0.0
    if raw.dtype.kind in "iu" and raw.dtype.itemsize > 2 and not scaled:
        _check_exact_in_float32(raw, invalid, label)
    if raw.dtype.kind == "f" and raw.dtype.itemsize > 4 and not scaled:
        _check_float32_range(raw, invalid, label)
    with np.errstate(over="ignore", invalid="ignore"):
        if scaled:
            z = (raw.astype(np.float64) * scale + offset).astype(np.float32)
            if not np.all(np.isfinite(z[~invalid])):
                raise InvalidDEM(
                    f"{label} gives values beyond the float32 range after its scale {scale:g} "
                    f"and offset {offset:g}; check the band's scale and offset"
                )
        elif raw.dtype == np.float32 and owned and raw.flags.c_contiguous and raw.flags.writeable:
            z = raw
        else:
            z = np.ascontiguousarray(raw, dtype=np.float32)
            if z is raw:
                z = raw.copy()
    z[invalid] = np.nan
    z[z == 0.0] = 0.0  # -0.0 == 0.0, so this also turns -0.0 into +0.0
    return z


def nodata_mask(raw: np.ndarray, nodata: float | None) -> np.ndarray:
    if raw.dtype.kind == "f":
        invalid = ~np.isfinite(raw)
    else:
        invalid = np.zeros(raw.shape, dtype=bool)
    if nodata is None:
        return invalid
    value = float(nodata)
    if math.isnan(value):
        return invalid
    if raw.dtype.kind in "iu":
        info = np.iinfo(raw.dtype)
        if value.is_integer() and info.min <= value <= info.max:
            invalid |= raw == raw.dtype.type(int(value))
    else:
        stored = float_nodata(raw.dtype, value)
        if stored is not None:
            invalid |= raw == stored
    return invalid


def float_nodata(dtype: np.dtype, nodata: float | None):
    """The declared ``nodata`` as a value of the float ``dtype`` that cells can hold, or
    None when no cell can equal it (none declared, NaN, or beyond the type's range).

    >>> bool(float_nodata(np.dtype("float32"), -3.4028235e+38) == np.finfo(np.float32).min)
    True
    >>> float_nodata(np.dtype("float32"), None), float_nodata(np.dtype("float32"), 1e300)
    (None, None)
    """
    if nodata is None:
        return None
    value = float(nodata)
    if math.isnan(value):
        return None
    top = float(np.finfo(dtype).max)
    if top < abs(value) <= top * (1.0 + 1e-7):
        # "-3.4028235e+38" written as text lands just past the float32 limit.
        value = math.copysign(top, value)
    if math.isinf(value) or abs(value) <= top:
        return np.dtype(dtype).type(value)
    return None


def check_plausible_heights(z: np.ndarray, label: str) -> None:
    """Refuse elevations no terrain has in any unit Sillmark knows (|z| > MAX_ABS_ELEVATION)."""
    with np.errstate(invalid="ignore"):
        lo, hi = float(np.nanmin(z)), float(np.nanmax(z))
    worst = lo if abs(lo) >= abs(hi) else hi
    if abs(worst) > MAX_ABS_ELEVATION:
        r, c = np.unravel_index(int(np.nanargmin(z) if worst == lo else np.nanargmax(z)), z.shape)
        raise InvalidDEM(
            f"{label} holds an elevation of {worst:g} (row {r}, col {c}), beyond "
            f"±{MAX_ABS_ELEVATION:,.0f} in metres or feet; no terrain is that high or deep: "
            "declare such values as nodata, or check the band's scale"
        )


def _check_exact_in_float32(raw: np.ndarray, invalid: np.ndarray, label: str) -> None:
    big = (raw > _FLOAT32_EXACT_INT) | (raw < -_FLOAT32_EXACT_INT)
    big &= ~invalid
    if big.any():
        r, c = np.unravel_index(np.flatnonzero(big)[0], raw.shape)
        raise InvalidDEM(
            f"{label} holds integer values float32 cannot represent exactly (e.g. "
            f"{int(raw[r, c])} at row {r}, col {c}; the limit is ±2**24 = ±{_FLOAT32_EXACT_INT:,}); "
            "declare such values as nodata, or rescale the heights (e.g. to metres)"
        )


def _check_float32_range(raw: np.ndarray, invalid: np.ndarray, label: str) -> None:
    big = np.abs(raw) > _FLOAT32_MAX
    big &= ~invalid
    if big.any():
        r, c = np.unravel_index(np.flatnonzero(big)[0], raw.shape)
        raise InvalidDEM(
            f"{label} holds values beyond the float32 range (e.g. {float(raw[r, c]):g} at row "
            f"{r}, col {c}); declare them as nodata"
        )
