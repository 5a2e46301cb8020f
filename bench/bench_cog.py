"""What the Cloud-Optimized layout costs: Sillmark's raster writer against a plain tiled
GeoTIFF written by rasterio in the same run, on the benchmark terrain.

    python bench/bench_cog.py [--size 3000] [--repeat 2]

Prints the seconds of each (best of --repeat), the ratio, and the file sizes.
Sillmark's writer writes the blocks into a tiled GeoTIFF and then copies it
through GDAL's COG driver (overviews made on the way); the reference is the
same block loop into a tiled, DEFLATE-compressed GeoTIFF with no overviews,
i.e. what Sillmark wrote before the COG layout.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import rasterio
import rasterio.windows

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench.terrain import fractal_relief  # noqa: E402
from sillmark.grid.dem import dem_from_array  # noqa: E402
from sillmark.io import geotiff  # noqa: E402


def plain_tiled(path: Path, dem, z: np.ndarray) -> None:
    rows, cols = z.shape
    profile = {"driver": "GTiff", "width": cols, "height": rows, "count": 1, "dtype": "float32",
               "crs": dem.crs, "transform": dem.transform, "nodata": float("nan"), "tiled": True,
               "blockxsize": 256, "blockysize": 256, "compress": "deflate", "predictor": 2,
               "zlevel": geotiff.RESULT_DEFLATE_LEVEL, "num_threads": "ALL_CPUS"}
    with rasterio.open(path, "w", **profile) as ds:
        for r0 in range(0, rows, geotiff.BLOCK_ROWS):
            r1 = min(rows, r0 + geotiff.BLOCK_ROWS)
            ds.write(z[r0:r1], 1, window=rasterio.windows.Window(0, r0, cols, r1 - r0))


def sillmark_cog(path: Path, dem, z: np.ndarray) -> None:
    geotiff.write_geotiff(path, dem, dtype="float32", nodata=float("nan"),
                          block=lambda r0, r1: z[r0:r1], layer="bench", description="elevation",
                          band_unit="metre", zlevel=geotiff.RESULT_DEFLATE_LEVEL,
                          threads=geotiff.RESULT_COMPRESS_THREADS)


def best(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=3000)
    parser.add_argument("--repeat", type=int, default=2)
    args = parser.parse_args()
    z = fractal_relief(args.size, args.size, seed=7).astype(np.float32)
    dem = dem_from_array(z)
    with tempfile.TemporaryDirectory() as tmp:
        a, b = Path(tmp) / "plain.tif", Path(tmp) / "cog.tif"
        t_plain = best(lambda: plain_tiled(a, dem, z), args.repeat)
        t_cog = best(lambda: sillmark_cog(b, dem, z), args.repeat)
        with rasterio.open(b) as ds:
            overviews = ds.overviews(1)
            assert np.array_equal(ds.read(1), z, equal_nan=True)
        print(f"{args.size} x {args.size} float32 cells")
        print(f"rasterio, plain tiled GeoTIFF:   {t_plain:7.2f} s  {a.stat().st_size / 1e6:8.1f} MB")
        print(f"sillmark, Cloud-Optimized:       {t_cog:7.2f} s  {b.stat().st_size / 1e6:8.1f} MB"
              f"  overviews {overviews}")
        print(f"ratio COG / plain: {t_cog / t_plain:.2f}")


if __name__ == "__main__":
    main()
