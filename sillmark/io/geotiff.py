"""GeoTIFF rasters on a DEM's grid: one profile, one set of tags, written block by block.

Every raster is a Cloud-Optimized GeoTIFF (GDAL's COG driver): tiled
(:data:`TILE_SIZE`), with overviews, DEFLATE-compressed with TIFF predictor 2;
it keeps the DEM's CRS and transform and carries the screening caution, the
vertical unit and (where known) the vertical datum as tags. The cells are
written block by block into a tiled GeoTIFF beside the target, which GDAL's COG
driver then copies into the final layout (overviews, then the image, reading
the first file by blocks), so no raster is ever held whole in memory. Nodata: the float rasters use NaN on DEM
nodata and on cells no outlet reaches; ``depression_id.tif`` uses -1, so that 0
keeps its meaning "valid cell in no depression"; ``flood_tree.tif`` uses 0, the
code for "no parent".
"""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import rasterio
import rasterio.features
import rasterio.shutil
import rasterio.windows
from rasterio.enums import Resampling

from sillmark import SCREENING_CAUTION, __version__
from sillmark.errors import InvalidParameter
from sillmark.grid.dem import check_layers_on_grid
from sillmark.io.atomic import atomic_output
from sillmark.units import NO_DATUM, unit_name, unit_of

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.engine.flood import SpillResult
    from sillmark.grid.dem import DEM
    from sillmark.grid.dem_grid import DEMGrid


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


#: Called as ``progress(file_name, done, total)`` while a file is written; for a
#: raster ``done`` counts blocks of :data:`BLOCK_ROWS` rows, other files report 0/1, 1/1.
Progress = Callable[[str, int, int], None]


_FLOOD_TREE_CODES = (
    "0 = nodata or not reached from any outlet; 1..8 = the cell was reached from its "
    "neighbour to the NW, N, NE, W, E, SW, S, SE; 9 = outlet; 10 = a culvert end "
    "reached through its culvert from the culvert's other end"
)


def check_result_grid(result: "SpillResult", dem: "DEM") -> None:
    """The result's rasters lie on the DEM's grid, or :class:`InvalidParameter`."""
    check_layers_on_grid(dem, onset_stage=result.onset_stage, flood_tree=result.flood_tree,
                         depression_id=result.depression_id)


#: TIFF predictor of every raster Sillmark writes: 2, horizontal differencing.
TIFF_PREDICTOR = 2


#: How the overviews of a raster are computed: the mean of the cells for
#: measured values (floats: stages, depths), the nearest cell for codes and ids
#: (integers), whose average would be a code that means something else.
def overview_resampling(dtype: str) -> str:
    """GDAL resampling of the overviews of a band of ``dtype`` (see above)."""
    return "AVERAGE" if np.dtype(dtype).kind == "f" else "NEAREST"


def overview_factors(rows: int, cols: int) -> list[int]:
    """Reduction factors of a raster's overviews: halving until a level fits one tile.

    The levels GDAL's COG driver picks with ``OVERVIEWS=AUTO`` (sizes halved,
    rounded down, while either side exceeds :data:`TILE_SIZE`); none for a
    raster within one tile.

    >>> overview_factors(520, 600), overview_factors(256, 100)
    ([2, 4], [])
    """
    factors: list[int] = []
    while rows > TILE_SIZE or cols > TILE_SIZE:
        rows, cols = rows // 2, cols // 2
        factors.append(2 ** (len(factors) + 1))
    return factors


def _add_overviews(path: Path, dtype: str) -> None:
    """Build the overviews of an uncompressed tiled GeoTIFF in place (:func:`overview_factors`,
    :func:`overview_resampling`), for :func:`_to_cog` to copy as they are.

    GDAL's COG driver, asked to make them itself, took about twice as long on
    a 6000 x 6000 float raster as building them here on the plain file and
    copying them (bench/bench_tiled.py terrain, GDAL 3.10): the copy then
    only compresses.
    """
    with rasterio.open(path, "r+") as ds:
        factors = overview_factors(ds.height, ds.width)
        if factors:
            ds.build_overviews(factors, Resampling[overview_resampling(dtype).lower()])


def _to_cog(blocks_path: Path, target: Path, *, dtype: str, zlevel: int | None,
            threads: str | int | None) -> None:
    """Copy a tiled GeoTIFF into the Cloud-Optimized layout with GDAL's COG driver.

    GDAL keeps the tags, the band description and unit, CRS, transform and
    nodata; the overviews are built first on the plain file (:func:`_add_overviews`)
    and copied, and the directories are written ahead of the image data,
    overviews before full resolution.
    """
    _add_overviews(blocks_path, dtype)
    options = {
        "driver": "COG",
        "blocksize": TILE_SIZE,
        "compress": "DEFLATE",
        # Horizontal differencing (TIFF predictor 2) for every type, floats
        # included: on Sillmark's benchmark terrain and demo site it gave files
        # 28-45 % smaller than the floating-point predictor (3) and wrote about a
        # third faster at DEFLATE level 1 (predictor 3 was 17 % smaller only on
        # the matplotlib Jacksboro sample). Lossless either way. STANDARD is the
        # COG driver's word for predictor 2 (its YES would pick 3 for floats).
        "predictor": "STANDARD",
        "overviews": "FORCE_USE_EXISTING",
        "overview_resampling": overview_resampling(dtype),
        "BIGTIFF": "IF_SAFER",
    }
    if zlevel is not None:
        options["level"] = int(zlevel)
    if threads is not None:
        options["num_threads"] = threads
    rasterio.shutil.copy(str(blocks_path), str(target), **options)


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
    zlevel: int | None = None,
    threads: str | int | None = None,
) -> Path:
    """Write one band on the DEM's grid with the conventions of this module, atomically.

    ``block(r0, r1)`` returns rows ``r0:r1`` of the band; it is called once per
    block of :data:`BLOCK_ROWS` rows into a tiled block file beside the target,
    which :func:`_to_cog` copies into the final Cloud-Optimized GeoTIFF: tiled
    (:data:`TILE_SIZE`), with overviews (:func:`overview_resampling`),
    DEFLATE-compressed (predictor :data:`TIFF_PREDICTOR`; level ``zlevel``,
    on ``threads`` threads; the same bytes whatever the threads). It keeps the
    DEM's CRS and transform and carries the tags ``SILLMARK_CAUTION``,
    ``SILLMARK_LAYER`` (``layer``), ``SILLMARK_VERSION``, ``VERTICAL_UNIT`` and
    ``VERTICAL_UNIT_NAME``, plus ``extra_tags``.
    """
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
        # The block file is read once by the COG copy, so it is left uncompressed:
        # on 2000 x 2000 cells of benchmark terrain the whole write took 2.7 s
        # against 4.3 s with the block file at DEFLATE level 1
        # (bench/bench_cog.py). It costs the raster's raw size in temporary disk
        # space beside the target.
        "compress": "none",
        "BIGTIFF": "IF_SAFER",
    }
    unit = unit_of(dem)
    tags = {
        "SILLMARK_CAUTION": SCREENING_CAUTION,
        "SILLMARK_LAYER": layer,
        "SILLMARK_VERSION": __version__,
        "VERTICAL_UNIT": unit.value,
        "VERTICAL_UNIT_NAME": unit_name(unit),
    }
    tags.update(extra_tags or {})
    n_blocks = max(1, -(-rows // BLOCK_ROWS))
    with atomic_output(final) as tmp:
        blocks_path = tmp.with_name(tmp.name + ".blocks.tif")
        try:
            with rasterio.open(blocks_path, "w", **profile) as ds:
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
            _to_cog(blocks_path, tmp, dtype=dtype, zlevel=zlevel, threads=threads)
        finally:
            blocks_path.unlink(missing_ok=True)
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
    unit = unit_of(dem)
    tags = {"CONNECTIVITY": str(connectivity)}
    if layer == "onset_stage":
        return dict(dtype="float32", nodata=FLOAT_NODATA, layer=layer, band_unit=unit_name(unit),
                    description=f"onset stage: outlet water level at which surface water first "
                    f"reaches the cell ({unit.symbol})", extra_tags=tags)
    if layer == "fill_depth":
        return dict(dtype="float32", nodata=FLOAT_NODATA, layer=layer, band_unit=unit_name(unit),
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
    -1 or 0 on nodata); ``dem`` may be a :class:`~sillmark.grid.dem.DEM` or a
    :class:`~sillmark.grid.dem_grid.DEMGrid`. ``depression_count`` is needed for
    ``depression_id`` (tag ``DEPRESSION_COUNT``). The files are those of
    :func:`write_onset_stage` and its siblings, whoever computed the blocks
    (DEFLATE level :data:`RESULT_DEFLATE_LEVEL`, compressed on
    :data:`RESULT_COMPRESS_THREADS` threads).
    """
    spec = _layer_spec(layer, dem, connectivity, depression_count)
    return write_geotiff(path, dem, block=block, progress=progress, zlevel=RESULT_DEFLATE_LEVEL,
                         threads=RESULT_COMPRESS_THREADS, **spec)


def write_onset_stage(
    result: "SpillResult", dem: "DEM", path: str | os.PathLike, *, progress: Progress | None = None
) -> Path:
    """Write the onset stage as a float32 GeoTIFF (NaN nodata), block by block.

    Memory: one block of :data:`BLOCK_ROWS` rows (4 bytes per cell) beyond the result.
    """
    check_result_grid(result, dem)
    stage = result.onset_stage
    return write_result_layer("onset_stage", dem, path, block=lambda r0, r1: stage[r0:r1],
                              connectivity=result.connectivity, progress=progress)


def write_fill_depth(
    result: "SpillResult", dem: "DEM", path: str | os.PathLike, *, progress: Progress | None = None
) -> Path:
    """Write the fill depth (onset stage minus elevation) as a float32 GeoTIFF (NaN nodata).

    Computed block by block, so only :data:`BLOCK_ROWS` rows of it exist at a time.
    """
    check_result_grid(result, dem)
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
    check_result_grid(result, dem)
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
    check_result_grid(result, dem)
    tree = result.flood_tree
    return write_result_layer("flood_tree", dem, path, block=lambda r0, r1: tree[r0:r1],
                              connectivity=result.connectivity, progress=progress)


def read_window(path: str | os.PathLike, r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
    """Rows ``r0:r1`` and columns ``c0:c1`` of band 1 of a GeoTIFF."""
    with rasterio.open(path) as ds:
        return ds.read(1, window=rasterio.windows.Window(c0, r0, c1 - c0, r1 - r0))


def write_dem_copy(path: str | os.PathLike, grid: "DEMGrid", *,
                   vertical_datum: str | None = None) -> Path:
    """Write the chosen band of a DEM file, with the CRS it was given, as a GeoTIFF.

    For a file without a CRS or with several bands: the copy holds the band
    ``grid`` reads, as float32 with NaN nodata (the values :func:`read_dem`
    gives, read block by block, so the memory is one block of rows) and
    ``grid``'s CRS, so any reader finds the same DEM without being told the
    band or the CRS again. Tags as :func:`write_geotiff`, plus
    ``VERTICAL_DATUM`` when one is named.
    """
    cols = grid.cols
    tags = {"SOURCE_BAND": str(grid.band)}
    if vertical_datum:
        tags["VERTICAL_DATUM"] = vertical_datum
    return write_geotiff(
        path, grid, dtype="float32", nodata=FLOAT_NODATA,
        block=lambda r0, r1: grid.read_window(r0, r1, 0, cols),
        layer="dem", description="ground elevation", band_unit=unit_name(unit_of(grid)),
        extra_tags=tags,
    )


def tag_vertical_datum(paths, vertical_datum: str | None) -> None:
    """Add the ``VERTICAL_DATUM`` tag to GeoTIFFs already written (others are skipped).

    ``datum not stated`` is written when no datum was named, so a reader of the
    file knows the levels have no stated reference rather than a lost one.

    Editing the tags of a Cloud-Optimized GeoTIFF in place would move its
    directories behind the image data and break the layout, so each file is
    copied to a plain tiled GeoTIFF, tagged there, and copied back through the
    COG driver (atomically; overviews made again the same way).
    """
    for path in paths:
        final = Path(path)
        if final.suffix.lower() not in (".tif", ".tiff"):
            continue
        with rasterio.open(final) as src:
            dtype = src.dtypes[0]
        with atomic_output(final) as tmp:
            plain = tmp.with_name(tmp.name + ".tags.tif")
            try:
                rasterio.shutil.copy(str(final), str(plain), driver="GTiff", tiled=True,
                                     blockxsize=TILE_SIZE, blockysize=TILE_SIZE,
                                     compress="deflate", predictor=TIFF_PREDICTOR,
                                     BIGTIFF="IF_SAFER")
                with rasterio.open(plain, "r+") as ds:
                    ds.update_tags(VERTICAL_DATUM=vertical_datum or NO_DATUM)
                _to_cog(plain, tmp, dtype=dtype, zlevel=None, threads=None)
            finally:
                plain.unlink(missing_ok=True)
