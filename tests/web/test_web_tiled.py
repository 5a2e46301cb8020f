"""The browser app on the tiled engine: a DEM above TILED_ABOVE_CELLS is analysed
tile by tile (sillmark.web.tiled_run), its progress counts the tiles, and the viewer
shows the very figures of the in-memory analysis.

The site is Lowbank (tests/web_support.py, invented): 40 x 50 = 2 000 cells, so
a threshold of 1 000 cells sends it to the tiled engine; tiles of 16 cells make
3 x 4 = 12 tiles. The reference is the same site analysed in memory by a second
app with the default threshold, and the engine run directly (the ``reference``
fixture, and :func:`sillmark.engine.flood.priority_flood` with 16-cell tiles for the
flood tree, whose tied routes depend on the tile size).
"""

from __future__ import annotations

import json
import sqlite3
import time

import numpy as np
import pytest

from tests.web_support import Client, analysed_site, cell_centre, confirm, lonlat, make_app, upload_dem
from sillmark.web import arrays, db, layout

TILED = {"TILED_ABOVE_CELLS": 1_000, "TILED_TILE_SIZE": 16}
LEVELS = (9.5, 10.5, 11.0, 12.2)


def current_run(app, site_id) -> int:
    conn = sqlite3.connect(app.extensions["sillmark"].db_path)
    try:
        return int(conn.execute("SELECT current_run FROM sites WHERE id = ?", (site_id,)).fetchone()[0])
    finally:
        conn.close()


def run_folder(app, site_id):
    return layout.run_dir(app.extensions["sillmark"].data_dir, site_id, current_run(app, site_id))


@pytest.fixture(scope="module")
def in_memory_site(tmp_path_factory, lowbank_tif):
    app = make_app(tmp_path_factory.mktemp("memory"))
    client = Client(app)
    return app, client, analysed_site(client, lowbank_tif, assets=False)


@pytest.fixture(scope="module")
def tiled_site(tmp_path_factory, lowbank_tif):
    """The same site on an app whose threshold sends it to the tiled engine; with the
    phases its run wrote, in order."""
    from sillmark.web import worker

    seen = []
    real, interval = db.update_run, worker.PROGRESS_INTERVAL

    def spy(conn, run_id, **fields):
        if "phase" in fields:
            seen.append((fields["phase"], fields.get("percent")))
        return real(conn, run_id, **fields)

    db.update_run, worker.PROGRESS_INTERVAL = spy, 0.0
    try:
        app = make_app(tmp_path_factory.mktemp("tiled"), **TILED)
        client = Client(app)
        site_id = analysed_site(client, lowbank_tif, assets=False)
    finally:
        db.update_run, worker.PROGRESS_INTERVAL = real, interval
    return app, client, site_id, seen


def test_the_run_used_the_tiled_engine_and_counted_its_tiles(tiled_site, in_memory_site):
    app, client, site_id, seen = tiled_site
    folder = run_folder(app, site_id) / "results"
    summary = json.loads((folder / "summary.json").read_text())
    assert summary["engine"] == {"kind": "tiled", "tile_size": 16, "tiles": 12}
    memory = json.loads((run_folder(in_memory_site[0], in_memory_site[2]) / "results" / "summary.json").read_text())
    assert "engine" not in memory  # 2 000 cells are far below the default threshold
    phases = [p for p, _ in seen]
    assert "flooding tiles: 1 of 12 tiles done" in phases
    assert "flooding tiles: 12 of 12 tiles done" in phases
    assert "finishing tiles: 12 of 12 tiles done" in phases
    assert "outlining depressions window by window" in phases
    assert "marking outlets" not in phases and "drawing the hillshade" in phases
    percents = [p for _, p in seen if p is not None]
    assert percents == sorted(percents) and percents[-1] <= 100
    for name in ("onset_stage.tif", "fill_depth.tif", "depression_id.tif", "flood_tree.tif",
                 "depressions.csv", "depressions.geojson", "spill_points.geojson", "summary.json"):
        r = client.get(f"/api/sites/{site_id}/files/results/{name}")
        assert r.status_code == 200, name
    assert not list(folder.glob(".sillmark-tiles-*"))  # tile scratch removed


def test_stored_arrays_are_the_in_memory_result(tiled_site, reference):
    from sillmark.engine.flood import priority_flood

    app, _, site_id, _ = tiled_site
    dem, outlets, result = reference
    stored = arrays.load(run_folder(app, site_id) / "arrays")
    r = stored.result
    assert np.array_equal(r.onset_stage, result.onset_stage, equal_nan=True)
    assert np.array_equal(r.depression_id, result.depression_id)
    assert np.array_equal(r.elevation, result.elevation, equal_nan=True)
    same_tiles = priority_flood(dem.elevation, outlets.mask, row_areas=dem.row_areas,
                                transform=dem.transform, tile_size=16)
    assert np.array_equal(r.flood_tree, same_tiles.flood_tree)
    for name in result.depressions.columns:
        assert np.array_equal(getattr(r.depressions, name), getattr(same_tiles.depressions, name),
                              equal_nan=True), name
    assert r.unreached_cells == result.unreached_cells and r.connectivity == result.connectivity


@pytest.mark.parametrize("url", [f"/api/sites/{{site}}/stage?level={h}" for h in LEVELS] + [
    "/api/sites/{site}/stage_table",
    "/api/sites/{site}/depressions",
    "/api/sites/{site}/cell?lon={lon}&lat={lat}&level=10.5",
])
def test_viewer_figures_equal_the_in_memory_site(tiled_site, in_memory_site, url):
    t_app, t_client, t_site, _ = tiled_site
    m_app, m_client, m_site = in_memory_site
    lon, lat = lonlat(*cell_centre(18, 25))  # in the basin: its route leaves by the notch
    a = t_client.get(url.format(site=t_site, lon=lon, lat=lat))
    b = m_client.get(url.format(site=m_site, lon=lon, lat=lat))
    assert a.status_code == b.status_code
    body_a, body_b = a.get_json(), b.get_json()
    for body in (body_a, body_b):  # run and site ids differ between the two apps
        for key in ("site_id", "run_id", "run"):
            body.pop(key, None)
    if "route" in body_a:
        # The path through flat water follows the flood tree, which depends on
        # the tile size where routes tie (16 here, 512 in memory); its sill does
        # not (the notch), and the flood tree itself is checked above.
        assert body_a["sill"] == body_b["sill"] and body_a["sill"]["row"] == 17
        for body in (body_a, body_b):  # the route's length goes with the route
            for key in ("route", "route_cells", "route_length", "route_length_m"):
                body.pop(key)
    assert body_a == body_b


def test_viewer_level_figures_equal_the_engine(tiled_site, reference):
    from sillmark.products.stage import water_level_map

    _, client, site_id, _ = tiled_site
    dem, _, result = reference
    for h in LEVELS:
        expected = water_level_map(result, h, row_areas=dem.row_areas, unit=dem.vertical_unit)
        f = client.get(f"/api/sites/{site_id}/stage?level={h}").get_json()
        assert f["flooded_area_m2"] == expected.flooded_area_m2
        assert f["flooded_volume_m3"] == expected.flooded_volume_m3
        assert f["shielded_area_m2"] == expected.shielded_area_m2
    # Behind the bank at 10.5 m: shielded low ground (the basin, 16 x 21 cells of 4 m²).
    f = client.get(f"/api/sites/{site_id}/stage?level=10.5").get_json()
    assert f["shielded_area_m2"] == 16 * 21 * 4.0


def test_a_worker_process_gets_the_threshold_with_the_run(tmp_path, lowbank_tif):
    """JOB_RUNNER = "process": the threshold travels in the run's settings, not the app."""
    app = make_app(tmp_path / "data", JOB_RUNNER="process", **TILED)
    client = Client(app)
    try:
        site_id = upload_dem(client, lowbank_tif).get_json()["site_id"]
        assert confirm(client, site_id).status_code == 202
        deadline = time.monotonic() + 120
        while True:
            st = client.get(f"/api/sites/{site_id}/status").get_json()
            if st["run"]["status"] in ("done", "failed") or time.monotonic() > deadline:
                break
            time.sleep(0.2)
        assert st["run"]["status"] == "done", st
        summary = json.loads((run_folder(app, site_id) / "results" / "summary.json").read_text())
        assert summary["engine"]["kind"] == "tiled"
    finally:
        app.extensions["sillmark"].runner.stop()


def test_in_memory_file_progress_spreads_over_every_result_file(fresh, lowbank_tif, monkeypatch):
    # write_results writes the 11 files of sillmark.io.summary.FILE_NAMES and the
    # folder's README.txt after the significance step; the phase "writing result
    # files" runs from 62 % to 92 %, each step's share 30/13 %, and 92 % is reached
    # only when summary.json is done (dividing by the 11 result files alone reached
    # 92 % at README.txt and stayed there). The rasters are written beside the
    # other files, so the steps overlap, but the percent never goes back.
    from sillmark.io.summary import FILE_NAMES
    from sillmark.web import worker

    seen = []
    real = db.update_run

    def spy(conn, run_id, **fields):
        if fields.get("phase") == "writing result files":
            seen.append(fields["percent"])
        return real(conn, run_id, **fields)

    monkeypatch.setattr(worker.db, "update_run", spy)
    monkeypatch.setattr(worker, "PROGRESS_INTERVAL", 0.0)
    _, client = fresh
    analysed_site(client, lowbank_tif, assets=False)
    assert len(FILE_NAMES) == 11
    files = len(FILE_NAMES) + 2  # the significance step first, and README.txt
    assert seen == sorted(seen) and seen[-1] == 92.0 and seen.count(92.0) == 1
    # Every finished step adds its share: the percent passes each step boundary.
    for k in range(1, files):
        assert any(abs(p - (62 + 30 * k / files)) < 30 / files for p in seen[:-1]), k
    assert len(set(seen)) >= files


def test_served_map_tiles_equal_the_in_memory_site(tiled_site, in_memory_site):
    """The tiled run's arrays are streamed from its GeoTIFFs and its relief drawn in
    blocks; the map tiles served from them are the in-memory site's, byte for byte."""
    from sillmark.web import render

    t_app, t_client, t_site, _ = tiled_site
    m_app, m_client, m_site = in_memory_site
    t_stored = arrays.load(run_folder(t_app, t_site) / "arrays")
    m_stored = arrays.load(run_folder(m_app, m_site) / "arrays")
    for a, b in zip(t_stored.pyramid + t_stored.tints, m_stored.pyramid + m_stored.tints, strict=True):
        assert np.array_equal(a, b)
    lon, lat = lonlat(*cell_centre(18, 25))
    seen = 0
    for z in (17, 18, 19):
        x, y = render.lonlat_to_tile(lon, lat, z)
        for kind in ("hillshade", *LEVELS):
            a = t_client.get(f"/tiles/{t_site}/{kind}/{z}/{x}/{y}.png")
            b = m_client.get(f"/tiles/{m_site}/{kind}/{z}/{x}/{y}.png")
            assert a.status_code == b.status_code == 200
            assert a.get_data() == b.get_data(), (kind, z)
            seen += a.get_data() != render.BLANK_PNG
    assert seen >= 9  # the tiles compared show the site, not blank ground
