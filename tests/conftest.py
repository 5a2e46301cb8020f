"""Shared fixtures: small invented DEMs, in memory and as GeoTIFFs in tmp_path."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from sillmark.grid.dem import DEM, dem_from_array
from tests.rasters import write_raster
from tests.web_support import fresh, lowbank_tif, ready, reference  # noqa: F401  (web test fixtures)


@pytest.fixture
def write_tif(tmp_path: Path):
    """Factory: ``write_tif("name.tif", array, **options)`` -> path in tmp_path."""

    def write(name: str, data: np.ndarray, **options: object) -> Path:
        return write_raster(tmp_path / name, data, **options)

    return write


@pytest.fixture
def bowl_elevation() -> np.ndarray:
    """7 × 7 invented site: a rim at 10 m round a pit at 2 m, with a sill at 6 m.

    The sill is the rim cell (0, 3); the pit fills to 6 m from an edge outlet.
    """
    z = np.full((7, 7), 10.0, dtype=np.float32)
    z[1:6, 1:6] = 5.0
    z[3, 3] = 2.0
    z[0, 3] = 6.0
    return z


@pytest.fixture
def bowl_dem(bowl_elevation: np.ndarray) -> DEM:
    """:func:`bowl_elevation` on 1 m UTM cells."""
    return dem_from_array(bowl_elevation)


@pytest.fixture
def island_dem() -> DEM:
    """6 × 8 invented island: valid ground inside a ring of nodata sea (NaN)."""
    z = np.full((6, 8), np.nan, dtype=np.float32)
    z[1:5, 1:7] = np.arange(24, dtype=np.float32).reshape(4, 6) + 1.0
    return dem_from_array(z)


@pytest.fixture
def site_tif(write_tif) -> Path:
    """A 5 × 6 float32 GeoTIFF in UTM 33N with nodata -9999 in one corner."""
    z = np.arange(30, dtype=np.float32).reshape(5, 6) / 4.0
    z[4, 5] = -9999.0
    return write_tif("site.tif", z, nodata=-9999.0)


#: Fixtures that start a Dask cluster of worker processes on loopback.
CLUSTER_FIXTURES = {"cluster_map", "cluster_address"}


def pytest_collection_modifyitems(config, items):
    """Markers from what a test uses: ``browser`` on the tests that drive Chromium,
    ``cluster`` on those that start a loopback Dask cluster, so a developer may
    leave either out (``-m "not browser and not cluster"``)."""
    for item in items:
        if item.path.name == "test_web_browser.py":
            item.add_marker(pytest.mark.browser)
        if CLUSTER_FIXTURES & set(getattr(item, "fixturenames", ())):
            item.add_marker(pytest.mark.cluster)
