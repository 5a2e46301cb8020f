"""Opening a user's raster file safely: local, self-contained files only, nothing fetched.

GDAL reads far more than plain files: virtual file systems, URLs, formats whose
headers name other files or web services. A DEM upload could use any of these to
make the server read or fetch something else, so every raster Sillmark opens goes
through :func:`open_local_raster`, which refuses such paths and drivers with a
clear message, and :func:`forbid_remote_access` turns GDAL's network access off.
"""

from __future__ import annotations

import contextlib
import dataclasses
import functools
import math
import os
import re
import warnings
from collections.abc import Iterator
from typing import Any

import pyproj
import rasterio
import rasterio.windows
from affine import Affine
from rasterio._err import CPLE_BaseError
from rasterio.env import set_gdal_config
from rasterio.errors import NotGeoreferencedWarning, RasterioError
from rasterio.io import DatasetReader

from sillmark.errors import (
    InvalidDEM,
    SillmarkError,
)

# GDAL drivers whose files describe data held elsewhere (other files, web
# services). Sillmark only reads self-contained local rasters, so these are never
# offered to GDAL when opening a user's file.
_REFUSED_DRIVERS = frozenset(
    {
        "VRT", "GTI", "DERIVED", "WMS", "WMTS", "WCS", "HTTP", "KMLSUPEROVERLAY",
        "PLMOSAIC", "MRF", "EEDA", "EEDAI", "DAAS", "STACTA", "STACIT", "OGCAPI",
        "NGW", "GDALG",
        # Labels and headers that name their data file(s) inside them: a label
        # could name any file the server can read.
        "PDS", "PDS4", "ISIS2", "ISIS3", "VICAR", "ERS", "FAST", "EIR", "NDF", "MFF",
        "MFF2", "GenBin", "ISCE", "ROI_PAC", "CEOS", "SAR_CEOS", "ECRGTOC", "RPFTOC",
        "SAFE", "SENTINEL2", "RS2", "RCM", "TSX", "COASP", "CPG", "DIMAP", "ILWIS",
        "TIL", "RRASTER", "SDTS", "ESRIC", "Zarr", "AIG",
        # Containers that may link to other files (HDF5 external links) or run
        # queries stored in the file (SQLite-based formats).
        "HDF5", "HDF5Image", "HDF4", "HDF4Image", "BAG", "S102", "S104", "S111",
        "netCDF", "KEA", "GPKG", "MBTiles", "Rasterlite", "SQLite", "PDF",
        "GNMFile", "GNMDatabase", "OSM",
    }
)


_REFUSED_DRIVERS_UPPER = frozenset(n.upper() for n in _REFUSED_DRIVERS)


#: GDAL settings for every raster Sillmark opens: GDAL's network file systems
#: (/vsicurl/, /vsis3/, /vsigs/, /vsiaz/, ... and plain http:// paths) accept
#: only files with these extensions, and no real file has it, so they fetch
#: nothing; no retries either. :func:`forbid_remote_access` sets the same for a
#: whole process (the web server) and its children.
NO_REMOTE_ACCESS = {
    "CPL_VSIL_CURL_ALLOWED_EXTENSIONS": ".sillmark-remote-access-is-off",
    "GDAL_HTTP_MAX_RETRY": "0",
    "GDAL_HTTP_TIMEOUT": "1",
}


#: Path forms GDAL reads as something other than a local file: its virtual file
#: systems (/vsizip/, /vsicurl/, /vsis3/, ... also with a backslash), URLs, and
#: driver prefixes such as ``zip:``, ``HDF5:``, ``GTIFF_DIR:`` or ``WMTS:``.
_GDAL_SPECIAL_PATH = re.compile(r"^\s*(?:[/\\]vsi|[a-z][a-z0-9_+.-]+:)", re.IGNORECASE)


_REFERENCE_MARKERS = (
    (b"<VRTDataset", "a GDAL virtual raster (VRT)"),
    (b"<GDALTileIndexDataset", "a GDAL tile index"),
    (b"<GDAL_WMS", "a web map service description"),
    (b"<GDAL_WMTS", "a web map tile service description"),
    (b"<WCS_GDAL", "a web coverage service description"),
    (b"<MRF_META", "a meta raster (MRF) description"),
)


_ACCEPTED = "a GeoTIFF (.tif) or another single-band raster file that GDAL reads"


def gdal_path_refusal(text: str, what: str = "the file") -> str | None:
    """Why ``text`` must not be given to GDAL as a path, or None for a plain local path.

    Refused: GDAL virtual and remote file systems (``/vsicurl/``, ``/vsizip/``,
    ``/vsis3/``, ...), anything with a scheme or driver prefix (``http://``,
    ``zip://``, ``HDF5:...``), and NUL bytes (C strings end there, so GDAL
    would open a different path than the one checked).
    """
    if "\0" in text:
        return f"{what} path contains a NUL byte; give the path of a local file"
    if "://" in text or _GDAL_SPECIAL_PATH.match(text):
        shown = text if len(text) <= 80 else text[:77] + "..."
        return (f"{what} path {shown!r} is a GDAL virtual or remote path; give the path of a "
                "local file (upload or download it first)")
    return None


#: CRS names a GeoJSON ``crs`` member may give: an authority code (``EPSG:32633``,
#: ``OGC:CRS84``) or its OGC URN (``urn:ogc:def:crs:EPSG::32633``).
_CRS_NAME = re.compile(r"^(?:urn:ogc:def:crs:[A-Za-z0-9_.-]+:[A-Za-z0-9_.-]*:[A-Za-z0-9_.-]+"
                       r"|[A-Za-z][A-Za-z0-9_.-]*:{1,2}[A-Za-z0-9_.-]+)$")


def crs_name_refusal(obj: Any, label: str) -> str | None:
    """Why the ``crs`` member of GeoJSON ``obj`` is refused, or None.

    Only authority names are taken: a PROJ string or WKT from a file could name
    grid or init files (``+nadgrids=...``, ``+init=...``) that PROJ would look for
    on the server.
    """
    member = obj.get("crs") if isinstance(obj, dict) else None
    if not isinstance(member, dict):
        return None
    props = member.get("properties")
    name = props.get("name") if isinstance(props, dict) else None
    if not isinstance(name, str) or _CRS_NAME.match(name.strip()):
        return None
    shown = name if len(name) <= 60 else name[:57] + "..."
    return (f"{label} names its CRS as {shown!r}; give an authority name such as "
            "'EPSG:32633' or 'urn:ogc:def:crs:EPSG::32633'")


def forbid_remote_access() -> None:
    """Turn GDAL's network file systems off for this process and the processes it starts.

    Sets :data:`NO_REMOTE_ACCESS` as GDAL configuration and in the environment
    (worker processes inherit it), and keeps PROJ from fetching grids.
    """

    for key, value in NO_REMOTE_ACCESS.items():
        os.environ[key] = value
        set_gdal_config(key, value)
    os.environ["PROJ_NETWORK"] = "OFF"
    try:
        pyproj.network.set_network_enabled(False)
    except AttributeError:  # pragma: no cover - pyproj without the network module
        pass


def local_file(path: Any, error: type[SillmarkError], what: str) -> str:
    """Check that ``path`` names an existing, non-empty regular local file."""
    try:
        text = os.fspath(path)
    except TypeError:
        raise error(f"{what} must be a file path, got {type(path).__name__}") from None
    if isinstance(text, bytes):
        text = os.fsdecode(text)
    refusal = gdal_path_refusal(text, what)
    if refusal is not None:
        raise error(refusal)
    name = os.path.basename(text)
    if not os.path.exists(text):
        raise error(f"{what} '{name}' does not exist; check the path")
    if not os.path.isfile(text):
        raise error(f"{what} '{name}' is not a regular file (a folder?); give the file itself")
    if os.path.getsize(text) == 0:
        raise error(f"{what} '{name}' is empty (0 bytes); give {_ACCEPTED}")
    return text


@functools.lru_cache(maxsize=1)
def _allowed_drivers() -> tuple[str, ...]:
    with rasterio.Env() as env:
        names = env.drivers()
    return tuple(sorted(n for n in names if n.upper() not in _REFUSED_DRIVERS_UPPER))


@contextlib.contextmanager
def open_local_raster(
    path: str, error: type[SillmarkError] = InvalidDEM, what: str = "the raster"
) -> Iterator[DatasetReader]:
    """Open a checked local raster with GDAL, refusing drivers that fetch other data.

    Any rasterio/GDAL error raised while opening becomes ``error`` with GDAL's
    reason in the message. ``path`` must already have passed :func:`local_file`.
    """
    name = os.path.basename(path)
    if path.lower().endswith(".vrt"):
        raise error(
            f"{what} '{name}' is a GDAL virtual raster (VRT), which can point to other or "
            f"remote files; convert it to a GeoTIFF first (gdal_translate in.vrt out.tif)"
        )
    refusal = gdal_path_refusal(path, what)
    if refusal is not None:
        raise error(refusal)
    # Report a vertical CRS stored in GeoTIFF keys as part of a compound CRS; no network.
    env = rasterio.Env(GTIFF_REPORT_COMPD_CS="YES", **NO_REMOTE_ACCESS)
    with env:
        try:
            with warnings.catch_warnings():
                # A file without geotransform is reported by our own checks.
                warnings.simplefilter("ignore", NotGeoreferencedWarning)
                src = DatasetReader(path, driver=list(_allowed_drivers()))
        # UnicodeDecodeError: rasterio decodes GeoTIFF CRS citation keys as UTF-8.
        except (RasterioError, CPLE_BaseError, OSError, UnicodeDecodeError) as exc:
            kind = _reference_kind(path)
            if kind:
                raise error(
                    f"{what} '{name}' is {kind}, which points to other or remote data; "
                    "give a self-contained raster file such as a GeoTIFF"
                ) from None
            raise error(
                f"{what} '{name}' is not a raster Sillmark can read ({gdal_reason(exc, path)}); "
                f"give {_ACCEPTED}"
            ) from None
        try:
            check_own_files(src, path, error, what)
            yield src
        finally:
            src.close()


def check_own_files(src: DatasetReader, path: str, error: type[SillmarkError], what: str) -> None:
    """Refuse a raster whose driver reads files other than ``path`` and its own sidecars.

    A sidecar shares the file's name and folder (``site.tif.aux.xml``, ``site.tfw``);
    anything else (a header naming ``../other/file``) could be any file on the machine.
    """
    try:
        files = list(src.files)
    except (RasterioError, CPLE_BaseError, OSError):  # pragma: no cover - GDAL lists no files
        files = [path]
    own = os.path.realpath(path)
    folder = os.path.dirname(own)
    stem = os.path.splitext(os.path.basename(own))[0]
    for f in files:
        real = os.path.realpath(f)
        if real == own:
            continue
        if os.path.dirname(real) == folder and os.path.basename(real).startswith(stem + "."):
            continue
        raise error(
            f"{what} '{os.path.basename(path)}' is read together with other files it names "
            f"({src.driver} format); give a self-contained raster file such as a GeoTIFF"
        )


def _reference_kind(path: str) -> str | None:
    try:
        with open(path, "rb") as fh:
            head = fh.read(4096).lstrip()
    except OSError:
        return None
    for marker, kind in _REFERENCE_MARKERS:
        if head.startswith(marker) or marker in head[:1024]:
            return kind
    return None


def gdal_reason(exc: BaseException, path: str) -> str:
    """The most specific message in an exception chain, without the full path."""
    messages = []
    seen: set[int] = set()
    cur: BaseException | None = exc
    while cur is not None and id(cur) not in seen:
        seen.add(id(cur))
        text = str(cur).strip()
        if text and "see previous exception" not in text.lower():
            messages.append(text)
        cur = cur.__cause__ or cur.__context__
    reason = messages[-1] if messages else type(exc).__name__
    reason = reason.replace(path, os.path.basename(path)).rstrip(".")
    return reason[:300]


def file_transform(src: DatasetReader, name: str) -> Affine:
    t = src.transform
    if t == Affine.identity():
        if src.gcps[0] or src.rpcs:
            raise InvalidDEM(
                f"'{name}' is georeferenced only by control points or RPCs, not by a grid "
                "transform; warp it onto a north-up grid first (e.g. gdalwarp)"
            )
        raise InvalidDEM(
            f"'{name}' has no geotransform (no cell size or origin); give a georeferenced "
            "raster such as a GeoTIFF with its transform"
        )
    check_north_up(t, f"'{name}'")
    return t


def check_north_up(t: Affine, label: str) -> None:
    values = (t.a, t.b, t.c, t.d, t.e, t.f)
    if not all(math.isfinite(v) for v in values):
        raise InvalidDEM(f"{label} has a transform with non-finite values {values}; give a valid grid")
    if t.b != 0.0 or t.d != 0.0:
        raise InvalidDEM(
            f"{label} has a rotated or sheared grid (transform terms b={t.b:g}, d={t.d:g}); "
            "Sillmark needs a north-up grid: warp it first (e.g. gdalwarp)"
        )
    if not (t.a > 0.0 and t.e < 0.0):
        raise InvalidDEM(
            f"{label} is not north-up (cell width {t.a:g}, cell height {t.e:g}; needs a "
            "positive width and a negative height): warp it first (e.g. gdalwarp)"
        )




@dataclasses.dataclass(frozen=True)
class RasterOutline:
    """What a person must choose before a raster file can be read as a DEM.

    Attributes
    ----------
    bands : int
        Number of bands in the file (a DEM needs one chosen when more than 1).
    has_crs : bool
        Whether the file states its CRS (without one, a CRS must be given).
    band_names : tuple of str
        The bands' own descriptions ('' where the file gives none).
    """

    bands: int
    has_crs: bool
    band_names: tuple[str, ...]


def raster_outline(path: str | os.PathLike[str]) -> RasterOutline:
    """Band count and CRS presence of a local raster file, read from its header.

    Raises
    ------
    InvalidDEM
        As :func:`read_dem` for files that are not local, self-contained rasters.
    """
    path = local_file(path, InvalidDEM, "the DEM")
    with open_local_raster(path, InvalidDEM, "the DEM") as src:
        names = tuple("".join(ch for ch in (d or "") if ch.isprintable())[:60]
                      for d in src.descriptions)
        return RasterOutline(bands=int(src.count), has_crs=bool(src.crs), band_names=names)
