"""Tests for sillmark.io.hierarchy_files: the node table as CSV and JSON, and the curves file."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

from sillmark import SCREENING_CAUTION
from sillmark.io import hierarchy_files as he
from sillmark.grid.dem import dem_from_array
from sillmark.errors import InvalidParameter
from sillmark.io.summary import FILE_NAMES
from sillmark.io.export import write_results
from sillmark.io.hierarchy_writer import write_hierarchy_files
from sillmark.engine.flood import analyse_site
from sillmark.products.hierarchy_sweep import site_hierarchy
from sillmark.products.hierarchy_windows import whole_hierarchy
from sillmark.products.source import ArraySource
from sillmark.grid.outlets import build_outlets
from sillmark.units import ACRE_FOOT_M3
from tests.rasters import grid


def nested_elevation() -> np.ndarray:
    """6 × 10 invented site, ground at 9 m, every edge cell an outlet.

    Row 2 holds a trench: pits at 1 m (col 1) and 2 m (col 3) meeting over a
    4 m saddle (col 2), the trench spilling at 7 m over a 7 m causeway that
    runs to the east edge. A lone 5 m hollow at (4, 6) spills at 9 m.
    """
    z = np.full((6, 10), 9.0, dtype=np.float32)
    z[2, 1:4] = [1.0, 4.0, 2.0]
    z[2, 4:] = 7.0
    z[4, 6] = 5.0
    return z


def site(z: np.ndarray, *, unit: str = "m", cell: float = 2.0):
    dem = dem_from_array(z, transform=grid(cell), vertical_unit=unit)
    result = analyse_site(dem, build_outlets(dem, ("edge",)))
    return dem, site_hierarchy(dem, result)


def write_files(z: np.ndarray, out: Path, *, unit: str = "m", cell: float = 2.0):
    """The site's hierarchy and its three files written into ``out`` by the one writer."""
    dem = dem_from_array(z, transform=grid(cell), vertical_unit=unit)
    result = analyse_site(dem, build_outlets(dem, ("edge",)))
    written = write_hierarchy_files(ArraySource(dem, result), out)
    return dem, site_hierarchy(dem, result), dict(zip(("csv", "json", "curves"), written.files))


@pytest.fixture(scope="module")
def nested():
    return site(nested_elevation())


@pytest.fixture(scope="module")
def files(nested, tmp_path_factory):
    out = tmp_path_factory.mktemp("hierarchy")
    _, h, paths = write_files(nested_elevation(), out)
    assert [p.name for p in paths.values()] == list(he.HIERARCHY_FILE_NAMES)
    return out, paths


def read_table(path: Path) -> tuple[list[str], list[dict[str, str]]]:
    lines = path.read_text(encoding="utf-8").splitlines()
    comments = [line for line in lines if line.startswith("# ")]
    rows = list(csv.DictReader(line for line in lines if not line.startswith("#")))
    return comments, rows


def f32(text: str) -> float:
    return float("nan") if text == "" else float(np.float32(text))


def same32(text: str, value) -> bool:
    """The CSV text reads back as exactly this float32 (empty for NaN)."""
    v = np.float32(value)
    return (text == "") if np.isnan(v) else np.float32(text) == v


# --------------------------------------------------------------------------- the node table


def test_the_fixture_is_nested_as_drawn(nested):
    _, h = nested
    t = h.nodes
    # Two pits under one node merging at 4 m, spilling at 7 m; the hollow alone.
    assert len(t) == 4 and h.children(3).tolist() == [1, 2]
    assert [float(v) for v in t.spill_elevation] == [4.0, 4.0, 7.0, 9.0]
    # 2 m cells: 4 m² each. Trench at 7 m: (7-1) + (7-4) + (7-2) = 14 m × 4 m² = 56 m³;
    # the hollow at 9 m: 4 m × 4 m² = 16 m³.
    assert t.volume_m3.tolist() == [12.0, 8.0, 56.0, 16.0]


def test_csv_round_trip_gives_the_table_values(nested, files):
    dem, h = nested
    comments, rows = read_table(files[1]["csv"])
    t = h.nodes
    assert len(rows) == len(t)
    header = list(rows[0])
    for name in ("pit_elevation_m", "merge_elevation_m", "spill_elevation_m", "max_depth_m",
                 "spill_x_m", "spill_y_m", "area_m2", "volume_m3", "children", "spill_lon_deg"):
        assert name in header
    for k, row in enumerate(rows):
        v = k + 1
        for name in ("id", "parent", "depression", "subtree_size", "pit_row", "pit_col",
                     "spill_row", "spill_col", "cell_count"):
            assert int(row[name]) == int(getattr(t, name)[k]), (v, name)
        assert row["is_leaf"] == ("true" if t.is_leaf[k] else "false")
        for name in ("pit_elevation", "merge_elevation", "spill_elevation", "max_depth"):
            assert same32(row[f"{name}_m"], getattr(t, name)[k]), (v, name)
        for name in ("spill_x", "spill_y"):
            assert float(row[f"{name}_m"]) == float(getattr(t, name)[k])
        assert float(row["area_m2"]) == float(t.area_m2[k])
        assert float(row["volume_m3"]) == float(t.volume_m3[k])
        kids = [int(c) for c in row["children"].split(";")] if row["children"] else []
        assert kids == h.children(v).tolist()
    assert rows[0]["merge_elevation_m"] == ""  # a pit has no merge elevation
    assert rows[2]["children"] == "1;2"
    assert comments == []  # the header is the first line; caution and units in README.txt


def test_json_holds_every_node_with_the_caution_and_units(nested, files):
    _, h = nested
    doc = json.loads(files[1]["json"].read_text(encoding="utf-8"))
    assert doc["caution"] == SCREENING_CAUTION
    assert doc["vertical_unit"] == "m" and doc["crs"].startswith("EPSG:32633")
    assert doc["units"]["spill_elevation"] == "m" and doc["units"]["volume_m3"] == "m3"
    assert doc["node_count"] == len(h) == len(doc["nodes"])
    for node in doc["nodes"]:
        expected = h.nodes.row(node["id"])
        assert set(node) == set(expected)
        for name, value in expected.items():
            if name in ("pit_elevation", "merge_elevation", "spill_elevation", "max_depth"):
                got = node[name]
                assert (got is None and value is None) or np.float32(got) == np.float32(value), name
            else:
                assert node[name] == value, name


# --------------------------------------------------------------------------- curves


def test_curves_are_every_breakpoint_of_every_node(nested, files):
    dem, h = nested
    comments, rows = read_table(files[1]["curves"])
    assert comments == []
    assert list(rows[0]) == ["node_id", "depression", "point", "elevation_m", "area_m2", "storage_m3"]
    for v in range(1, len(h) + 1):
        mine = [r for r in rows if int(r["node_id"]) == v]
        curve = h.curve(v)
        assert [f32(r["elevation_m"]) for r in mine] == curve.elevation.tolist()
        np.testing.assert_allclose([float(r["area_m2"]) for r in mine], curve.area_m2)
        np.testing.assert_allclose([float(r["storage_m3"]) for r in mine], curve.storage_m3)
        assert mine[0]["point"] == "pit" and mine[-1]["point"] == "spill"
        assert {int(r["depression"]) for r in mine} == {int(h.nodes.depression[v - 1])}


def test_storage_at_the_spill_elevation_is_the_table_volume(nested, files):
    _, h = nested
    _, rows = read_table(files[1]["curves"])
    t = h.nodes
    for v in range(1, len(t) + 1):
        spill = [r for r in rows if int(r["node_id"]) == v and r["point"] == "spill"]
        assert len(spill) == 1
        assert same32(spill[0]["elevation_m"], t.spill_elevation[v - 1])
        assert float(spill[0]["storage_m3"]) == float(t.volume_m3[v - 1])
        assert float(spill[0]["area_m2"]) == float(t.area_m2[v - 1])
    # The trench node: its children meet at 4 m, where the two pools hold 12 + 8 m³.
    merge = [r for r in rows if int(r["node_id"]) == 3 and r["point"] == "merge"]
    assert [(f32(r["elevation_m"]), float(r["storage_m3"])) for r in merge] == [(4.0, 20.0)]


def test_a_node_with_many_breakpoints_is_sampled_at_a_step(nested):
    dem, h = nested
    # With at most 3 breakpoints per node the trench top (pit 1, merge 4, then
    # ground of 2 and 4 on the way, spill 7) is sampled instead.
    cols = he.curve_columns(h, dem, max_points=3, step_rows=4)
    top = cols["node_id"] == 3
    levels = cols["elevation_m"][top].astype(float)
    points = cols["point"][top].tolist()
    # Depth 6 m in at most 4 steps: a step of 2 m (1-2-5 series) -> 2, 4, 6 between pit and spill;
    # 4 m is also the merge elevation.
    assert levels.tolist() == [1.0, 2.0, 4.0, 6.0, 7.0]
    assert points == ["pit", "step", "merge", "step", "spill"]
    exact = h.curve_at(3, levels)
    np.testing.assert_array_equal(cols["storage_m3"][top], exact.storage_m3)
    np.testing.assert_array_equal(cols["area_m2"][top], exact.area_m2)


def test_a_large_unrounded_depression_keeps_the_file_small(tmp_path):
    # A 60 × 60 bowl of unrounded random ground: 3 600 distinct elevations and
    # hundreds of nested pits, each node's exact curve repeating its children's.
    rng = np.random.default_rng(7)
    z = np.full((62, 62), 30.0, dtype=np.float32)
    z[1:-1, 1:-1] = (10.0 + 5.0 * rng.random((60, 60))).astype(np.float32)
    dem, h, paths = write_files(z, tmp_path, cell=1.0)
    _, rows = read_table(paths["curves"])
    per_node: dict[int, list] = {}
    for r in rows:
        per_node.setdefault(int(r["node_id"]), []).append(r)
    assert sorted(per_node) == list(range(1, len(h) + 1))
    assert max(len(mine) for mine in per_node.values()) <= he.MAX_CURVE_POINTS
    top = int(h.tops[0])
    mine = per_node[top]
    assert len(h.curve(top)) > he.MAX_CURVE_POINTS  # so the top is sampled
    assert [r["point"] for r in mine].count("step") <= he.STEP_ROWS
    assert mine[0]["point"] == "pit" and mine[-1]["point"] == "spill"
    assert float(mine[-1]["storage_m3"]) == float(h.nodes.volume_m3[top - 1])
    exact = h.curve_at(top, [f32(r["elevation_m"]) for r in mine])
    np.testing.assert_array_equal([float(r["storage_m3"]) for r in mine], exact.storage_m3)


def test_feet_site_names_its_units_and_adds_acre_feet(tmp_path):
    dem, h = site(nested_elevation(), unit="ft")
    cols = he.curve_columns(h, dem)
    assert "elevation_ft" in cols
    np.testing.assert_allclose(cols["storage_acre_ft"], cols["storage_m3"] / ACRE_FOOT_M3)
    table = he.hierarchy_columns(h, dem)
    assert "spill_elevation_ft" in table and "volume_acre_ft" in table
    _, _, paths = write_files(nested_elevation(), tmp_path, unit="ft")
    doc = json.loads(paths["json"].read_text())
    assert doc["units"]["pit_elevation"] == "ft" and doc["vertical_unit"] == "ft"
    _, rows = read_table(paths["curves"])
    assert "storage_acre_ft" in rows[0] and "elevation_ft" in rows[0]


def test_a_site_without_depressions_writes_empty_files(tmp_path):
    dem, h, paths = write_files(np.arange(48, dtype=np.float32).reshape(6, 8), tmp_path)
    assert len(h) == 0
    for path in (paths["csv"], paths["curves"]):
        comments, rows = read_table(path)
        assert rows == [] and comments == []
        assert path.read_text().count("\n") == 1  # the header row alone
    doc = json.loads(paths["json"].read_text())
    assert doc["nodes"] == [] and doc["caution"] == SCREENING_CAUTION
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # scratch removed


def test_a_hierarchy_of_another_dem_is_refused(nested, tmp_path):
    dem, h = nested
    other = dem_from_array(np.zeros((3, 3), dtype=np.float32))
    with pytest.raises(InvalidParameter, match="compute it from a result on this DEM"):
        he.hierarchy_columns(h, other)
    feet = dem_from_array(nested_elevation(), transform=grid(2.0), vertical_unit="ft")
    with pytest.raises(InvalidParameter, match="vertical unit"):
        he.curve_columns(h, feet)
    # The writer is given a result and its DEM together: a result of another grid is refused.
    result = analyse_site(dem, build_outlets(dem, ("edge",)))
    with pytest.raises(InvalidParameter, match="computed on this DEM"):
        write_hierarchy_files(ArraySource(other, result), tmp_path)
    with pytest.raises(InvalidParameter, match="window_cells"):
        write_hierarchy_files(ArraySource(dem, result), tmp_path, window_cells=0)
    with pytest.raises(InvalidParameter, match="give a folder"):
        write_hierarchy_files(ArraySource(dem, result), tmp_path / "missing")
    assert list(tmp_path.iterdir()) == []


# --------------------------------------------------------------------------- with the other results


def test_write_results_adds_the_three_files_before_the_summary(nested, files, tmp_path):
    dem, h = nested
    result = analyse_site(dem, build_outlets(dem, ("edge",)))
    outlets = build_outlets(dem, ("edge",))
    paths = write_results(result, dem, outlets, tmp_path / "a")
    names = [p.name for p in paths]
    assert names[-5:] == [*he.HIERARCHY_FILE_NAMES, "README.txt", "summary.json"]
    assert names == [*FILE_NAMES[:-1], "README.txt", FILE_NAMES[-1]]
    summary = json.loads((tmp_path / "a" / "summary.json").read_text())
    assert summary["files"] == names
    # The summary states the curves file's rows and its cap (nothing thinned here).
    curves = summary["depression_curves"]
    lines = (tmp_path / "a" / he.CURVES_CSV).read_text().splitlines()
    assert curves["rows"] == len(lines) - 1 and not lines[0].startswith("#")
    assert curves["rows"] == curves["rows_before_thinning"] and curves["thinning"] == "none"
    assert curves["max_rows"] == 200_000 and curves["listed_nodes"] == len(h)
    # The files of the one hierarchy writer, whose contents the tests above read.
    for name in he.HIERARCHY_FILE_NAMES:
        assert (tmp_path / "a" / name).read_bytes() == (files[0] / name).read_bytes()
    assert not [p for p in (tmp_path / "a").iterdir() if p.name.startswith(".")]


# --------------------------------------------------------------------------- row texts


@pytest.mark.parametrize("words", [
    ["pit", "step", "spill"],                    # plain: joined without the csv module
    ["a,b", 'say "x"', "two\nlines"],            # need quotes: the csv module writes them
    ["", "pit", ""],                             # empty texts beside numbers
])
def test_rows_are_what_the_csv_module_writes(words):
    import io

    cols = {
        "n": np.arange(3, dtype=np.int32),
        "word": np.array(words, dtype=object),
        "z": np.array([1.5, np.nan, -0.25], dtype=np.float32),
        "v": np.array([1e-7, 2.0, np.inf]),
    }
    texts = [["0", words[0], "1.5", "0.0000001"], ["1", words[1], "", "2"],
             ["2", words[2], "-0.25", ""]]
    buffer = io.StringIO(newline="")
    csv.writer(buffer, lineterminator="\n").writerows(texts)
    assert he.csv_rows(cols) == buffer.getvalue()
    assert list(csv.reader(io.StringIO(he.csv_rows(cols), newline=""))) == texts


def test_a_single_empty_column_is_quoted_as_the_csv_module_does():
    assert he.csv_rows({"word": np.array(["", "x"], dtype=object)}) == '""\nx\n'


def test_a_hierarchy_built_once_gives_the_same_bytes(files, tmp_path):
    # The in-memory run builds the hierarchy once for significance and hands it to
    # the writer: the files must be the bytes the writer makes when it builds its own.
    out, paths = files
    z = nested_elevation()
    dem = dem_from_array(z, transform=grid(2.0))
    result = analyse_site(dem, build_outlets(dem, ("edge",)))
    source = ArraySource(dem, result)
    built = whole_hierarchy(source)
    # Both depressions; the window is their bounding box: the trench on row 2,
    # cols 1..3, and the hollow at row 4, col 6, so rows 2..4 and cols 1..6.
    assert built[1].tolist() == [1, 2, 2, 5, 1, 7]
    assert len(built[0].nodes) == 4  # two pits, their trench, the lone hollow
    written = write_hierarchy_files(source, tmp_path, hierarchy=built)
    for mine, theirs in zip(written.files, paths.values()):
        assert mine.read_bytes() == theirs.read_bytes()
    # A hierarchy of another batch, or with a map that builds its own, is refused.
    with pytest.raises(InvalidParameter, match="one batch"):
        write_hierarchy_files(source, tmp_path, hierarchy=(built[0], built[1] + 1))
    with pytest.raises(InvalidParameter, match="one batch"):
        write_hierarchy_files(source, tmp_path, hierarchy=built,
                              map=lambda fn, calls: [fn(c) for c in calls])
