"""Files of the depression hierarchy: the node table, its JSON, and every node's curves.

=============================  ==========================================================
``depression_hierarchy.csv``   one row per node of :class:`sillmark.products.hierarchy.HierarchyTable`,
                               units in the column names, children as ``;``-separated ids
``depression_hierarchy.json``  :meth:`sillmark.products.hierarchy.DepressionHierarchy.to_json` (flat
                               node list) with the caution, the units of every field and the CRS
``depression_curves.csv``      stage–area and stage–storage of every node, long format:
                               one row per node and elevation
=============================  ==========================================================

The files follow the conventions of :mod:`sillmark.io.export` (``# `` comment lines
before a CSV header, the screening caution in every file, atomic writes) and lie
next to ``depressions.csv``; the ``depression`` column of the node table is the
``id`` of that file. This module holds the formats only: each file is a head and
runs of rows (:func:`csv_head`, :func:`csv_rows`, :func:`hierarchy_json_head`,
:func:`json_node_texts`), and :func:`sillmark.io.hierarchy_writer.write_hierarchy_files`
writes them, for a result in memory or a results folder, from windows of
depressions.

Curves
------
A node's curves are exact and piecewise linear between its *breakpoints* (its
pit, every distinct cell elevation of its region above the pit, its spill
elevation; see :class:`sillmark.products.hierarchy.StageCurve`). A node with at most
:data:`MAX_CURVE_POINTS` breakpoints gets a row at each of them, so linear
interpolation of storage between rows is exact. A node with more (a large
region of a DEM with unrounded elevations) gets rows at a fixed step of its own
instead, chosen among 1, 2 and 5 times a power of ten so that it spans the
node's depth in at most :data:`STEP_ROWS` steps, plus exact rows at its pit,
merge elevation and spill elevation; the values on those rows are still exact,
only the points between them are left out. On a site DEM with elevations in
centimetres the breakpoints are few (one per centimetre of depth at most), so
every node is written in full.

Every node has its whole curve, pit to spill, so a node's rows repeat the
levels of the nodes nested in it; the limits keep it at most a few hundred rows
whatever the DEM's precision or the nesting depth. Only the *listed* nodes
(every node by default; e.g. the significant depressions) have rows, and the
file holds at most ``max_curve_rows`` (default
:data:`sillmark.products.hierarchy_curves.DEFAULT_MAX_CURVE_ROWS`): past the cap
every node keeps its pit, merge and spill rows and every 2nd, 4th, ... row
(:mod:`sillmark.products.hierarchy_curves`), and the file's comment lines say
so. The rows are computed in time linear in the depression cells and the rows.
On the demo site: 77 nodes, about 2 300 rows, 100 kB.

``depression_hierarchy.json`` lists the listed nodes (all by default); the node
table CSV always lists every node.
"""

from __future__ import annotations

import csv
import io
import json
import os
import shutil
from collections.abc import Iterable
from pathlib import Path
from typing import TYPE_CHECKING, TextIO

import numpy as np

from sillmark import SCREENING_CAUTION, __version__
from sillmark.errors import InvalidParameter
from sillmark.grid.crs import (
    crs_label,
    horizontal_crs,
    horizontal_unit_suffix,
    wgs84_transformer,
)
from sillmark.io.atomic import atomic_output
from sillmark.io.csv_tables import ROWS_AT_ONCE, rows_text
from sillmark.products import hierarchy_curves
from sillmark.products.hierarchy import DepressionHierarchy, HierarchyTable
from sillmark.units import VerticalUnit, own_unit_columns, unit_name, unit_suffix

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.grid.dem import DEM

__all__ = [
    "CURVES_CSV",
    "HIERARCHY_CSV",
    "HIERARCHY_FILE_NAMES",
    "HIERARCHY_JSON",
    "MAX_CURVE_POINTS",
    "STEP_ROWS",
    "csv_head",
    "csv_rows",
    "curve_columns",
    "curve_part_columns",
    "curve_row_columns",
    "curves_csv_comments",
    "hierarchy_columns",
    "hierarchy_csv_comments",
    "hierarchy_json_head",
    "json_node_texts",
    "node_table_columns",
    "write_csv_parts",
    "write_json_parts",
]

HIERARCHY_CSV = "depression_hierarchy.csv"
HIERARCHY_JSON = "depression_hierarchy.json"
CURVES_CSV = "depression_curves.csv"
#: The three file names, in the order :func:`sillmark.io.export.write_results` writes them.
HIERARCHY_FILE_NAMES = (HIERARCHY_CSV, HIERARCHY_JSON, CURVES_CSV)

#: A node with at most this many breakpoints has every one of them in the curves file.
#: (The demo's deepest node, 2.08 m of ground in centimetres, has 209.)
MAX_CURVE_POINTS = 250
#: Most steps a node with more breakpoints is sampled at (pit, merge and spill come on top).
STEP_ROWS = 100

#: Values of the ``point`` column of the curves file.
POINT_PIT = "pit"
POINT_BREAKPOINT = "breakpoint"
POINT_STEP = "step"
POINT_MERGE = "merge"
POINT_SPILL = "spill"

_CHILD_SEPARATOR = ";"
#: Node fields held as float32, in the vertical unit.
_FLOAT32_FIELDS = ("pit_elevation", "merge_elevation", "spill_elevation", "max_depth")


# --------------------------------------------------------------------------- checks


def _check(hierarchy: DepressionHierarchy, dem: "DEM") -> VerticalUnit:
    if not isinstance(hierarchy, DepressionHierarchy):
        raise InvalidParameter(
            f"expected a DepressionHierarchy from sillmark.products.hierarchy_sweep.site_hierarchy(), not "
            f"{type(hierarchy).__name__}"
        )
    if tuple(hierarchy.shape) != tuple(dem.shape):
        raise InvalidParameter(
            f"the hierarchy is for a {hierarchy.shape[0]} x {hierarchy.shape[1]} grid but the "
            f"DEM is {dem.rows} x {dem.cols}; compute it from a result on this DEM"
        )
    unit = VerticalUnit.parse(dem.vertical_unit)
    if hierarchy.unit is not unit:
        raise InvalidParameter(
            f"the hierarchy is in {hierarchy.unit.value} but the DEM in {unit.value}; compute "
            "it with the DEM's vertical unit (site_hierarchy does)"
        )
    horizontal_crs(dem)  # InvalidDEM before anything is written if there is no CRS
    return unit


def _comment_head(title: str, unit: VerticalUnit, connectivity: int, dem: "DEM") -> list[str]:
    return [
        f"Sillmark {__version__} {title}",
        f"CAUTION: {SCREENING_CAUTION}",
        f"vertical unit: {unit.value} ({unit_name(unit)}); areas in m2, volumes in m3",
        f"CRS: {crs_label(dem)}",
        f"connectivity: {connectivity}",
    ]


# --------------------------------------------------------------------------- node table


def hierarchy_columns(hierarchy: DepressionHierarchy, dem: "DEM") -> dict[str, np.ndarray]:
    """The node table with units in the column names, in file order.

    Every :class:`~sillmark.products.hierarchy.HierarchyTable` column appears under its
    own name, elevations and depths with the vertical-unit suffix (``_m``,
    ``_ft``, ``_us_ft``) and the spill point's CRS coordinates with the CRS's
    unit (``spill_x_m`` ...). ``is_leaf`` is ``true`` or ``false``;
    ``children`` lists the children ids separated by ``;``, lowest pit first
    (empty for a pit). Added: the spill point in WGS84 (``spill_lon_deg``,
    ``spill_lat_deg``), ``area_ha`` and, for sites in feet, ``area_ft2``,
    ``area_acres`` and ``volume_acre_ft``.
    """
    unit = _check(hierarchy, dem)
    return node_table_columns(hierarchy.nodes, unit, dem)


def node_table_columns(t: HierarchyTable, unit: VerticalUnit, dem: "DEM", *,
                       listed: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """:func:`hierarchy_columns` of a node table (or a run of its rows) in ``unit``.

    Row by row the same values whatever rows the table holds, so the writer
    (:mod:`sillmark.io.hierarchy_writer`) gives the file of the whole table
    from its pieces. ``dem`` may be a :class:`~sillmark.grid.dem_grid.DEMGrid`.
    ``listed`` (boolean per row of ``t``) keeps only those rows, and only the
    listed children in each row's list (a node's children are rows of the same
    table: a batch holds whole depressions); the listed nodes of a significance
    minimum hold every ancestor of theirs, so parents stay listed.
    """
    v = unit_suffix(unit)
    h = horizontal_unit_suffix(dem)
    n = len(t)
    starts, child_ids = t.children_start, t.children_ids
    if listed is not None:
        listed = np.asarray(listed, dtype=bool)
        owner = np.repeat(np.arange(n), np.diff(starts))
        ids = np.asarray(t.id)
        order = np.argsort(ids, kind="stable")
        at = np.searchsorted(ids[order], child_ids)
        found = (at < n) & (ids[order][np.minimum(at, max(n - 1, 0))] == child_ids) if n else \
            np.zeros(len(child_ids), bool)
        shown = np.zeros(len(child_ids), bool)
        shown[found] = listed[order[at[found]]]
        counts = np.bincount(owner[shown], minlength=n)
        starts = np.concatenate([[0], np.cumsum(counts)]).astype(starts.dtype)
        child_ids = child_ids[shown]
    # Only the rows kept are formatted and reprojected (a significance minimum
    # may keep a few hundred of a million nodes); the others come out as NaN and
    # empty text, then are dropped below.
    kept = np.arange(n) if listed is None else np.flatnonzero(listed)
    lon = np.full(n, np.nan)
    lat = np.full(n, np.nan)
    ok = np.zeros(n, dtype=bool)
    ok[kept] = np.isfinite(t.spill_x[kept]) & np.isfinite(t.spill_y[kept])
    if ok.any():
        lon[ok], lat[ok] = wgs84_transformer(dem).transform(t.spill_x[ok], t.spill_y[ok])
    children = np.full(n, "", dtype=object)
    children[kept] = _children_texts(starts, child_ids, kept, "", "", _CHILD_SEPARATOR)
    area = np.asarray(t.area_m2, dtype=np.float64)
    volume = np.asarray(t.volume_m3, dtype=np.float64)
    cols: dict[str, np.ndarray] = {
        "id": t.id,
        "parent": t.parent,
        "depression": t.depression,
        "is_leaf": np.where(t.is_leaf, "true", "false"),
        "subtree_size": t.subtree_size,
        "children": children,
        "pit_row": t.pit_row,
        "pit_col": t.pit_col,
        f"pit_elevation_{v}": t.pit_elevation,
        f"merge_elevation_{v}": t.merge_elevation,
        f"spill_elevation_{v}": t.spill_elevation,
        "spill_row": t.spill_row,
        "spill_col": t.spill_col,
        f"spill_x_{h}": t.spill_x,
        f"spill_y_{h}": t.spill_y,
        "spill_lon_deg": np.round(lon, 8),
        "spill_lat_deg": np.round(lat, 8),
        f"max_depth_{v}": t.max_depth,
        "cell_count": t.cell_count,
        "area_m2": area,
        "area_ha": area / 1e4,
        "volume_m3": volume,
    }
    cols.update(own_unit_columns(unit, area_m2=area, volume_m3=volume))
    if listed is not None:
        cols = {name: np.asarray(values)[listed] for name, values in cols.items()}
    return cols


def hierarchy_csv_comments(unit: VerticalUnit, connectivity: int, dem: "DEM") -> list[str]:
    """The ``# `` comment lines of ``depression_hierarchy.csv``."""
    v = unit_suffix(unit)
    return _comment_head("depression hierarchy", unit, connectivity, dem) + [
        "one row per node: the pits (is_leaf = true) and the pools formed where pools meet; "
        "ids in post-order (children before their parent)",
        "parent: id of the node this one merges into, 0 = a top (a whole depression of "
        "depressions.csv, whose id is in the column 'depression')",
        f"children: ids of the nodes that meet at merge_elevation_{v}, ';'-separated, lowest "
        "pit first; empty for a pit",
        f"spill_elevation_{v}: level at which the node meets a sibling (for a top: the "
        "depression's spill elevation); spill_row, spill_col: a cell where it does",
        "area_m2, volume_m3: plan area and storage of the node's region full to its spill "
        "elevation; stage curves in depression_curves.csv",
        "pit_row, pit_col, spill_row, spill_col: 0-based cell indices, rows from the top; "
        "spill_lon_deg, spill_lat_deg: the spill cell in WGS84 degrees",
    ]


def hierarchy_json_head(unit: VerticalUnit, connectivity: int, dem: "DEM", node_count: int,
                        *, all_nodes: int | None = None) -> str:
    """The text of ``depression_hierarchy.json`` before its first node: every
    member up to ``"nodes":[``, in file order (the node count included).

    ``node_count`` is the number of nodes the file lists; when it lists only
    some of the hierarchy's ``all_nodes`` (the listed ones), the head says so.
    """
    h = horizontal_unit_suffix(dem)
    units = {name: unit.value for name in _FLOAT32_FIELDS}
    units.update({"spill_x": h, "spill_y": h, "area_m2": "m2", "volume_m3": "m3"})
    members = {
        "name": "depression_hierarchy",
        "sillmark_version": __version__,
        "caution": SCREENING_CAUTION,
        "crs": crs_label(dem),
        "units": units,
        # The members of DepressionHierarchy.to_json, in its order.
        "vertical_unit": unit.value,
        "area_unit": "m2",
        "volume_unit": "m3",
        "connectivity": int(connectivity),
        "node_count": int(node_count),
    }
    if all_nodes is not None and int(all_nodes) != int(node_count):
        members["hierarchy_node_count"] = int(all_nodes)
        members["listed_only"] = ("the nodes listed (e.g. the significant depressions); every "
                                  "node is in depression_hierarchy.csv")
    return json_text(members)[:-1] + ',"nodes":['


def json_node_texts(t: HierarchyTable, listed: np.ndarray | None = None) -> list[str]:
    """Each node of a table (the ``listed`` ones, default all) as its JSON object text,
    in id order.

    The object of :meth:`~sillmark.products.hierarchy.HierarchyTable.row` (every column,
    then ``children``), with the float32 fields (elevations, depth) as their
    shortest decimals, as in the CSV (59.2, not 59.20000076293945); each reads
    back as the same float32. NaN is null. The text is what :func:`json_text`
    gives for that object, built a column at a time.
    """
    keep = np.arange(len(t)) if listed is None else np.flatnonzero(listed)
    names = t.columns
    texts = [_json_column(np.asarray(getattr(t, name))[keep]) for name in names]
    texts.append(_children_texts(t.children_start, t.children_ids, keep, "[", "]", ","))
    template = "{" + ",".join(f"{json_text(name)}:%s" for name in (*names, "children")) + "}"
    return [template % row for row in zip(*texts)]


def write_json_nodes(f, t: HierarchyTable, listed: np.ndarray | None = None, *,
                     chunk: int = ROWS_AT_ONCE) -> int:
    """Write :func:`json_node_texts` joined by commas (a part of ``"nodes"``) to the
    open text file ``f``, ``chunk`` nodes at a time; returns the number written."""
    keep = np.ones(len(t), dtype=bool) if listed is None else np.asarray(listed, dtype=bool)
    written = 0
    for a in range(0, len(t), chunk):
        part = json_node_texts(_rows_of(t, a, a + chunk), keep[a:a + chunk])
        if part:
            f.write(("," if written else "") + ",".join(part))
            written += len(part)
    return written


def _rows_of(t: HierarchyTable, a: int, b: int) -> HierarchyTable:
    """Rows ``a:b`` of a node table (children lists re-based, ids unchanged)."""
    b = min(b, len(t))
    lo, hi = int(t.children_start[a]), int(t.children_start[b])
    fields = {name: getattr(t, name)[a:b] for name in t.columns}
    return HierarchyTable(**fields, children_start=t.children_start[a:b + 1] - lo,
                          children_ids=t.children_ids[lo:hi])


def _json_column(values: np.ndarray) -> list[str]:
    """JSON texts of a column: ints, true/false, float32 as their shortest decimal
    (``json_number``), float64 as Python writes them, NaN as null."""
    kind = values.dtype.kind
    if kind == "b":
        return ["true" if v else "false" for v in values.tolist()]
    if kind in "iu":
        return list(map(str, values.tolist()))
    shortest = values.astype(str).tolist() if values.dtype == np.float32 else None
    floats = [float(v) for v in shortest] if shortest is not None else values.tolist()
    return ["null" if v != v else repr(v) for v in floats]


def _children_texts(children_start: np.ndarray, children_ids: np.ndarray, keep: np.ndarray,
                    open_: str, close: str, sep: str) -> list[str]:
    """Children ids of the nodes ``keep`` (zero-based), each list as text."""
    ids = list(map(str, children_ids.tolist()))
    bounds = np.asarray(children_start).tolist()
    return [open_ + sep.join(ids[bounds[k]:bounds[k + 1]]) + close for k in keep.tolist()]


def json_text(value) -> str:
    return json.dumps(value, ensure_ascii=False, allow_nan=False, separators=(",", ":"))


# --------------------------------------------------------------------------- streamed files
#
# Each file is a head, then its body in runs of rows (or nodes): one run (a part
# file) per window of depressions, so any cut into windows gives the same bytes.


def csv_head(columns: dict | Iterable[str]) -> str:
    """The header row of a table CSV, the file's first line (as
    :func:`sillmark.io.csv_tables.write_table_csv` writes it)."""
    return _csv_text([list(columns)])


def csv_rows(columns: dict[str, np.ndarray]) -> str:
    """The rows of a table CSV, as :func:`sillmark.io.csv_tables.write_table_csv` writes
    them (:func:`sillmark.io.csv_tables.rows_text`)."""
    return rows_text(columns)


def _csv_text(rows) -> str:
    buffer = io.StringIO(newline="")
    csv.writer(buffer, lineterminator="\n").writerows(rows)
    return buffer.getvalue()


def write_csv_parts(path: str | os.PathLike, head: str, parts: Iterable) -> Path:
    """Write a CSV atomically: ``head``, then each part in order.

    A part is a dict of columns (its rows are written, see :func:`csv_rows`) or
    the path of a file of rows already written that way (copied as it is).
    """
    final = Path(path)
    with atomic_output(final) as tmp:
        with open(tmp, "x", newline="", encoding="utf-8") as f:
            f.write(head)
            for part in parts:
                if isinstance(part, dict):
                    f.write(csv_rows(part))
                else:
                    _copy_text(part, f)
    return final


def write_json_parts(path: str | os.PathLike, head: str, parts: Iterable) -> Path:
    """Write ``depression_hierarchy.json`` atomically: ``head``
    (:func:`hierarchy_json_head`), the nodes of every part separated by commas,
    then the closing brackets and a newline.

    A part is an iterable of node texts (:func:`json_node_texts`) or the path of a
    file holding such texts already joined by commas (copied as it is; an empty
    file is a part without nodes).
    """
    final = Path(path)
    with atomic_output(final) as tmp:
        with open(tmp, "x", encoding="utf-8") as f:
            f.write(head)
            first = True
            for part in parts:
                if isinstance(part, (str, os.PathLike)):
                    if os.path.getsize(part) == 0:
                        continue
                    if not first:
                        f.write(",")
                    _copy_text(part, f)
                    first = False
                else:
                    for text in part:
                        if not first:
                            f.write(",")
                        f.write(text)
                        first = False
            f.write("]}\n")
    return final


def _copy_text(path: str | os.PathLike, out: TextIO) -> None:
    with open(path, encoding="utf-8", newline="") as f:
        shutil.copyfileobj(f, out, 1 << 20)


# --------------------------------------------------------------------------- curves


def curve_columns(
    hierarchy: DepressionHierarchy,
    dem: "DEM",
    *,
    max_points: int = MAX_CURVE_POINTS,
    step_rows: int = STEP_ROWS,
) -> dict[str, np.ndarray]:
    """Every node's stage–area and stage–storage curve, long format, in file order.

    Columns: ``node_id``, ``depression``, ``point`` (``pit``, ``breakpoint``,
    ``step``, ``merge`` or ``spill``), ``elevation_{u}`` (float32, the vertical
    unit's suffix), ``area_m2`` (area of the region's cells strictly below the
    elevation), ``storage_m3`` and, for sites in feet, ``area_ft2``,
    ``area_acres`` and ``storage_acre_ft``.
    Rows run node by node (ascending id), each from pit to spill elevation; see
    the module docstring for which elevations a node gets.

    Notes
    -----
    Values come from :meth:`~sillmark.products.hierarchy.DepressionHierarchy.curves_at`
    (:meth:`~sillmark.products.hierarchy.DepressionHierarchy.curve_at` of every node in
    one call), exact at every row. Memory: the rows themselves (about 30 bytes each).
    """
    unit = _check(hierarchy, dem)
    _check_curve_options(max_points, step_rows)
    return curve_part_columns(hierarchy, unit, max_points=max_points, step_rows=step_rows)


def _check_curve_options(max_points, step_rows) -> None:
    if isinstance(max_points, bool) or not isinstance(max_points, int) or max_points < 2:
        raise InvalidParameter(f"max_points must be a whole number of at least 2, not {max_points!r}")
    if isinstance(step_rows, bool) or not isinstance(step_rows, int) or step_rows < 1:
        raise InvalidParameter(f"step_rows must be a positive whole number, not {step_rows!r}")


def curve_part_columns(
    hierarchy: DepressionHierarchy,
    unit: VerticalUnit,
    *,
    max_points: int = MAX_CURVE_POINTS,
    step_rows: int = STEP_ROWS,
    node_offset: int = 0,
    depression_offset: int = 0,
    stride: np.ndarray | None = None,
) -> dict[str, np.ndarray]:
    """:func:`curve_columns` of a hierarchy that is one piece of a site's.

    For a hierarchy of a run of the site's depressions (its trees are those of
    depressions ``depression_offset + 1 ...``, its nodes the site's nodes
    ``node_offset + 1 ...``): the same rows as the site's curves file holds for
    those nodes, with the site's ids. Curves depend on a node's own subtree
    only, so the values are the same bits. ``stride`` (per node, see
    :func:`sillmark.products.hierarchy_curves.strides`; 0 leaves a node out)
    thins the rows; default every row of every node. The vertical unit is not
    checked.
    """
    counts = hierarchy_curves.natural_counts(hierarchy, max_points=max_points,
                                             step_rows=step_rows)
    if stride is None:
        stride = np.ones(len(hierarchy), dtype=np.int64)
    rows = hierarchy_curves.curve_rows(hierarchy, counts, stride, max_points=max_points,
                                       step_rows=step_rows)
    return curve_row_columns(rows, hierarchy.nodes.depression, unit, node_offset=node_offset,
                             depression_offset=depression_offset)


_POINT_NAMES = np.array(hierarchy_curves.POINT_NAMES, dtype=object)


def curve_row_columns(rows: "hierarchy_curves.CurveRows", depression: np.ndarray,
                      unit: VerticalUnit, *, node_offset: int = 0,
                      depression_offset: int = 0) -> dict[str, np.ndarray]:
    """The columns of ``depression_curves.csv`` for curve rows (``depression``: the
    depression of each node of their hierarchy, index ``id - 1``)."""
    storage = rows.storage_m3
    cols: dict[str, np.ndarray] = {
        "node_id": (rows.node + np.int32(node_offset)).astype(np.int32),
        "depression": (np.asarray(depression)[rows.node - 1].astype(np.int32)
                       + np.int32(depression_offset)) if len(rows) else np.zeros(0, np.int32),
        "point": _POINT_NAMES[rows.code],
        f"elevation_{unit_suffix(unit)}": rows.level.astype(np.float32),
        "area_m2": rows.area_m2,
        "storage_m3": storage,
    }
    cols.update(own_unit_columns(unit, area_m2=rows.area_m2, volume_m3=storage, volume_name="storage"))
    return cols


def curves_csv_comments(unit: VerticalUnit, connectivity: int, dem: "DEM", *,
                        max_points: int = MAX_CURVE_POINTS, step_rows: int = STEP_ROWS,
                        thinning: "hierarchy_curves.CurveThinning | None" = None,
                        listed: int | None = None, nodes: int | None = None) -> list[str]:
    """The ``# `` comment lines of ``depression_curves.csv``.

    ``thinning`` (the site's, from :func:`sillmark.products.hierarchy_curves.plan_thinning`),
    ``listed`` and ``nodes`` say which nodes have rows and how the cap thinned them.
    """
    v = unit_suffix(unit)
    lines = _comment_head("stage-area and stage-storage curves of the depression hierarchy",
                          unit, connectivity, dem) + [
        "one row per node and elevation, node by node (node_id = id in depression_hierarchy.csv, "
        "depression = id in depressions.csv), from the node's pit to its spill elevation",
        f"area_m2: area of the node's region below elevation_{v}; storage_m3: water it holds "
        f"with its surface at elevation_{v}",
        f"point: pit, merge (where its children meet), spill, breakpoint (a cell elevation: "
        f"nodes with at most {max_points} of them get every one, and storage is linear between rows), "
        f"step (nodes with more get rows at a fixed step spanning their depth in at most "
        f"{step_rows} steps; values are exact on every row, storage is convex between them)",
    ]
    if listed is not None and nodes is not None and listed != nodes:
        lines.append(f"nodes: the {listed} listed of the hierarchy's {nodes} (e.g. the "
                     "significant depressions)")
    if thinning is not None:
        if not thinning.thinned:
            lines.append(f"rows: {thinning.natural_rows}, within the cap of {thinning.max_rows}; "
                         "nothing thinned")
        elif not thinning.omits_nodes:
            lines.append(
                f"rows: capped at {thinning.max_rows} (the listed nodes have "
                f"{thinning.natural_rows}); each node keeps its pit, merge and spill rows and "
                f"every 2nd, 4th, ... row so that it has at most {thinning.budget}; values stay "
                "exact, storage is convex between rows")
        else:
            lines.append(
                f"rows: capped at {thinning.max_rows} (the listed nodes have "
                f"{thinning.natural_rows}); only the pit, merge and spill rows of the listed "
                "nodes with the largest volumes fit; the others have no rows")
    return lines
