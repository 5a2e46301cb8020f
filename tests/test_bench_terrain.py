"""The invented survey terrain of bench/terrain.py: seeded, noisy, written as a GeoTIFF."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio

from bench.terrain import carve_bowl, fractal_relief, survey_terrain, write_geotiff


def test_same_seed_same_site_other_seed_other_site():
    a = survey_terrain(50, 70, seed=3)
    b = survey_terrain(50, 70, seed=3)
    c = survey_terrain(50, 70, seed=4)
    assert a.elevation.shape == (50, 70)
    assert np.array_equal(a.elevation, b.elevation)
    assert not np.array_equal(a.elevation, c.elevation)


def test_relief_spans_the_asked_range_and_is_smooth_at_the_cell_scale():
    z = fractal_relief(120, 90, seed=2, relief_m=6.0)
    assert float(z.min()) == pytest.approx(100.0, abs=1e-4)
    assert float(z.max() - z.min()) == pytest.approx(6.0, rel=1e-5)
    # No wavelength under 4 cells: neighbour steps are small next to the range.
    assert float(np.abs(np.diff(z, axis=1)).max()) < 0.5


def test_noise_is_independent_and_of_the_asked_size():
    t = survey_terrain(200, seed=5, noise_sd=0.04, quantum=None)
    e = (t.elevation - t.relief).astype(np.float64)
    assert np.std(e) == pytest.approx(0.04, rel=0.03)
    # Neighbouring errors are uncorrelated (|r| well under 0.05 on 40 000 cells).
    r = np.corrcoef(e[:, :-1].ravel(), e[:, 1:].ravel())[0, 1]
    assert abs(r) < 0.05
    # The relief does not depend on the noise level.
    assert np.array_equal(t.relief, survey_terrain(200, seed=5, noise_sd=0.0).relief)


def test_elevations_are_rounded_to_the_recording_step():
    z = survey_terrain(40, seed=1, quantum=0.01).elevation.astype(np.float64)
    assert np.allclose(np.round(z * 100), z * 100, atol=1e-3)


def test_bowl_lowers_its_centre_by_its_depth_and_leaves_the_outside():
    z = np.full((21, 21), 10.0, np.float32)
    out = carve_bowl(z, 10, 10, 5, 2.0)
    assert float(out[10, 10]) == pytest.approx(8.0)
    assert float(out[10, 15]) == 10.0 and float(out[0, 0]) == 10.0
    assert float(z[10, 10]) == 10.0  # input unchanged


def test_written_geotiff_reads_back(tmp_path):
    t = survey_terrain(300, 260, seed=9, cell_size=0.5)
    path = write_geotiff(tmp_path / "survey.tif", t.elevation, cell_size=t.cell_size)
    with rasterio.open(path) as src:
        assert (src.height, src.width) == (300, 260)
        assert src.crs.to_epsg() == 32633
        assert src.res == (0.5, 0.5)
        assert np.array_equal(src.read(1), t.elevation)


@pytest.mark.parametrize("bad", [dict(rows=0, cols=5), dict(rows=5, cols=5, hurst=1.0),
                                 dict(rows=5, cols=5, relief_m=0.0)])
def test_bad_sizes_are_refused(bad):
    with pytest.raises(ValueError):
        fractal_relief(**bad)


def test_windowed_survey_noise_of_the_tiled_bench_joins_without_seams():
    """bench/bench_tiled.py writes its survey-like DEM window by window: each cell's
    noise comes from its own row and column, so windows join exactly, and the
    noise has the asked standard deviation and no correlation between neighbours."""
    from bench.bench_tiled import terrain_window

    whole = terrain_window(0, 120, 0, 150, 1000, noise=0.03)
    parts = np.block([[terrain_window(0, 50, 0, 70, 1000, noise=0.03),
                       terrain_window(0, 50, 70, 150, 1000, noise=0.03)],
                      [terrain_window(50, 120, 0, 70, 1000, noise=0.03),
                       terrain_window(50, 120, 70, 150, 1000, noise=0.03)]])
    assert np.array_equal(whole, parts)
    noise = whole.astype(np.float64) - terrain_window(0, 120, 0, 150, 1000).astype(np.float64)
    # The smooth terrain is rounded to 1 cm, the noisy one to 1 mm: up to 6 mm apart
    # before any noise, small next to a 3 cm spread.
    assert 0.027 < float(noise.std()) < 0.034
    lag = np.corrcoef(noise[:, :-1].ravel(), noise[:, 1:].ravel())[0, 1]
    assert abs(lag) < 0.05
    assert np.array_equal(whole, np.round(whole.astype(np.float64), 3).astype(np.float32))
