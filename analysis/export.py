"""Result files of the spill engine: GeoTIFF rasters, a CSV table, GeoJSON and a summary.

:func:`write_results` writes everything a site run produces into one folder:

==========================  ==========================================================
``onset_stage.tif``         float32, the onset stage in the site's vertical unit
``fill_depth.tif``          float32, onset stage minus elevation (0 outside depressions)
``depression_id.tif``       int32, depression of each cell (0 = in no depression)
``flood_tree.tif``          uint8, flood-tree codes (see :mod:`analysis.flood`)
``depressions.csv``         one row per depression, units in the column names
``depressions.geojson``     one (Multi)Polygon per depression, WGS84 lon/lat
``spill_points.geojson``    one Point per depression at its spill cell centre, WGS84
``depression_hierarchy.*``  the nested depressions, ``.csv`` and ``.json`` (see
                            :mod:`analysis.hierarchy_export`)
``depression_curves.csv``   stage–area and stage–storage of every hierarchy node
``summary.json``            grid, outlets, totals, version, time and the list of files
==========================  ==========================================================

Nodata: the float rasters use NaN (the IEEE value, declared as the GeoTIFF nodata)
on DEM nodata and on cells no outlet reaches. ``depression_id.tif`` uses -1 there,
so that 0 keeps its meaning "valid cell in no depression". ``flood_tree.tif`` uses
0, which is already the code for "no parent" (nodata or unreached).

Every file carries :data:`analysis.SCREENING_CAUTION`: as GeoTIFF tags
(``SILLMARK_CAUTION``), as ``#`` comment lines of the CSV, as a property of every
GeoJSON feature and as a member of the summary.

Every file is written to a temporary name in the output folder and then renamed
over the final name with :func:`os.replace`, so a crash or a full disk never
leaves a half-written result under a result's name; an older complete file stays
in place until the new one is whole.
"""

from __future__ import annotations

import contextlib
import csv
import dataclasses
import datetime
import json
import math
import os
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pyproj
import rasterio
import rasterio.features
import rasterio.windows
import shapely
import shapely.geometry
from shapely.geometry.polygon import orient

from analysis import SCREENING_CAUTION
from analysis.errors import InvalidDEM, InvalidParameter
from analysis.units import ACRE_FOOT_M3, VerticalUnit

if TYPE_CHECKING:  # pragma: no cover
    from analysis.dem import DEM
    from analysis.flood import SpillResult
    from analysis.outlets import Outlets

__all__ = [
    "BLOCK_ROWS",
    "DEPRESSION_ID_NODATA",
    "FILE_NAMES",
    "FLOAT_NODATA",
    "FLOOD_TREE_NODATA",
    "TILE_SIZE",
    "atomic_output",
    "crs_label",
    "horizontal_unit_suffix",
    "depression_columns",
    "depression_polygons",
    "horizontal_crs",
    "json_number",
    "sillmark_version",
    "unit_name",
    "unit_suffix",
    "wgs84_geometry",
    "wgs84_transformer",
    "write_feature_collection",
    "write_geotiff",
    "write_depression_ids",
    "write_depressions_csv",
    "write_depressions_geojson",
    "write_fill_depth",
    "write_flood_tree",
    "write_onset_stage",
    "write_results",
    "write_spill_points_geojson",
    "write_summary",
    "write_table_csv",
    "RESULT_LAYERS",
    "table_columns",
    "write_depression_table_csv",
    "write_result_layer",
    "write_spill_points_table",
    "write_table_summary",
]

#: Nodata of the float32 rasters (onset stage, fill depth).
FLOAT_NODATA = float("nan")
#: Nodata of ``depression_id.tif``; 0 stays "valid cell in no depression".
DEPRESSION_ID_NODATA = -1
#: Nodata of ``flood_tree.tif``; equal to the flood-tree code "no parent".
FLOOD_TREE_NODATA = 0
#: Edge of the square GeoTIFF tiles, in cells.
TILE_SIZE = 256
#: Rows written per block: one row of tiles, so each block completes its tiles.
BLOCK_ROWS = TILE_SIZE
#: Decimal places kept in GeoJSON lon/lat: 1e-8 degree is about 1 mm on the ground,
#: well below the cell size of any site DEM, so outlines keep their areas.
COORDINATE_DECIMALS = 8

#: File names :func:`write_results` writes, in the order it writes them.
FILE_NAMES = (
    "onset_stage.tif",
    "fill_depth.tif",
    "depression_id.tif",
    "flood_tree.tif",
    "depressions.csv",
    "depressions.geojson",
    "spill_points.geojson",
    "depression_hierarchy.csv",
    "depression_hierarchy.json",
    "depression_curves.csv",
    "summary.json",
)

#: Called as ``progress(file_name, done, total)`` while a file is written; for a
#: raster ``done`` counts blocks of :data:`BLOCK_ROWS` rows, other files report 0/1, 1/1.
Progress = Callable[[str, int, int], None]

# Column-name suffixes and long names of the vertical units. The long names are
# the unit names of the EPSG registry as PROJ spells them (EPSG 9001, 9002, 9003).
_UNIT_SUFFIX = {VerticalUnit.METRE: "m", VerticalUnit.FOOT: "ft", VerticalUnit.US_SURVEY_FOOT: "us_ft"}
_UNIT_NAME = {
    VerticalUnit.METRE: "metre",
    VerticalUnit.FOOT: "foot",
    VerticalUnit.US_SURVEY_FOOT: "US survey foot",
}
_CRS_UNIT_SUFFIX = {
    "metre": "m",
    "meter": "m",
    "foot": "ft",
    "us survey foot": "us_ft",
    "degree": "deg",
}
_FLOOD_TREE_CODES = (
    "0 = nodata or not reached from any outlet; 1..8 = the cell was reached from its "
    "neighbour to the NW, N, NE, W, E, SW, S, SE; 9 = outlet"
)
_WGS84 = "EPSG:4326"


# --------------------------------------------------------------------------- helpers


@contextlib.contextmanager
def atomic_output(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it over ``path`` on success.

    The temporary file lives in the same folder, so the final :func:`os.replace`
    is a rename within one file system (atomic on POSIX and on Windows). The data
    are flushed to disk before the rename. On any exception the temporary file is
    removed and the existing ``path``, if any, is left untouched.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> target = pathlib.Path(tempfile.mkdtemp()) / "a.txt"
    >>> with atomic_output(target) as tmp:
    ...     _ = tmp.write_text("done")
    >>> target.read_text()
    'done'
    """
    final = Path(path)
    tmp = final.with_name(f".{final.name}.{uuid.uuid4().hex[:12]}.tmp")
    try:
        yield tmp
        _fsync(tmp)
        os.replace(tmp, final)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise
    _fsync_dir(final.parent)


def _fsync(path: Path) -> None:
    # Best effort: some platforms refuse fsync on a read-only descriptor.
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _fsync_dir(folder: Path) -> None:
    # Makes the rename itself durable on POSIX; not possible (nor needed) everywhere.
    with contextlib.suppress(OSError, AttributeError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def _version() -> str:
    try:
        from sillmark import __version__
    except ImportError:  # pragma: no cover - analysis used without the CLI package
        from importlib import metadata

        try:
            return metadata.version("sillmark")
        except metadata.PackageNotFoundError:
            return "unknown"
    return __version__


def _unit(dem: "DEM") -> VerticalUnit:
    return VerticalUnit.parse(dem.vertical_unit)


def _pyproj_crs(dem: "DEM") -> pyproj.CRS:
    """The DEM's horizontal CRS (a compound CRS's vertical part dropped)."""
    if dem.crs is None:
        raise InvalidDEM(
            "the DEM has no CRS, so its results cannot be placed on a map; "
            "give one (e.g. EPSG:32633)"
        )
    horizontal = getattr(dem, "horizontal_crs", None)
    if horizontal is not None:
        return horizontal
    crs = pyproj.CRS.from_user_input(dem.crs.to_wkt())
    return crs.to_2d() if crs.is_compound else crs


def _full_crs(dem: "DEM") -> pyproj.CRS:
    """The DEM's whole CRS, with its vertical part when it has one."""
    return pyproj.CRS.from_user_input(dem.crs.to_wkt())


def _crs_unit_name(crs: pyproj.CRS) -> str:
    axes = crs.axis_info
    return axes[0].unit_name if axes else "unknown"


def _crs_unit_suffix(crs: pyproj.CRS) -> str:
    name = _crs_unit_name(crs)
    return _CRS_UNIT_SUFFIX.get(name.lower(), "".join(ch if ch.isalnum() else "_" for ch in name.lower()))


def _crs_label(crs: pyproj.CRS) -> str:
    epsg = crs.to_epsg()
    return f"EPSG:{epsg} ({crs.name})" if epsg else f"{crs.name} (no EPSG code)"


def _to_wgs84(crs: pyproj.CRS):
    """To WGS 84 lon/lat (``always_xy``), longitudes in [-180, 180] (RFC 7946)."""
    from analysis.dem import LonLatTransformer

    return LonLatTransformer(crs)


def _short32(value) -> float | None:
    """A float32 as the shortest Python float that reads back as the same float32."""
    v = np.float32(value)
    if not np.isfinite(v):
        return None
    return float(np.format_float_positional(v, unique=True, trim="-"))


def _short64(value) -> float | None:
    v = float(value)
    return v if math.isfinite(v) else None


def _check_shapes(result: "SpillResult", dem: "DEM") -> None:
    shape = tuple(dem.elevation.shape)
    for name in ("onset_stage", "flood_tree", "depression_id"):
        got = tuple(getattr(result, name).shape)
        if got != shape:
            raise InvalidParameter(
                f"the result's {name} is {got[0]} x {got[1]} cells but the DEM is "
                f"{shape[0]} x {shape[1]}; export a result computed on this DEM"
            )


# --------------------------------------------------------------------------- rasters


#: TIFF predictor of every raster Sillmark writes: 2, horizontal differencing.
TIFF_PREDICTOR = 2


def _write_raster(
    path: str | os.PathLike,
    dem: "DEM",
    *,
    dtype: str,
    nodata: float,
    block: Callable[[int, int], np.ndarray],
    layer: str,
    description: str,
    band_unit: str,
    extra_tags: dict[str, str] | None = None,
    progress: Progress | None = None,
    zlevel: int | None = None,
    threads: str | int | None = None,
) -> Path:
    rows, cols = dem.shape
    final = Path(path)
    profile = {
        "driver": "GTiff",
        "width": cols,
        "height": rows,
        "count": 1,
        "dtype": dtype,
        "crs": dem.crs,
        "transform": dem.transform,
        "nodata": nodata,
        "tiled": True,
        "blockxsize": TILE_SIZE,
        "blockysize": TILE_SIZE,
        "compress": "deflate",
        # Horizontal differencing (TIFF predictor 2) for every type, floats
        # included: on Sillmark's benchmark terrain and demo site it gave files
        # 28-45 % smaller than the floating-point predictor (3) and wrote about a
        # third faster at DEFLATE level 1 (predictor 3 was 17 % smaller only on
        # the matplotlib Jacksboro sample). Lossless either way.
        "predictor": TIFF_PREDICTOR,
        "BIGTIFF": "IF_SAFER",
    }
    if zlevel is not None:
        profile["zlevel"] = int(zlevel)
    if threads is not None:
        # GDAL compresses blocks on several threads; the file is the same bytes.
        profile["num_threads"] = threads
    unit = _unit(dem)
    tags = {
        "SILLMARK_CAUTION": SCREENING_CAUTION,
        "SILLMARK_LAYER": layer,
        "SILLMARK_VERSION": _version(),
        "VERTICAL_UNIT": unit.value,
        "VERTICAL_UNIT_NAME": _UNIT_NAME[unit],
    }
    tags.update(extra_tags or {})
    n_blocks = max(1, -(-rows // BLOCK_ROWS))
    with atomic_output(final) as tmp:
        with rasterio.open(tmp, "w", **profile) as ds:
            ds.update_tags(**tags)
            ds.set_band_description(1, description)
            ds.set_band_unit(1, band_unit)
            for k in range(n_blocks):
                r0 = k * BLOCK_ROWS
                r1 = min(rows, r0 + BLOCK_ROWS)
                data = np.ascontiguousarray(block(r0, r1), dtype=dtype)
                ds.write(data, 1, window=rasterio.windows.Window(0, r0, cols, r1 - r0))
                if progress is not None:
                    progress(final.name, k + 1, n_blocks)
    return final


#: Layers :func:`write_result_layer` writes: the four rasters of a site run.
RESULT_LAYERS = ("onset_stage", "fill_depth", "depression_id", "flood_tree")
#: DEFLATE level of those four rasters: level 1 writes them about twice as fast
#: as GDAL's default (6) for files about 5 % larger, which matters on DEMs of
#: hundreds of millions of cells (measured on Sillmark's benchmark terrain).
RESULT_DEFLATE_LEVEL = 1
#: GDAL compresses the blocks of those rasters on all CPUs (same bytes as one thread).
RESULT_COMPRESS_THREADS = "ALL_CPUS"


def _layer_spec(layer: str, dem: "DEM", connectivity: int, depression_count: int | None) -> dict:
    """dtype, nodata, description, band unit and tags of one result raster."""
    unit = _unit(dem)
    tags = {"CONNECTIVITY": str(connectivity)}
    if layer == "onset_stage":
        return dict(dtype="float32", nodata=FLOAT_NODATA, layer=layer, band_unit=_UNIT_NAME[unit],
                    description=f"onset stage: outlet water level at which surface water first "
                    f"reaches the cell ({unit.symbol})", extra_tags=tags)
    if layer == "fill_depth":
        return dict(dtype="float32", nodata=FLOAT_NODATA, layer=layer, band_unit=_UNIT_NAME[unit],
                    description=f"fill depth: depth of water held in depressions when each is full "
                    f"to its spill elevation ({unit.symbol})", extra_tags=tags)
    if layer == "depression_id":
        if depression_count is None:
            raise InvalidParameter("the depression-id layer needs the number of depressions")
        tags["DEPRESSION_COUNT"] = str(int(depression_count))
        return dict(dtype="int32", nodata=DEPRESSION_ID_NODATA, layer=layer, band_unit="",
                    description="depression id: row id in depressions.csv; 0 = in no depression",
                    extra_tags=tags)
    if layer == "flood_tree":
        tags["FLOOD_TREE_CODES"] = _FLOOD_TREE_CODES
        return dict(dtype="uint8", nodata=FLOOD_TREE_NODATA, layer=layer, band_unit="",
                    description="flood tree: direction of the neighbour each cell was reached from",
                    extra_tags=tags)
    raise InvalidParameter(f"unknown result layer {layer!r}; use one of {', '.join(RESULT_LAYERS)}")


def write_result_layer(
    layer: str,
    dem: "DEM",
    path: str | os.PathLike,
    *,
    block: Callable[[int, int], np.ndarray],
    connectivity: int,
    depression_count: int | None = None,
    progress: Progress | None = None,
) -> Path:
    """Write one of :data:`RESULT_LAYERS` from blocks of rows, with its tags, atomically.

    ``block(r0, r1)`` returns rows ``r0:r1`` of the layer as it is stored (NaN,
    -1 or 0 on nodata); ``dem`` may be a :class:`~analysis.dem.DEM` or a
    :class:`~analysis.dem.DEMGrid`. ``depression_count`` is needed for
    ``depression_id`` (tag ``DEPRESSION_COUNT``). The files are those of
    :func:`write_onset_stage` and its siblings, whoever computed the blocks
    (DEFLATE level :data:`RESULT_DEFLATE_LEVEL`, compressed on
    :data:`RESULT_COMPRESS_THREADS` threads).
    """
    spec = _layer_spec(layer, dem, connectivity, depression_count)
    return _write_raster(path, dem, block=block, progress=progress, zlevel=RESULT_DEFLATE_LEVEL,
                         threads=RESULT_COMPRESS_THREADS, **spec)


def write_onset_stage(
    result: "SpillResult", dem: "DEM", path: str | os.PathLike, *, progress: Progress | None = None
) -> Path:
    """Write the onset stage as a float32 GeoTIFF (NaN nodata), block by block.

    Memory: one block of :data:`BLOCK_ROWS` rows (4 bytes per cell) beyond the result.
    """
    _check_shapes(result, dem)
    stage = result.onset_stage
    return write_result_layer("onset_stage", dem, path, block=lambda r0, r1: stage[r0:r1],
                              connectivity=result.connectivity, progress=progress)


def write_fill_depth(
    result: "SpillResult", dem: "DEM", path: str | os.PathLike, *, progress: Progress | None = None
) -> Path:
    """Write the fill depth (onset stage minus elevation) as a float32 GeoTIFF (NaN nodata).

    Computed block by block, so only :data:`BLOCK_ROWS` rows of it exist at a time.
    """
    _check_shapes(result, dem)
    stage, z = result.onset_stage, result.elevation

    def block(r0: int, r1: int) -> np.ndarray:
        return np.subtract(stage[r0:r1], z[r0:r1], dtype=np.float32)

    return write_result_layer("fill_depth", dem, path, block=block,
                              connectivity=result.connectivity, progress=progress)


def write_depression_ids(
    result: "SpillResult", dem: "DEM", path: str | os.PathLike, *, progress: Progress | None = None
) -> Path:
    """Write depression ids as an int32 GeoTIFF.

    1..n inside depression n (rows of ``depressions.csv``), 0 on valid cells in no
    depression, :data:`DEPRESSION_ID_NODATA` (-1, the declared nodata) on DEM
    nodata and on cells no outlet reaches.
    """
    _check_shapes(result, dem)
    ids, stage = result.depression_id, result.onset_stage

    def block(r0: int, r1: int) -> np.ndarray:
        out = ids[r0:r1].astype(np.int32, copy=True)
        out[np.isnan(stage[r0:r1])] = DEPRESSION_ID_NODATA
        return out

    return write_result_layer("depression_id", dem, path, block=block,
                              connectivity=result.connectivity,
                              depression_count=len(result.depressions), progress=progress)


def write_flood_tree(
    result: "SpillResult", dem: "DEM", path: str | os.PathLike, *, progress: Progress | None = None
) -> Path:
    """Write the flood tree as a uint8 GeoTIFF (codes in tag ``FLOOD_TREE_CODES``; nodata 0)."""
    _check_shapes(result, dem)
    tree = result.flood_tree
    return write_result_layer("flood_tree", dem, path, block=lambda r0, r1: tree[r0:r1],
                              connectivity=result.connectivity, progress=progress)


# --------------------------------------------------------------------------- table


def depression_columns(result: "SpillResult", dem: "DEM") -> dict[str, np.ndarray]:
    """The depression table with units in the column names, in file order.

    Every :class:`~analysis.flood.DepressionTable` column appears: elevations and
    depths get the vertical-unit suffix (``_m``, ``_ft``, ``_us_ft``), the spill
    point's CRS coordinates the CRS's unit (``spill_x_m`` ...), and
    ``volume_m2_vu`` is given converted to ``volume_m3``. Added: the spill point in
    WGS84 (``spill_lon_deg``, ``spill_lat_deg``), ``area_ha`` and, for sites in
    feet, ``volume_acre_ft``.

    Notes
    -----
    The acre-foot is 43 560 international cubic feet (:data:`analysis.units.ACRE_FOOT_M3`)
    for both kinds of feet; the survey-foot acre-foot is 4 parts per million larger.
    """
    return table_columns(result.depressions, dem)


def table_columns(table, dem: "DEM") -> dict[str, np.ndarray]:
    """:func:`depression_columns` of a :class:`~analysis.flood.DepressionTable` itself."""
    t = table
    unit = _unit(dem)
    v = _UNIT_SUFFIX[unit]
    crs = _pyproj_crs(dem)
    h = _crs_unit_suffix(crs)
    lon = np.full(len(t), np.nan)
    lat = np.full(len(t), np.nan)
    ok = np.isfinite(t.spill_x) & np.isfinite(t.spill_y)
    if ok.any():
        lon[ok], lat[ok] = _to_wgs84(crs).transform(t.spill_x[ok], t.spill_y[ok])
    volume_m3 = np.asarray(t.volume_m2_vu, dtype=np.float64) * unit.metres
    cols: dict[str, np.ndarray] = {
        "id": t.id,
        "pit_row": t.pit_row,
        "pit_col": t.pit_col,
        f"pit_elevation_{v}": t.pit_elevation,
        "spill_row": t.spill_row,
        "spill_col": t.spill_col,
        f"spill_x_{h}": t.spill_x,
        f"spill_y_{h}": t.spill_y,
        "spill_lon_deg": lon,
        "spill_lat_deg": lat,
        f"spill_elevation_{v}": t.spill_elevation,
        "spills_to": t.spills_to,
        f"max_depth_{v}": t.max_depth,
        "cell_count": t.cell_count,
        "area_m2": np.asarray(t.area_m2, dtype=np.float64),
        "area_ha": np.asarray(t.area_m2, dtype=np.float64) / 1e4,
        "volume_m3": volume_m3,
    }
    if unit.is_feet:
        cols["volume_acre_ft"] = volume_m3 / ACRE_FOOT_M3
    return cols


def _plain(array: np.ndarray, k: int) -> Any:
    """Element ``k`` as a JSON-ready Python value (None for NaN)."""
    kind = array.dtype.kind
    if kind in "iub":
        return int(array[k])
    if array.dtype == np.float32:
        return _short32(array[k])
    return _short64(array[k])


def _text(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return np.format_float_positional(value, unique=True, trim="-")
    return str(value)


def _float_texts(values: np.ndarray) -> list[str]:
    """``_text(_plain(values, k))`` for every k of a float32 or float64 array, fast.

    The per-value route (``format_float_positional`` on each number) costs about
    a microsecond a number, and tables of hundreds of thousands of depressions
    have millions. ``astype(str)`` prints the same shortest round-trip digits
    (numpy's Dragon4 in unique mode; Steele & White 1990) in one C loop, in
    positional or exponent form; here each text is only rewritten without an
    exponent and trimmed (``47.0`` -> ``47``), and inf and NaN become empty.
    """
    is32 = values.dtype == np.float32
    flat = np.asarray(values, dtype=np.float32 if is32 else np.float64).reshape(-1)
    # float64: Python's repr is the same shortest round-trip text (David Gay's
    # correctly rounded dtoa, same exponent thresholds), about 1.5x faster.
    texts = flat.astype(str).tolist() if is32 else list(map(repr, flat.tolist()))
    out = []
    append = out.append
    for t in texts:
        if "e" in t:
            append(_positional(t))
        elif t[-2:] == ".0":
            append(t[:-2])
        elif t[-1] in "fn":  # inf, -inf, nan
            append("")
        else:
            append(t)
    return out


def _positional(scientific: str) -> str:
    """'-4.76e+01' -> '-47.6': a text in exponent form written out without it, trimmed."""
    mant, exp = scientific.split("e")
    sign = "-" if mant.startswith("-") else ""
    digits = mant.lstrip("-").replace(".", "")
    point = int(exp) + 1  # digits before the decimal point
    if point <= 0:
        text = "0." + "0" * (-point) + digits
    elif point >= len(digits):
        text = digits + "0" * (point - len(digits))
    else:
        text = digits[:point] + "." + digits[point:]
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return sign + text


#: First characters that make a spreadsheet read a cell as a formula (OWASP, "CSV Injection").
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def spreadsheet_safe(text: str) -> str:
    """``text`` as a CSV text cell that no spreadsheet runs as a formula.

    A cell beginning with ``=``, ``+``, ``-``, ``@``, a tab or a carriage
    return gets a single quote in front, as OWASP's CSV-injection guidance
    advises; a reader sees the text with a leading quote, and a program gets
    the original back by removing it. Only text cells are passed through
    here: numbers (negative ones too) stay numbers.

    Examples
    --------
    >>> print(spreadsheet_safe("=SUM(A1:A3)"), spreadsheet_safe("-2+3"), spreadsheet_safe("Mill school"))
    '=SUM(A1:A3) '-2+3 Mill school
    """
    return "'" + text if text.startswith(FORMULA_STARTS) else text


def _column_texts(values: np.ndarray) -> list[str]:
    """Every entry of a table column as its CSV text (see :func:`write_table_csv`)."""
    values = np.asarray(values)
    kind = values.dtype.kind
    if kind in "USO":
        return [spreadsheet_safe(str(v)) for v in values.tolist()]
    if kind in "iu":
        return list(map(str, values.tolist()))
    if kind == "b":
        return [str(int(v)) for v in values.tolist()]
    return _float_texts(values)


def _records(columns: dict[str, np.ndarray]) -> Iterator[dict[str, Any]]:
    n = len(next(iter(columns.values())))
    for k in range(n):
        yield {name: _plain(values, k) for name, values in columns.items()}


def write_depressions_csv(result: "SpillResult", dem: "DEM", path: str | os.PathLike) -> Path:
    """Write ``depressions.csv``: ``# `` comment lines, a header, one row per depression.

    The comment lines hold the screening caution, the vertical unit, the CRS and the
    connectivity; read the file with e.g. ``csv.reader`` after skipping lines that
    start with ``#``. Empty fields are values that do not exist (a spill point with
    no coordinates). Row and column indices are 0-based, rows counted from the top.
    """
    return write_depression_table_csv(result.depressions, dem, path, connectivity=result.connectivity)


def write_depression_table_csv(table, dem: "DEM", path: str | os.PathLike, *, connectivity: int) -> Path:
    """:func:`write_depressions_csv` from a :class:`~analysis.flood.DepressionTable` itself."""
    columns = table_columns(table, dem)
    unit = _unit(dem)
    crs = _pyproj_crs(dem)
    final = Path(path)
    with atomic_output(final) as tmp:
        with open(tmp, "x", newline="", encoding="utf-8") as f:
            f.write(f"# Sillmark {_version()} depression table\n")
            f.write(f"# CAUTION: {SCREENING_CAUTION}\n")
            f.write(f"# vertical unit: {unit.value} ({_UNIT_NAME[unit]})\n")
            f.write(f"# CRS: {_crs_label(_full_crs(dem))}\n")
            if crs.is_geographic:
                f.write(f"# spill_x_{_crs_unit_suffix(crs)}, spill_y_{_crs_unit_suffix(crs)}: "
                        "longitude and latitude in the DEM's CRS\n")
            f.write("# spill_lon_deg, spill_lat_deg: the spill point in WGS84 degrees\n")
            f.write(f"# connectivity: {connectivity}\n")
            f.write("# pit_row, pit_col, spill_row, spill_col: 0-based cell indices, rows from the top\n")
            f.write("# spills_to: id of the depression the overflow reaches next; 0 = an outlet\n")
            writer = csv.writer(f, lineterminator="\n")
            writer.writerow(columns)
            writer.writerows(zip(*(_column_texts(a) for a in columns.values())))
    return final


# --------------------------------------------------------------------------- vectors


def depression_polygons(result: "SpillResult", dem: "DEM") -> list:
    """One shapely (Multi)Polygon per depression, in the DEM's CRS; index ``k`` is id ``k+1``.

    The whole id raster is vectorised once (:func:`rasterio.features.shapes`,
    4-connected, cell edges as outlines); a depression whose cells meet only at
    corners (possible with 8-connectivity) comes out as a MultiPolygon, the
    union of its pieces.

    Notes
    -----
    Memory: a boolean mask of the grid (1 byte per cell) plus the vertices of the
    outlines.
    """
    _check_shapes(result, dem)
    ids = np.ascontiguousarray(result.depression_id, dtype=np.int32)
    n = len(result.depressions)
    pieces: list[list] = [[] for _ in range(n)]
    if n:
        for geom, value in rasterio.features.shapes(
            ids, mask=ids > 0, connectivity=4, transform=dem.transform
        ):
            pieces[int(value) - 1].append(shapely.geometry.shape(geom))
    out = []
    for k, parts in enumerate(pieces):
        if not parts:
            raise InvalidParameter(f"depression {k + 1} has no cells in the id raster")
        # The pieces are distinct 4-connected regions of one value, so their
        # interiors are disjoint and they meet at most at corners: the
        # MultiPolygon of them is already their union (and valid).
        out.append(parts[0] if len(parts) == 1 else shapely.geometry.MultiPolygon(parts))
    return out


def _oriented(geom):
    """Exterior rings counterclockwise, holes clockwise (RFC 7946, section 3.1.6)."""
    if geom.geom_type == "Polygon":
        return orient(geom, sign=1.0)
    return shapely.geometry.MultiPolygon([orient(p, sign=1.0) for p in geom.geoms])


def _ring(ring) -> list:
    return np.round(np.asarray(ring.coords)[:, :2], COORDINATE_DECIMALS).tolist()


def _geojson_geometry(geom) -> dict:
    if geom.geom_type == "Polygon":
        return {"type": "Polygon", "coordinates": [_ring(geom.exterior)] + [_ring(r) for r in geom.interiors]}
    if geom.geom_type == "MultiPolygon":
        return {
            "type": "MultiPolygon",
            "coordinates": [
                [_ring(p.exterior)] + [_ring(r) for r in p.interiors] for p in geom.geoms
            ],
        }
    raise InvalidParameter(f"cannot write a {geom.geom_type} as a depression outline")


def _dumps(value: Any) -> str:
    # allow_nan=False: NaN is not JSON (RFC 8259, section 6); None stands for it.
    return json.dumps(value, ensure_ascii=False, allow_nan=False, separators=(",", ":"))


def _write_json(path: Path, payload: dict) -> Path:
    with atomic_output(path) as tmp:
        with open(tmp, "x", encoding="utf-8") as f:
            f.write(_dumps(payload))
            f.write("\n")
    return path


def _write_feature_collection(path: Path, members: dict, features: Iterator[dict]) -> Path:
    """Stream a FeatureCollection: one feature per line, never the whole text in memory."""
    with atomic_output(path) as tmp:
        with open(tmp, "x", encoding="utf-8") as f:
            head = _dumps({"type": "FeatureCollection", **members})
            f.write(head[:-1] + ',"features":[')
            for k, feature in enumerate(features):
                f.write(",\n" if k else "\n")
                f.write(_dumps(feature))
            f.write("\n]}\n")
    return path


def write_depressions_geojson(
    result: "SpillResult", dem: "DEM", path: str | os.PathLike, *, polygons: list | None = None
) -> Path:
    """Write ``depressions.geojson``: one Feature per depression, WGS84 lon/lat.

    Follows RFC 7946: no ``crs`` member (section 4), positions are longitude,
    latitude (section 3.1.1), exterior rings counterclockwise and holes clockwise
    (section 3.1.6); lon/lat rounded to :data:`COORDINATE_DECIMALS` places
    (section 11.2). Properties are the row of :func:`depression_columns` plus
    ``vertical_unit`` and ``caution``.

    Notes
    -----
    Outline vertices are reprojected one by one; the cell edges between them are
    not densified, which on a site-sized DEM moves an edge by far less than a cell.
    A site crossing the antimeridian is not split (section 3.1.9).
    """
    final = Path(path)
    unit = _unit(dem)
    crs = _pyproj_crs(dem)
    if polygons is None:
        polygons = depression_polygons(result, dem)
    transformer = _to_wgs84(crs)

    def to_lonlat(xy: np.ndarray) -> np.ndarray:
        x, y = transformer.transform(xy[:, 0], xy[:, 1])
        return np.column_stack([x, y])

    def features() -> Iterator[dict]:
        for record, geom in zip(_records(depression_columns(result, dem)), polygons):
            lonlat = _oriented(shapely.transform(geom, to_lonlat))
            properties = dict(record)
            properties["vertical_unit"] = unit.value
            properties["caution"] = SCREENING_CAUTION
            yield {
                "type": "Feature",
                "id": record["id"],
                "geometry": _geojson_geometry(lonlat),
                "properties": properties,
            }

    # "name", "caution" and "vertical_unit" are foreign members (RFC 7946, section 6.1).
    members = {"name": "depressions", "caution": SCREENING_CAUTION, "vertical_unit": unit.value}
    return _write_feature_collection(final, members, features())


def write_spill_points_geojson(result: "SpillResult", dem: "DEM", path: str | os.PathLike) -> Path:
    """Write ``spill_points.geojson``: a Point per depression at its spill cell centre.

    Properties: ``id``, ``spill_elevation`` (in ``unit``), ``unit``, ``spills_to``
    (0 = an outlet) and ``caution``. WGS84 lon/lat as in RFC 7946.
    """
    _check_shapes(result, dem)
    return write_spill_points_table(result.depressions, dem, path)


def write_spill_points_table(table, dem: "DEM", path: str | os.PathLike) -> Path:
    """:func:`write_spill_points_geojson` from a :class:`~analysis.flood.DepressionTable` itself."""
    final = Path(path)
    t = table
    unit = _unit(dem)
    crs = _pyproj_crs(dem)
    x = np.array(t.spill_x, dtype=np.float64)  # copies: the table stays as it is
    y = np.array(t.spill_y, dtype=np.float64)
    missing = ~(np.isfinite(x) & np.isfinite(y))
    if missing.any():
        # No coordinates from the engine: use the cell centres from the DEM's transform.
        tr = dem.transform
        cc = t.spill_col[missing] + 0.5
        rr = t.spill_row[missing] + 0.5
        x[missing] = tr.a * cc + tr.b * rr + tr.c
        y[missing] = tr.d * cc + tr.e * rr + tr.f
    lon, lat = _to_wgs84(crs).transform(x, y) if len(t) else (x, y)

    # Plain Python values up front: indexing numpy arrays value by value is slow.
    ids = np.asarray(t.id).tolist()
    to = np.asarray(t.spills_to).tolist()
    spill = [float(v) if v else None for v in _float_texts(np.asarray(t.spill_elevation, dtype=np.float32))]
    lons = np.asarray(lon, dtype=np.float64).tolist()
    lats = np.asarray(lat, dtype=np.float64).tolist()

    def features() -> Iterator[dict]:
        for k in range(len(t)):
            yield {
                "type": "Feature",
                "id": ids[k],
                "geometry": {
                    "type": "Point",
                    "coordinates": [
                        round(lons[k], COORDINATE_DECIMALS),
                        round(lats[k], COORDINATE_DECIMALS),
                    ],
                },
                "properties": {
                    "id": ids[k],
                    "spill_elevation": spill[k],
                    "unit": unit.value,
                    "spills_to": to[k],
                    "caution": SCREENING_CAUTION,
                },
            }

    members = {"name": "spill_points", "caution": SCREENING_CAUTION, "vertical_unit": unit.value}
    return _write_feature_collection(final, members, features())


# --------------------------------------------------------------------------- summary


def _summary(result: "SpillResult", dem: "DEM", outlets: "Outlets", files: list[str]) -> dict:
    return _summary_payload(
        result.depressions, dem, connectivity=result.connectivity,
        unreached_cells=result.unreached_cells,
        valid_cells=int(np.count_nonzero(~np.isnan(result.elevation))),
        outlet_sources=outlets.sources, outlet_count=outlets.count, files=files,
    )


def _summary_payload(table, dem: "DEM", *, connectivity: int, unreached_cells: int,
                     valid_cells: int, outlet_sources, outlet_count: int, files: list[str],
                     engine: dict | None = None) -> dict:
    t = table
    unit = _unit(dem)
    crs = _pyproj_crs(dem)
    full = _full_crs(dem)
    rows, cols = dem.shape
    tr = dem.transform
    area_m2 = float(np.sum(t.area_m2, dtype=np.float64))
    volume_m3 = float(np.sum(t.volume_m2_vu, dtype=np.float64)) * unit.metres
    if len(t):
        k = int(np.argmax(t.spill_elevation))
        highest = {
            "value": _short32(t.spill_elevation[k]),
            "unit": unit.value,
            "depression_id": int(t.id[k]),
        }
    else:
        highest = None
    depressions = {
        "count": len(t),
        "total_area_m2": area_m2,
        "total_area_ha": area_m2 / 1e4,
        "total_volume_m3": volume_m3,
        "highest_spill_elevation": highest,
    }
    if unit.is_feet:
        depressions["total_volume_acre_ft"] = volume_m3 / ACRE_FOOT_M3
    return {
        "sillmark_version": _version(),
        "created_utc": datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "caution": SCREENING_CAUTION,
        "dem": None if getattr(dem, "path", None) is None else str(dem.path),
        "grid": {
            "rows": rows,
            "cols": cols,
            "cell_size": {"x": abs(tr.a), "y": abs(tr.e), "unit": _crs_unit_name(crs)},
            "transform": [tr.a, tr.b, tr.c, tr.d, tr.e, tr.f],
            "crs": {"epsg": full.to_epsg(), "name": full.name, "wkt": full.to_wkt()},
            "horizontal_crs_epsg": crs.to_epsg(),
            "is_geographic": bool(crs.is_geographic),
            "vertical_unit": unit.value,
            "valid_cells": int(valid_cells),
        },
        "outlets": {"sources": list(outlet_sources), "cell_count": int(outlet_count)},
        "connectivity": int(connectivity),
        "depressions": depressions,
        "unreached_cells": int(unreached_cells),
        "nodata": {
            "onset_stage.tif": "NaN",
            "fill_depth.tif": "NaN",
            "depression_id.tif": DEPRESSION_ID_NODATA,
            "flood_tree.tif": FLOOD_TREE_NODATA,
        },
        "files": files,
        **({"engine": engine} if engine else {}),
    }


def write_table_summary(
    table, dem: "DEM", path: str | os.PathLike, *, connectivity: int, unreached_cells: int,
    valid_cells: int, outlet_sources, outlet_count: int, files: list[str] | None = None,
    engine: dict | None = None,
) -> Path:
    """:func:`write_summary` from a :class:`~analysis.flood.DepressionTable` and counts.

    For engines that never hold a :class:`~analysis.flood.SpillResult` (the tiled
    engine); ``engine`` is written as the member ``engine`` (how the run was made).
    """
    final = Path(path)
    names = list(files or [])
    if final.name not in names:
        names.append(final.name)
    return _write_json(final, _summary_payload(
        table, dem, connectivity=connectivity, unreached_cells=unreached_cells,
        valid_cells=valid_cells, outlet_sources=outlet_sources, outlet_count=outlet_count,
        files=names, engine=engine,
    ))


def write_summary(
    result: "SpillResult", dem: "DEM", outlets: "Outlets", path: str | os.PathLike,
    *, files: list[str] | None = None,
) -> Path:
    """Write ``summary.json``: grid, outlets, totals in SI, caution, version, time, files.

    ``files`` lists the names of the other files of the run; the summary adds its own.
    """
    final = Path(path)
    names = list(files or [])
    if final.name not in names:
        names.append(final.name)
    return _write_json(final, _summary(result, dem, outlets, names))


@dataclasses.dataclass(frozen=True)
class RunSummary:
    """What a folder's ``summary.json`` says about the analysis that wrote it."""

    path: Path
    dem: str
    shape: tuple[int, int]
    transform: tuple[float, ...]
    vertical_unit: str
    crs: str
    connectivity: int
    outlet_sources: tuple[str, ...]
    outlet_cells: int

    def dem_file(self, *, instead: str = "give the DEM file") -> str:
        """The DEM's path, checked to exist; InvalidParameter if it cannot be found from here.

        ``instead`` ends the message with what the caller can do instead.
        """
        if not self.dem:
            raise InvalidParameter(f"{self.path} records no DEM file; {instead}")
        if not os.path.isfile(self.dem):
            raise InvalidParameter(
                f"the DEM recorded in {self.path} ({self.dem}) is not found from here; run "
                f"from the folder 'sillmark analyse' ran in, or {instead}"
            )
        return self.dem

    def same_grid(self, shape: tuple[int, int], transform) -> bool:
        """Whether a DEM's shape and affine transform are the analysed grid's."""
        tr = transform
        return (tuple(shape) == self.shape
                and (tr.a, tr.b, tr.c, tr.d, tr.e, tr.f) == self.transform)


def read_summary(folder: str | os.PathLike) -> RunSummary:
    """Read the ``summary.json`` that :func:`write_summary` (or the tiled engine) wrote.

    Raises InvalidParameter when the folder has none or it is not one Sillmark wrote.
    """
    path = Path(folder) / "summary.json"
    if not path.is_file():
        raise InvalidParameter(
            f"the folder {Path(folder)} holds no summary.json; give a DEM file or a folder "
            "written by 'sillmark analyse'"
        )
    try:
        summary = json.loads(path.read_text(encoding="utf-8"))
        grid = summary["grid"]
        epsg = grid["crs"]["epsg"]
        return RunSummary(
            path=path,
            dem=str(summary["dem"] or ""),
            shape=(int(grid["rows"]), int(grid["cols"])),
            transform=tuple(float(v) for v in grid["transform"]),
            vertical_unit=str(grid["vertical_unit"]),
            crs=f"EPSG:{int(epsg)}" if epsg is not None else str(grid["crs"]["wkt"]),
            connectivity=int(summary["connectivity"]),
            outlet_sources=tuple(str(v) for v in summary["outlets"]["sources"]),
            outlet_cells=int(summary["outlets"]["cell_count"]),
        )
    except (ValueError, KeyError, TypeError, UnicodeDecodeError, AttributeError):
        raise InvalidParameter(
            f"{path} is not a summary written by 'sillmark analyse'; run the analysis again, "
            "or give the DEM file"
        ) from None


# --------------------------------------------------------------------------- all


def write_results(
    result: "SpillResult",
    dem: "DEM",
    outlets: "Outlets",
    out_dir: str | os.PathLike,
    *,
    hierarchy=None,
    progress: Progress | None = None,
) -> list[Path]:
    """Write every result file of one site run into ``out_dir``; return their paths.

    The folder is created if missing. Files of the names in :data:`FILE_NAMES`
    are replaced; nothing else in the folder is touched. ``summary.json`` comes
    last, so its presence means the set is complete.

    Parameters
    ----------
    result : SpillResult
        From :func:`analysis.flood.analyse_site` on ``dem`` and ``outlets``.
    dem : DEM
    outlets : Outlets
    out_dir : path
    hierarchy : DepressionHierarchy, optional, keyword-only
        :func:`analysis.hierarchy.site_hierarchy` of ``dem`` and ``result``, if the
        caller has it already; computed here otherwise (a fraction of a second
        for a few million cells).
    progress : callable, optional, keyword-only
        ``progress(file_name, done, total)``, see :data:`Progress`.

    Returns
    -------
    list of Path
        In the order of :data:`FILE_NAMES`.

    Raises
    ------
    InvalidDEM
        If the DEM has no CRS.
    InvalidParameter
        If the result does not belong to the DEM, or ``out_dir`` is not a folder.
    OSError
        If the folder cannot be created or written.

    Notes
    -----
    Memory: one block of :data:`BLOCK_ROWS` rows per raster, a boolean mask of
    the grid while outlining depressions, and the outlines themselves; the
    depression hierarchy when it is computed here (see
    :func:`analysis.hierarchy.depression_hierarchy`).
    """
    from analysis import hierarchy_export  # imports this module: not at the top

    _check_shapes(result, dem)
    _pyproj_crs(dem)  # fail before writing anything if there is no CRS
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InvalidParameter(f"the output path {out} is a file; give a folder (new or existing)")
    out.mkdir(parents=True, exist_ok=True)

    def step(name: str, writer: Callable[[], Path]) -> Path:
        if progress is not None:
            progress(name, 0, 1)
        written = writer()
        if progress is not None:
            progress(name, 1, 1)
        return written

    paths = [
        write_onset_stage(result, dem, out / FILE_NAMES[0], progress=progress),
        write_fill_depth(result, dem, out / FILE_NAMES[1], progress=progress),
        write_depression_ids(result, dem, out / FILE_NAMES[2], progress=progress),
        write_flood_tree(result, dem, out / FILE_NAMES[3], progress=progress),
        step(FILE_NAMES[4], lambda: write_depressions_csv(result, dem, out / FILE_NAMES[4])),
        step(FILE_NAMES[5], lambda: write_depressions_geojson(result, dem, out / FILE_NAMES[5])),
        step(FILE_NAMES[6], lambda: write_spill_points_geojson(result, dem, out / FILE_NAMES[6])),
    ]
    if hierarchy is None:
        from analysis.hierarchy import site_hierarchy

        hierarchy = site_hierarchy(dem, result)
    writers = (
        hierarchy_export.write_hierarchy_csv,
        hierarchy_export.write_hierarchy_json,
        hierarchy_export.write_curves_csv,
    )
    for name, writer in zip(hierarchy_export.HIERARCHY_FILE_NAMES, writers):
        paths.append(step(name, lambda w=writer, n=name: w(hierarchy, dem, out / n)))
    summary_name = FILE_NAMES[-1]
    paths.append(
        step(
            summary_name,
            lambda: write_summary(result, dem, outlets, out / summary_name, files=[p.name for p in paths]),
        )
    )
    return paths


# --------------------------------------------------------------------------- shared with other writers
#
# Small public entry points to the conventions above, for modules that write
# further result files (water-level maps, stage tables): the same GeoTIFF
# profile and tags, the same CSV number format, the same GeoJSON geometry.


def sillmark_version() -> str:
    """Version string written into every result file."""
    return _version()


def unit_suffix(unit: VerticalUnit | str) -> str:
    """Column-name suffix of a vertical unit: ``m``, ``ft`` or ``us_ft``."""
    return _UNIT_SUFFIX[VerticalUnit.parse(unit)]


def unit_name(unit: VerticalUnit | str) -> str:
    """Long name of a vertical unit as written in GeoTIFF band units and CSV comments."""
    return _UNIT_NAME[VerticalUnit.parse(unit)]


def horizontal_crs(dem: "DEM") -> pyproj.CRS:
    """The DEM's horizontal CRS; :class:`~analysis.errors.InvalidDEM` if it has none."""
    return _pyproj_crs(dem)


def horizontal_unit_suffix(dem: "DEM") -> str:
    """Column-name suffix of the DEM's horizontal CRS unit, e.g. ``m`` or ``ft``."""
    return _crs_unit_suffix(dem.horizontal_crs)


def crs_label(dem: "DEM") -> str:
    """The DEM's whole CRS as written in CSV comments, e.g. ``EPSG:32633 (WGS 84 / UTM zone 33N)``."""
    return _crs_label(_full_crs(dem))


def write_geotiff(
    path: str | os.PathLike,
    dem: "DEM",
    *,
    dtype: str,
    nodata: float,
    block: Callable[[int, int], np.ndarray],
    layer: str,
    description: str,
    band_unit: str,
    extra_tags: dict[str, str] | None = None,
    progress: Progress | None = None,
) -> Path:
    """Write one band on the DEM's grid with the conventions of this module, atomically.

    ``block(r0, r1)`` returns rows ``r0:r1`` of the band; it is called once per
    block of :data:`BLOCK_ROWS` rows. The file is tiled (:data:`TILE_SIZE`),
    DEFLATE-compressed (predictor :data:`TIFF_PREDICTOR`), keeps the DEM's
    CRS and transform and carries the tags ``SILLMARK_CAUTION``,
    ``SILLMARK_LAYER`` (``layer``), ``SILLMARK_VERSION``, ``VERTICAL_UNIT`` and
    ``VERTICAL_UNIT_NAME``, plus ``extra_tags``.
    """
    return _write_raster(
        path, dem, dtype=dtype, nodata=nodata, block=block, layer=layer,
        description=description, band_unit=band_unit, extra_tags=extra_tags, progress=progress,
    )


def json_number(value) -> float | int | None:
    """A JSON-ready number: float32 as its shortest exact decimal, NaN/inf as None."""
    if isinstance(value, (bool, np.bool_)):
        raise InvalidParameter("a boolean is not a number")
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, np.float32):
        return _short32(value)
    return _short64(value)


def write_table_csv(path: str | os.PathLike, comments: list[str], columns: dict[str, np.ndarray]) -> Path:
    """Write a CSV table atomically: ``# `` comment lines, a header, one row per entry.

    ``comments`` are written after ``# ``, in order, before the header; put the
    screening caution among them. ``columns`` maps each header to a numpy array
    (all of one length); numbers are written as in ``depressions.csv`` (the
    shortest text that reads back as the same float32 or float64, empty for
    NaN), string columns as they are.
    """
    final = Path(path)
    arrays = {name: np.asarray(values) for name, values in columns.items()}
    lengths = {len(a) for a in arrays.values()}
    if len(lengths) > 1:
        raise InvalidParameter(f"the columns of {final.name} differ in length: {sorted(lengths)}")
    with atomic_output(final) as tmp:
        with open(tmp, "x", newline="", encoding="utf-8") as f:
            for line in comments:
                f.write(f"# {line}\n")
            writer = csv.writer(f, lineterminator="\n")
            writer.writerow(arrays)
            if arrays and lengths.pop():
                writer.writerows(zip(*(_column_texts(a) for a in arrays.values())))
    return final


def wgs84_geometry(geom, dem: "DEM", *, transformer: pyproj.Transformer | None = None) -> dict:
    """A shapely (Multi)Polygon in the DEM's CRS as an RFC 7946 GeoJSON geometry.

    Reprojected vertex by vertex to WGS84 lon/lat, exterior rings counterclockwise
    and holes clockwise, positions rounded to :data:`COORDINATE_DECIMALS` places,
    as in ``depressions.geojson``. Pass ``transformer`` (from the DEM's CRS to
    WGS84, ``always_xy=True``) to reuse one across many geometries.
    """
    if transformer is None:
        transformer = _to_wgs84(_pyproj_crs(dem))

    def to_lonlat(xy: np.ndarray) -> np.ndarray:
        x, y = transformer.transform(xy[:, 0], xy[:, 1])
        return np.column_stack([x, y])

    return _geojson_geometry(_oriented(shapely.transform(geom, to_lonlat)))


def wgs84_transformer(dem: "DEM") -> pyproj.Transformer:
    """Transformer from the DEM's horizontal CRS to WGS84 lon/lat (``always_xy``)."""
    return _to_wgs84(_pyproj_crs(dem))


def write_feature_collection(path: str | os.PathLike, members: dict, features) -> Path:
    """Write a GeoJSON FeatureCollection atomically, one feature per line.

    ``members`` are extra top-level members (RFC 7946 section 6.1 foreign members,
    e.g. ``name`` and ``caution``); ``features`` is an iterable of Feature dicts,
    consumed once. NaN is refused (write None).
    """
    return _write_feature_collection(Path(path), members, iter(features))
