"""Invented survey terrain: fractal relief with centimetre noise on every cell.

A lidar or drone survey of a site shows two things at once: the landform (hills,
valleys, basins at every scale) and a few centimetres of independent error on
every cell, which puts a tiny closed depression almost everywhere. This module
makes both, seeded and reproducible, for the benchmarks and the tests:

- the relief is a fractional Brownian surface made by spectral synthesis: white
  noise filtered in the Fourier domain so that its power falls off as
  ``f ** -(2 * hurst + 2)`` (Voss 1988; Saupe 1988), scaled to a chosen
  elevation range;
- optional bowls of known depth may be cut into it (:func:`carve_bowl`), so a
  test knows a real basin is there;
- the survey noise is Gaussian, independent from cell to cell, with a chosen
  standard deviation, and the elevations may be rounded to the survey's
  recording step (1 mm by default), as exported point clouds often are.

Every DEM made here is invented data. Nothing is read from a real site.

References
----------
Voss, R. F. (1988). Fractals in nature: from characterization to simulation.
In Peitgen, H.-O., Saupe, D. (eds.), The Science of Fractal Images, Springer,
21-70. Saupe, D. (1988). Algorithms for random fractals. Ibid., 71-136.
(Both recalled from memory.)
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np

__all__ = ["SurveyTerrain", "survey_terrain", "fractal_relief", "carve_bowl", "write_geotiff"]

#: Projected CRS of the invented sites (UTM zone 33N) and their north-west corner.
DEFAULT_CRS = "EPSG:32633"
DEFAULT_ORIGIN = (500_000.0, 5_000_000.0)


@dataclasses.dataclass(frozen=True)
class SurveyTerrain:
    """An invented survey DEM and the parts it was made of.

    Attributes
    ----------
    elevation : float32 (rows, cols)
        Relief plus noise, rounded to ``quantum``: the DEM a survey would give.
    relief : float32 (rows, cols)
        The landform alone, without noise (bowls included).
    noise_sd : float
        Standard deviation of the added noise, in metres.
    cell_size : float
        Cell side in metres.
    """

    elevation: np.ndarray
    relief: np.ndarray
    noise_sd: float
    cell_size: float


def fractal_relief(
    rows: int,
    cols: int,
    *,
    seed: int = 0,
    hurst: float = 0.8,
    relief_m: float = 10.0,
    base_m: float = 100.0,
    shortest_wavelength: float = 4.0,
) -> np.ndarray:
    """Fractional Brownian relief by spectral synthesis (float32, metres).

    Parameters
    ----------
    rows, cols : int
        Grid shape (any positive sizes; no power of two needed).
    seed : int, keyword-only
        Seed of :func:`numpy.random.default_rng`; the same seed gives the same
        surface.
    hurst : float, keyword-only
        Hurst exponent in (0, 1): near 1 smooth rolling ground, near 0 rough.
    relief_m : float, keyword-only
        Difference between the highest and the lowest cell.
    base_m : float, keyword-only
        Elevation of the lowest cell.
    shortest_wavelength : float, keyword-only
        Wavelengths shorter than this many cells are left out, so the relief is
        smooth at the cell scale and the micro-relief comes from the noise alone.

    Returns
    -------
    float32 array (rows, cols)

    Notes
    -----
    Memory: about 16 bytes per cell during the synthesis (a float32 field and
    its complex64 half-spectrum).
    """
    rows, cols = _size(rows, "rows"), _size(cols, "cols")
    if not 0.0 < hurst < 1.0:
        raise ValueError(f"hurst must lie strictly between 0 and 1, not {hurst!r}")
    if not relief_m > 0:
        raise ValueError(f"relief_m must be positive, not {relief_m!r}")
    from scipy import fft

    rng = np.random.default_rng(seed)
    white = rng.standard_normal((rows, cols), dtype=np.float32)
    spectrum = fft.rfft2(white)
    del white
    fy = fft.fftfreq(rows).astype(np.float32)[:, None]
    fx = fft.rfftfreq(cols).astype(np.float32)[None, :]
    f = np.sqrt(fy * fy + fx * fx)
    f[0, 0] = 1.0
    # Amplitude ~ f ** -(hurst + 1): power ~ f ** -(2 hurst + 2) for a 2-D fBm surface.
    gain = f ** np.float32(-(hurst + 1.0))
    gain[0, 0] = 0.0
    gain[f > np.float32(1.0 / shortest_wavelength)] = 0.0
    spectrum *= gain
    del gain, f
    z = fft.irfft2(spectrum, s=(rows, cols)).astype(np.float32)
    del spectrum
    lo, hi = float(z.min()), float(z.max())
    span = hi - lo if hi > lo else 1.0
    z -= np.float32(lo)
    z *= np.float32(relief_m / span)
    z += np.float32(base_m)
    return z


def carve_bowl(z: np.ndarray, row: float, col: float, radius: float, depth: float) -> np.ndarray:
    """A copy of ``z`` with a smooth bowl cut into it.

    The bowl lowers every cell within ``radius`` cells of (``row``, ``col``)
    by ``depth * (1 - (r / radius) ** 2) ** 2``, so the ground inside sits up
    to ``depth`` metres below where it was and joins it smoothly at the rim.
    """
    out = np.array(z, dtype=np.float32, copy=True)
    r_idx, c_idx = np.ogrid[: out.shape[0], : out.shape[1]]
    r2 = ((r_idx - row) ** 2 + (c_idx - col) ** 2) / float(radius) ** 2
    cut = np.where(r2 < 1.0, depth * (1.0 - r2) ** 2, 0.0)
    out -= cut.astype(np.float32)
    return out


def survey_terrain(
    rows: int,
    cols: int | None = None,
    *,
    seed: int = 0,
    noise_sd: float = 0.03,
    quantum: float | None = 0.001,
    hurst: float = 0.8,
    relief_m: float = 10.0,
    bowls: tuple[tuple[float, float, float, float], ...] = (),
    cell_size: float = 1.0,
) -> SurveyTerrain:
    """Invented survey DEM: fractal relief, optional bowls, centimetre noise.

    Parameters
    ----------
    rows, cols : int
        Grid shape; ``cols`` defaults to ``rows``.
    seed : int, keyword-only
        Seeds the relief and, independently, the noise.
    noise_sd : float, keyword-only
        Standard deviation of the independent noise on every cell, metres
        (default 0.03: a few centimetres).
    quantum : float or None, keyword-only
        Recording step the elevations are rounded to (default 1 mm); None keeps
        them unrounded.
    hurst, relief_m : float, keyword-only
        Passed to :func:`fractal_relief`.
    bowls : tuple of (row, col, radius, depth), keyword-only
        Bowls cut with :func:`carve_bowl` before the noise is added.
    cell_size : float, keyword-only
        Cell side in metres (recorded, and used by :func:`write_geotiff`).

    Returns
    -------
    SurveyTerrain

    Examples
    --------
    >>> t = survey_terrain(64, seed=1)
    >>> t.elevation.shape, t.elevation.dtype.name
    ((64, 64), 'float32')
    >>> 0.02 < float(np.std(t.elevation - t.relief)) < 0.04
    True
    """
    cols = rows if cols is None else cols
    if not noise_sd >= 0:
        raise ValueError(f"noise_sd must be zero or positive, not {noise_sd!r}")
    relief = fractal_relief(rows, cols, seed=seed, hurst=hurst, relief_m=relief_m)
    for row, col, radius, depth in bowls:
        relief = carve_bowl(relief, row, col, radius, depth)
    # A separate stream for the noise, so the relief does not change with noise_sd.
    rng = np.random.default_rng([seed, 1])
    z = relief + rng.normal(0.0, noise_sd, size=relief.shape).astype(np.float32)
    if quantum:
        z = (np.round(z.astype(np.float64) / quantum) * quantum).astype(np.float32)
    return SurveyTerrain(elevation=z, relief=relief, noise_sd=float(noise_sd),
                         cell_size=float(cell_size))


def write_geotiff(
    path: str | Path,
    elevation: np.ndarray,
    *,
    cell_size: float = 1.0,
    crs: str = DEFAULT_CRS,
    origin: tuple[float, float] = DEFAULT_ORIGIN,
    nodata: float | None = None,
) -> Path:
    """Write an elevation array as a tiled, compressed float32 GeoTIFF.

    North-up, with square cells of ``cell_size`` metres and the north-west
    corner at ``origin`` (x, y) in ``crs``. Written in strips of blocks, so
    the file never needs a second copy of the array in memory.
    """
    import rasterio
    from affine import Affine

    z = np.asarray(elevation)
    if z.ndim != 2:
        raise ValueError(f"elevation must be 2-D, not {z.ndim}-D")
    path = Path(path)
    profile = dict(
        driver="GTiff", width=z.shape[1], height=z.shape[0], count=1, dtype="float32",
        crs=crs, transform=Affine(cell_size, 0.0, origin[0], 0.0, -cell_size, origin[1]),
        nodata=nodata, compress="deflate", predictor=3, BIGTIFF="IF_SAFER",
    )
    if z.shape[0] >= 256 and z.shape[1] >= 256:
        profile.update(tiled=True, blockxsize=256, blockysize=256)
    step = 2048
    with rasterio.open(path, "w", **profile) as dst:
        for r0 in range(0, z.shape[0], step):
            r1 = min(r0 + step, z.shape[0])
            window = rasterio.windows.Window(0, r0, z.shape[1], r1 - r0)
            dst.write(z[r0:r1].astype(np.float32, copy=False), 1, window=window)
    return path


def _size(value, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ValueError(f"{name} must be a positive whole number, not {value!r}")
    return int(value)


if __name__ == "__main__":  # pragma: no cover - a quick look at one invented site
    import argparse

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("out", type=Path)
    parser.add_argument("--size", type=int, default=1000)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--noise", type=float, default=0.03)
    args = parser.parse_args()
    t = survey_terrain(args.size, seed=args.seed, noise_sd=args.noise)
    print(write_geotiff(args.out, t.elevation, cell_size=t.cell_size))
