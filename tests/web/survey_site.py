"""A survey-like site for the web tests: thousands of depressions on a small grid.

"Marsh Lane" (invented): 240 × 240 cells of 1 m in UTM zone 33N, a nearly flat
fractal surface (10 cm of relief) with a 1 m deep bowl of radius 48 cells at
its centre, and 3 cm of independent noise on every cell (bench/terrain.py,
seed 7). The noise makes about two thousand depressions; the bowl is the one
large depression. Analysed through the app like any upload (edge outlets, D8).
"""

from __future__ import annotations

from pathlib import Path

from bench.terrain import survey_terrain, write_geotiff
from tests.web_support import Client, analysed_site, make_app

SIZE = 240
BOWL = (SIZE / 2, SIZE / 2, SIZE / 5, 1.0)  # row, col, radius (cells), depth (m)


def write_marsh_lane(path: Path) -> Path:
    t = survey_terrain(SIZE, SIZE, seed=7, noise_sd=0.03, relief_m=0.1, bowls=(BOWL,))
    write_geotiff(path, t.elevation)
    return path


def marsh_lane_app(tmp_path_factory, **config):
    """(app, client, site_id) with Marsh Lane analysed."""
    folder = tmp_path_factory.mktemp("marsh-lane")
    app = make_app(folder / "data", **config)
    client = Client(app)
    # A stated accuracy of 1 µm (a 3 µm minimum) lists every noise pit: these tests
    # are about answers that stay bounded with thousands of depressions listed.
    site_id = analysed_site(client, write_marsh_lane(folder / "marsh_lane.tif"), assets=False,
                            vertical_accuracy="0.000001")
    return app, client, site_id


def open_results(app, site_id: int):
    """The server's open results of a site (sillmark.web.site_data.SiteData)."""
    from sillmark.web import db

    svc = app.extensions["sillmark"]
    conn = db.connect(svc.db_path)
    try:
        run = db.get_site(conn, site_id)["current_run"]
    finally:
        conn.close()
    return svc.cache.get(site_id, run)
