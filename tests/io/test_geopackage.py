"""GeoPackage layers: read back with pyogrio and SQLite, spatial index, CRS, caution, atomicity."""

from __future__ import annotations

import sqlite3

import numpy as np
import pyogrio
import pyogrio.raw
import pyproj
import pytest
import shapely

from sillmark import SCREENING_CAUTION
from sillmark.errors import InvalidParameter
from sillmark.grid.dem import dem_from_array
from sillmark.io import geopackage
from sillmark.io.geopackage import GeoPackageWriteError, write_geopackage_layer


def _squares(n: int, x0: float = 500_000.0, y0: float = 5_000_000.0):
    return [shapely.box(x0 + 2 * k, y0 - 1, x0 + 2 * k + 1, y0) for k in range(n)]


def _sql(path, query):
    with sqlite3.connect(path) as con:
        return con.execute(query).fetchall()


def test_polygons_with_attributes_read_back(tmp_path):
    polys = _squares(3)
    polys[1] = shapely.MultiPolygon([polys[1], shapely.box(500_010, 4_999_990, 500_011, 4_999_991)])
    attrs = {
        "node": np.array([4, 9, 12], np.int32),
        "depth_m": np.array([0.5, np.nan, 1.25]),
        "significant": np.array([True, False, True]),
        "label": np.array(["north pond", "ditch", "sump"]),
    }
    out = write_geopackage_layer(tmp_path / "pools.gpkg", polys, attrs, crs="EPSG:32633",
                                 layer="depressions", description="Significant depressions.")
    info = pyogrio.read_info(out, layer="depressions")
    assert info["features"] == 3
    assert info["geometry_type"] == "MultiPolygon"  # single parts promoted beside a multi
    assert pyproj.CRS.from_user_input(info["crs"]).to_epsg() == 32633
    assert list(info["fields"]) == ["node", "depth_m", "significant", "label"]
    meta, _, wkb, values = pyogrio.raw.read(out, layer="depressions")
    back = shapely.from_wkb(wkb)
    assert [round(g.area, 9) for g in back] == [1.0, 2.0, 1.0]
    assert shapely.equals(back[0], polys[0])
    assert values[0].tolist() == [4, 9, 12]
    assert values[1][0] == 0.5 and np.isnan(values[1][1]) and values[1][2] == 1.25  # null back as NaN
    assert values[2].tolist() == [True, False, True]
    assert values[3].tolist() == ["north pond", "ditch", "sump"]


def test_spatial_index_and_caution_are_in_the_file(tmp_path):
    out = write_geopackage_layer(tmp_path / "p.gpkg", _squares(50), {"k": np.arange(50)},
                                 crs="EPSG:32633", layer="outlines")
    # The R*Tree of the GeoPackage spatial index extension, and its registration.
    tables = {r[0] for r in _sql(out, "SELECT name FROM sqlite_master WHERE type='table'")}
    assert "rtree_outlines_geom" in tables
    assert _sql(out, "SELECT count(*) FROM rtree_outlines_geom") == [(50,)]
    ext = _sql(out, "SELECT table_name, extension_name FROM gpkg_extensions")
    assert ("outlines", "gpkg_rtree_index") in ext
    # Caution: layer and dataset metadata, and the layer description.
    info = pyogrio.read_info(out, layer="outlines")
    assert info["layer_metadata"]["caution"] == SCREENING_CAUTION
    assert info["dataset_metadata"]["caution"] == SCREENING_CAUTION
    description = _sql(out, "SELECT description FROM gpkg_contents WHERE table_name='outlines'")
    assert description[0][0].startswith(SCREENING_CAUTION)
    # It is in the standard's metadata table, where GDAL keeps it.
    stored = " ".join(r[0] for r in _sql(out, "SELECT metadata FROM gpkg_metadata"))
    assert SCREENING_CAUTION in stored
    # Nothing beside the file: the temporary name is gone.
    assert [p.name for p in tmp_path.iterdir()] == ["p.gpkg"]


def test_points_in_the_dems_horizontal_crs(tmp_path):
    dem = dem_from_array(np.zeros((4, 4), np.float32), crs="EPSG:32617", vertical_unit="m")
    pts = [shapely.Point(*dem.xy(r, c)) for r, c in [(0, 0), (3, 2)]]
    out = write_geopackage_layer(tmp_path / "spill.gpkg", pts, {"spill_elevation": [1.5, 2.0]},
                                 crs=dem, layer="spill_points")
    info = pyogrio.read_info(out)
    assert info["geometry_type"] == "Point"
    assert pyproj.CRS.from_user_input(info["crs"]).to_epsg() == 32617
    _, _, wkb, _ = pyogrio.raw.read(out)
    assert [(p.x, p.y) for p in shapely.from_wkb(wkb)] == [(p.x, p.y) for p in pts]


def test_a_compound_crs_keeps_its_horizontal_part(tmp_path):
    out = write_geopackage_layer(tmp_path / "c.gpkg", _squares(1), crs="EPSG:32633+5773")
    assert pyproj.CRS.from_user_input(pyogrio.read_info(out)["crs"]).to_epsg() == 32633


def test_empty_layer_needs_and_keeps_its_type(tmp_path):
    with pytest.raises(InvalidParameter, match="geometry_type"):
        write_geopackage_layer(tmp_path / "e.gpkg", [], crs="EPSG:32633")
    out = write_geopackage_layer(tmp_path / "e.gpkg", [], {"depth_m": np.array([], float)},
                                 crs="EPSG:32633", geometry_type="MultiPolygon")
    info = pyogrio.read_info(out)
    assert info["features"] == 0 and info["geometry_type"] == "MultiPolygon"


def test_replacing_a_file_is_all_or_nothing(tmp_path, monkeypatch):
    target = tmp_path / "layer.gpkg"
    write_geopackage_layer(target, _squares(2), crs="EPSG:32633")
    before = target.read_bytes()

    def fail(*args, **kwargs):
        from pyogrio.errors import DataSourceError
        with open(args[0], "wb") as half:
            half.write(b"half a file")
        raise DataSourceError("disk full")

    monkeypatch.setattr(pyogrio.raw, "write", fail)
    with pytest.raises(GeoPackageWriteError, match="layer.gpkg: disk full"):
        write_geopackage_layer(target, _squares(5), crs="EPSG:32633")
    assert target.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["layer.gpkg"]


@pytest.mark.parametrize(
    ("geoms", "attrs", "kwargs", "message"),
    [
        ([None], None, {}, "not a shapely shape"),
        ([shapely.Polygon()], None, {}, "empty"),
        ([shapely.Point(0, 0), shapely.box(0, 0, 1, 1)], None, {}, "one kind of shape"),
        ([shapely.GeometryCollection([shapely.Point(0, 0)])], None, {}, "points, lines or polygons"),
        (_squares(2), {"a": [1]}, {}, "one value per geometry"),
        (_squares(1), {"geom": [1]}, {}, "not usable"),
        (_squares(1), {"a": [1], "A": [2]}, {}, "twice"),
        (_squares(1), {"when": np.array(["2024-01-01"], "datetime64[D]")}, {}, "numbers, booleans or text"),
        (_squares(1), None, {"layer": "1st"}, "layer name"),
        (_squares(1), None, {"crs": "EPSG:0"}, "unknown CRS"),
        (_squares(1), None, {"crs": None}, "needs the DEM's CRS"),
        (_squares(1), None, {"geometry_type": "Point"}, "not Points"),
        (_squares(1), None, {"geometry_type": "Hexagon"}, "unknown geometry type"),
    ],
)
def test_bad_layers_are_refused_in_one_line(tmp_path, geoms, attrs, kwargs, message):
    options = {"crs": "EPSG:32633", **kwargs}
    with pytest.raises(InvalidParameter, match=message) as err:
        write_geopackage_layer(tmp_path / "bad.gpkg", geoms, attrs, **options)
    assert "\n" not in str(err.value)
    assert not any(tmp_path.iterdir())


def test_module_keeps_to_file_formats():
    # io may use grid helpers but nothing above it (checked in full by the import contract).
    assert geopackage.horizontal_crs.__module__ == "sillmark.grid.crs"
