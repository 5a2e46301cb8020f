"""Build the Sillmark demo site: Caddlewick on the River Torvey (an invented place).

Run from the repository root:

    python demo_dem/build_demo.py

It writes, next to this file:

    riverbend.tif            float32 GeoTIFF DEM (EPSG:32632, 1 m, nodata -9999)
    riverbend_assets.csv     points of concern: name,kind,x,y in the DEM CRS
    riverbend_assets.geojson the same points in WGS84 (RFC 7946)
    river.geojson            the river centreline in WGS84, to mark as an outlet

Everything here is made up for the demo: the town, the river, the terrain and the
assets. The coordinates only place the grid in a real projected CRS; the DEM does
not depict the ground at that location.

The script is deterministic (fixed seed) and uses numpy, rasterio and pyproj.
Every feature is placed by a small function below, from the constants in the
next block. Grid positions are (col, row) in cells, row 0 at the north edge,
col 0 at the west edge. Elevations are metres above the datum.
"""

from __future__ import annotations

import csv
import io
import json
import os
import tempfile
from pathlib import Path

import numpy as np
import rasterio
from pyproj import Transformer
from rasterio.transform import from_origin

HERE = Path(__file__).resolve().parent
SEED = 7351  # fixed: the same DEM on every run

# --------------------------------------------------------------------------- grid
ROWS, COLS = 1600, 2000
CELL = 1.0  # m
CRS = "EPSG:32632"  # WGS 84 / UTM zone 32N
X_WEST, Y_NORTH = 468000.0, 5412000.0  # outer corner of the top-left cell
NODATA = -9999.0

# ---------------------------------------------------------------- valley surface
FP_WEST, FP_EAST = 46.30, 45.80  # floodplain level beside the river, west / east edge
FP_CROSS_SLOPE = 0.002  # floodplain rises 2 mm per m away from the river
RIVER_ROW_AT_EDGES = 640.0  # the river enters and leaves at this row
RIVER_BEND_DEPTH = 240.0  # the bend reaches this many rows further south mid-grid
NORTH_FOOT_ROW = 380.0  # foot of the north valley side (town side)
NORTH_RISE, NORTH_KNEE = 0.075, 70.0  # north side: rise ~ NORTH_RISE * u^2 / (u + KNEE)
SOUTH_FOOT_ROW = 1180.0  # foot of the south valley side
SOUTH_STEP, SOUTH_STEP_WIDTH = 10.5, 220.0  # south side climbs 10.5 m over 220 m ...
SOUTH_BENCH_SLOPE = 0.008  # ... onto a farmed bench rising 0.8 %
NOISE_CORR_SHORT, NOISE_CORR_LONG = 35.0, 140.0  # m, correlation lengths of roughness
NOISE_AMP_FLAT, NOISE_AMP_PER_SLOPE, NOISE_AMP_MAX = 0.03, 2.0, 0.20  # m

# ------------------------------------------------------------------ river Torvey
RIVER_BED_DEPTH = 3.0  # bed below the floodplain level
RIVER_BED_HALF_WIDTH = 9.0  # m, flat bed
RIVER_BANK_SLOPE = 0.35  # rise per m on the banks

# ------------------------------------------------ Caddlewick flood bank (levee)
LEVEE_COL_WEST, LEVEE_COL_EAST = 600, 1400  # river-side run of the bank
LEVEE_OFFSET = 60.0  # m north of the channel centreline
LEVEE_TIE_WEST = (570.0, 300.0)  # (col, row) where it ties into the valley side
LEVEE_TIE_EAST = (1440.0, 300.0)
LEVEE_CREST_UP, LEVEE_CREST_DOWN = 48.40, 48.20  # crest at the west / east tie-in
LEVEE_NOTCH_COL = 1000  # the notch sits on the river-side run nearest this column
LEVEE_NOTCH = 47.60  # lowest point of the crest: the spill point of the town
LEVEE_NOTCH_HALF_LENGTH, LEVEE_NOTCH_RAMP = 3.0, 0.12  # m; rise per m out of the notch
LEVEE_CREST_HALF_WIDTH, LEVEE_SIDE_SLOPE = 2.5, 1.0 / 3.0

# old meander scar ("the Carr") on the protected side
CARR_CENTRE = (1000.0, 780.0)  # (col, row)
CARR_RADIUS, CARR_HALF_WIDTH, CARR_DEPTH = 220.0, 16.0, 0.9
CARR_ARC_DEG = (25.0, 155.0)  # arc north of the centre

# ------------------------------------------ Ford Road embankment and Kiln Brook
# Kiln Brook comes down a side valley from the south edge; Ford Road crosses its
# mouth on an embankment with no culvert, so the brook ponds behind it.
TRIB_COL_AT_FOOT = 1480.0  # brook axis where it meets the south valley foot
TRIB_MOUTH = 46.60  # brook bed at the valley foot (about floodplain level there)
TRIB_GRADE, TRIB_GRADE_CURVE = 0.004, 3.0e-5  # bed rise: GRADE*v + CURVE*v^2 (v in m)
TRIB_FLOOR_HALF_WIDTH, TRIB_SIDE_SLOPE = 18.0, 0.12
TRIB_DITCH_DEPTH = 0.5  # the brook's ditch across the floodplain to the river
ROAD_POINTS = [  # (col, row, crest elevation); None = the brook sag sets it
    (1150.0, 905.0, 48.60),  # south abutment of Torvey Bridge
    (1400.0, 1273.0, 51.00),  # on the slope west of the brook
    (1600.0, 1290.0, 51.30),  # on the slope east of the brook
    (1700.0, 1330.0, 52.20),
    (1820.0, 1599.0, 56.50),  # leaves the grid at the south edge
]
ROAD_LOW = 48.00  # crest where Ford Road dips over Kiln Brook: no culvert
ROAD_SAG_LENGTH = 30.0  # m from the low spot at which the crest is 1 m higher
ROAD_CREST_HALF_WIDTH, ROAD_SIDE_SLOPE = 3.5, 0.5

# ---------------------------------------------------- Torvey Mill gravel pit lake
PIT_CENTRE = (380.0, 1000.0)  # (col, row)
PIT_SEMI_AXES = (160.0, 80.0)  # m, along the long / short axis
PIT_ROTATION_DEG = 20.0
PIT_WATER = 44.60  # ground at the water's edge; the lake itself is nodata
PIT_BANK_SLOPE = 0.4
PIT_BUND_CREST, PIT_BUND_GAP = 47.20, 46.90  # spoil bund round the pit, one low gap
PIT_BUND_OFFSET, PIT_BUND_HALF_WIDTH = 14.0, 2.0  # m outside the water's edge
PIT_BUND_GAP_ANGLE_DEG = 95.0  # direction of the gap from the centre (90 = north)

# -------------------------------------------------------------------- farm ponds
# name, (col, row), radius m, spill elevation, depth below spill m, downhill (dcol, drow)
PONDS = [
    ("Top Field pond", (300.0, 1480.0), 18.0, 60.30, 1.6, (0.0, -1.0)),
    ("Dairy pond", (520.0, 1530.0), 14.0, 60.70, 1.4, (0.0, -1.0)),
    ("Sheepwash pond", (180.0, 1560.0), 12.0, 61.10, 1.2, (0.0, -1.0)),
    ("Kiln Field pond", (1800.0, 1450.0), 16.0, 59.60, 1.5, (0.0, -1.0)),
    ("Hill pond", (300.0, 170.0), 15.0, 60.70, 1.5, (0.0, 1.0)),
]
POND_BANK_WIDTH, POND_BANK_FREEBOARD = 6.0, 0.30

# -------------------------------------------- the Hollows: three nested kettle holes
HOLLOWS_CENTRE = (890.0, 1490.0)
HOLLOWS_SEMI_AXES = (130.0, 65.0)  # raised hummock the holes sit in (cols, rows)
HOLLOWS_PLATE = 60.30  # hummock surface is at least this high
HOLLOWS_BOWL_TOP = 60.50  # bowls reach this at their radius
HOLLOWS_BOWL_RADIUS = 45.0
HOLLOW_PITS = {  # name: ((col, row), pit elevation)
    "West Hollow": ((840.0, 1490.0), 58.20),
    "Middle Hollow": ((890.0, 1490.0), 58.60),
    "East Hollow": ((940.0, 1490.0), 58.90),
}
HOLLOWS_SADDLE_WM = 59.20  # West + Middle merge here (col 865)
HOLLOWS_SADDLE_ME = 59.60  # ... and then take in East Hollow (col 915)
HOLLOWS_SILL = 60.00  # the whole group spills north over this sill
HOLLOWS_SILL_POINT = (940.0, 1436.0)  # (col, row), inside the full-height hummock
SADDLE_HALF_THICKNESS, SADDLE_HALF_LENGTH = 1.5, 30.0
SPILLWAY_GRADE = 0.004  # fall per m of a spillway ditch, gentler than the bench so it daylights

# ---------------------------------------------------------- survey gap (nodata)
GAP_CORNER_RADII = (150.0, 95.0)  # m, along the north edge / down the east edge

# ------------------------------------------------------------------------ assets
ASSETS = [  # name, kind, (col, row)
    ("Caddlewick Primary School", "school", (900.0, 560.0)),
    ("Alder Court Care Home", "care_home", (1120.0, 650.0)),
    ("Mill Lane Substation", "substation", (1010.0, 770.0)),
    ("Carr Lane Pumping Station", "pumping_station", (1230.0, 742.0)),
    ("Caddlewick Health Centre", "health_centre", (760.0, 470.0)),
    ("Caddlewick Fire Station", "fire_station", (1000.0, 300.0)),
    ("St Aldric's Hall rest centre", "rest_centre", (800.0, 180.0)),
    ("Torvey Water Treatment Works", "water_treatment", (1700.0, 650.0)),
    ("Torvey Bridge south approach", "bridge_approach", (1165.0, 925.0)),
    ("Riverside Meadow Campsite", "campsite", (800.0, 960.0)),
    ("Pit Lake Watersports Centre", "activity_centre", (330.0, 900.0)),
    ("Lower Ford Farm", "farmhouse", (1512.0, 1318.0)),
    ("Bench Top Farm", "farmhouse", (400.0, 1470.0)),
    ("Kiln Field Farm", "farmhouse", (1760.0, 1480.0)),
]

# ----------------------------------------------- roads and refuges (for the cut-off stage)
ROADS = [  # name, [(col, row), ...]: the lanes people would leave by
    ("Church Street", [(800.0, 180.0), (800.0, 300.0), (760.0, 470.0), (900.0, 560.0)]),
    ("Hall Road", [(800.0, 180.0), (1000.0, 300.0)]),
    ("Mill Lane", [(1000.0, 300.0), (1010.0, 560.0), (1010.0, 770.0)]),
    ("Alder Row", [(1010.0, 560.0), (1120.0, 650.0), (1230.0, 742.0)]),
    ("Works Road", [(1000.0, 300.0), (1440.0, 290.0), (1700.0, 650.0)]),
    ("Ford Road", [(c, r) for c, r, _ in ROAD_POINTS]),
    ("Meadow Lane", [(330.0, 900.0), (560.0, 880.0), (800.0, 960.0), (1165.0, 925.0),
                     (1150.0, 905.0)]),
    ("Ford Farm lane", [(1512.0, 1318.0), (1530.0, 1284.0)]),
    ("Bench Lane", [(400.0, 1470.0), (800.0, 1420.0), (1300.0, 1380.0), (1400.0, 1273.0)]),
    ("Kiln Field lane", [(1760.0, 1480.0), (1767.0, 1480.0)]),
]
REFUGES = [  # name, polygon [(col, row), ...]
    ("St Aldric's Hall rest centre", [(780.0, 165.0), (820.0, 165.0), (820.0, 195.0), (780.0, 195.0)]),
    ("Kiln Bench muster field", [(1790.0, 1560.0), (1850.0, 1560.0), (1850.0, 1599.0),
                                 (1790.0, 1599.0)]),
]

# town building pads (level platforms), placed on a street grid
TOWN_BLOCKS = [  # (col0, col1, row0, row1)
    (660, 1340, 430, 740),  # the lower town behind the flood bank
    (640, 1360, 200, 400),  # the upper town on the valley side
]
LOT_PITCH = (30, 24)  # m between lot origins (cols, rows)
PAD_SIZE = (14, 10)  # m
PAD_RAISE = 0.15  # pad level above the median ground of its footprint


# ============================================================ geometry helpers
def cell_centres() -> tuple[np.ndarray, np.ndarray]:
    """Column and row of every cell centre, as float64 grids (in cells)."""
    rows, cols = np.mgrid[0:ROWS, 0:COLS].astype(np.float64)
    return cols + 0.5, rows + 0.5


def xy_of(col: float, row: float) -> tuple[float, float]:
    """Map coordinates of a grid position (col, row in cells)."""
    return X_WEST + col * CELL, Y_NORTH - row * CELL


def smoothstep(t: np.ndarray) -> np.ndarray:
    t = np.clip(t, 0.0, 1.0)
    return t * t * (3.0 - 2.0 * t)


def smooth_noise(rng: np.random.Generator, corr: float) -> np.ndarray:
    """Unit-variance Gaussian-correlated noise with correlation length ``corr`` (m)."""
    white = rng.standard_normal((ROWS, COLS))
    fy = np.fft.fftfreq(ROWS, d=CELL)[:, None]
    fx = np.fft.rfftfreq(COLS, d=CELL)[None, :]
    kernel = np.exp(-2.0 * (np.pi * corr) ** 2 * (fx**2 + fy**2))
    field = np.fft.irfft2(np.fft.rfft2(white) * kernel, s=(ROWS, COLS))
    return field / field.std()


def polyline_distance(points, reach: float):
    """Distance (m) from each cell centre to a polyline and the chainage of the nearest point.

    ``points`` are (col, row) vertices. Cells further than ``reach`` keep an infinite
    distance. Returns (distance, chainage, total length), all in metres.
    """
    pts = np.asarray(points, dtype=np.float64)
    dist = np.full((ROWS, COLS), np.inf)
    chain = np.zeros((ROWS, COLS))
    start = 0.0
    for (c0, r0), (c1, r1) in zip(pts[:-1], pts[1:]):
        seg_len = float(np.hypot(c1 - c0, r1 - r0))
        ra = max(int(min(r0, r1) - reach) - 1, 0)
        rb = min(int(max(r0, r1) + reach) + 2, ROWS)
        ca = max(int(min(c0, c1) - reach) - 1, 0)
        cb = min(int(max(c0, c1) + reach) + 2, COLS)
        rr, cc = np.mgrid[ra:rb, ca:cb].astype(np.float64)
        rr += 0.5
        cc += 0.5
        t = ((cc - c0) * (c1 - c0) + (rr - r0) * (r1 - r0)) / seg_len**2
        t = np.clip(t, 0.0, 1.0)
        d = np.hypot(cc - (c0 + t * (c1 - c0)), rr - (r0 + t * (r1 - r0))) * CELL
        win_d = dist[ra:rb, ca:cb]
        closer = d < win_d
        win_d[closer] = d[closer]
        chain[ra:rb, ca:cb][closer] = (start + t * seg_len)[closer] * CELL
        start += seg_len
    dist[dist > reach] = np.inf
    return dist, chain, start * CELL


def vertex_chainages(points) -> np.ndarray:
    pts = np.asarray(points, dtype=np.float64)[:, :2]
    steps = np.hypot(np.diff(pts[:, 0]), np.diff(pts[:, 1])) * CELL
    return np.concatenate([[0.0], np.cumsum(steps)])


# ================================================================ the valley
def river_row(col):
    """Row of the river centreline at a column: one broad bend to the south."""
    return RIVER_ROW_AT_EDGES + RIVER_BEND_DEPTH * np.sin(np.pi * np.asarray(col) / COLS)


def river_row_slope(col):
    return RIVER_BEND_DEPTH * np.pi / COLS * np.cos(np.pi * np.asarray(col) / COLS)


def river_offset(cols, rows):
    """Signed distance (m) from the river centreline, positive to the south."""
    return (rows - river_row(cols)) * CELL / np.sqrt(1.0 + river_row_slope(cols) ** 2)


def floodplain_level(cols):
    return FP_WEST + (FP_EAST - FP_WEST) * np.asarray(cols) / COLS


def north_foot(cols):
    return NORTH_FOOT_ROW + 25.0 * np.sin(cols / 260.0)


def south_foot(cols):
    return SOUTH_FOOT_ROW + 25.0 * np.sin(cols / 250.0 + 1.0)


def valley_surface(cols, rows, rng) -> np.ndarray:
    """Floodplain with a gentle cross-fall to the river, valley sides, and roughness."""
    z = floodplain_level(cols) + FP_CROSS_SLOPE * np.abs(river_offset(cols, rows))
    u = np.maximum(north_foot(cols) - rows, 0.0) * CELL
    z += NORTH_RISE * u * u / (u + NORTH_KNEE)
    v = np.maximum(rows - south_foot(cols), 0.0) * CELL
    z += SOUTH_STEP * smoothstep(v / SOUTH_STEP_WIDTH) + SOUTH_BENCH_SLOPE * v * smoothstep(v / 80.0)
    gy, gx = np.gradient(z, CELL)
    amp = np.clip(NOISE_AMP_FLAT + NOISE_AMP_PER_SLOPE * np.hypot(gx, gy), 0.0, NOISE_AMP_MAX)
    rough = 0.6 * smooth_noise(rng, NOISE_CORR_SHORT) + 0.8 * smooth_noise(rng, NOISE_CORR_LONG)
    return z + amp * rough


def carve_river(z, cols, rows) -> None:
    """River Torvey: flat bed 3 m below the floodplain, falling to the east edge."""
    d = np.abs(river_offset(cols, rows))
    bed = floodplain_level(cols) - RIVER_BED_DEPTH
    channel = bed + RIVER_BANK_SLOPE * np.maximum(d - RIVER_BED_HALF_WIDTH, 0.0)
    np.minimum(z, channel, out=z)


def river_centreline(step: float = 10.0):
    """(col, row) vertices of the river centreline, west edge to east edge (flow is east)."""
    cols = np.append(np.arange(0.5, COLS - 0.5, step), COLS - 0.5)
    return list(zip(cols, river_row(cols)))


def carve_carr(z, cols, rows) -> None:
    """The Carr: a shallow crescent (old meander) in the low town behind the bank."""
    cc, rc = CARR_CENTRE
    r = np.hypot(cols - cc, rows - rc) * CELL
    ang = np.degrees(np.arctan2(rc - rows, cols - cc))
    a0, a1 = CARR_ARC_DEG
    across = np.cos(0.5 * np.pi * np.clip((r - CARR_RADIUS) / CARR_HALF_WIDTH, -1, 1)) ** 2
    along = smoothstep((ang - a0) / 12.0) * smoothstep((a1 - ang) / 12.0)
    z -= CARR_DEPTH * across * along


# ================================================================ the town
def levee_line():
    """Vertices (col, row) of the flood bank: tie-in, river-side run, tie-in."""
    cols = np.arange(LEVEE_COL_WEST, LEVEE_COL_EAST + 1, 20.0)
    k = river_row_slope(cols)
    norm = np.sqrt(1.0 + k * k)
    run = list(zip(cols + LEVEE_OFFSET * k / norm, river_row(cols) - LEVEE_OFFSET / norm))
    return [LEVEE_TIE_WEST, *run, LEVEE_TIE_EAST]


def build_levee(z) -> dict:
    """Earth flood bank round the lower town, with one low notch in its crest."""
    pts = levee_line()
    reach = LEVEE_CREST_HALF_WIDTH + 3.0 / LEVEE_SIDE_SLOPE
    dist, s, length = polyline_distance(pts, reach)
    s_vertex = vertex_chainages(pts)
    notch_i = 1 + int(np.argmin([abs(c - LEVEE_NOTCH_COL) for c, _ in pts[1:-1]]))
    s_notch = s_vertex[notch_i]
    crest = LEVEE_CREST_UP + (LEVEE_CREST_DOWN - LEVEE_CREST_UP) * s / length
    dip = LEVEE_NOTCH + LEVEE_NOTCH_RAMP * np.maximum(np.abs(s - s_notch) - LEVEE_NOTCH_HALF_LENGTH, 0)
    crest = np.minimum(crest, dip)
    bank = crest - LEVEE_SIDE_SLOPE * np.maximum(dist - LEVEE_CREST_HALF_WIDTH, 0.0)
    np.maximum(z, np.where(np.isfinite(dist), bank, -np.inf), out=z)
    return {"notch_colrow": pts[notch_i], "length_m": length}


def build_pads(z, rng) -> int:
    """Level building platforms on a street grid (cut and fill to one level each)."""
    count = 0
    for c0, c1, r0, r1 in TOWN_BLOCKS:
        for r in range(r0, r1 - PAD_SIZE[1], LOT_PITCH[1]):
            for c in range(c0, c1 - PAD_SIZE[0], LOT_PITCH[0]):
                if rng.random() < 0.35:
                    continue
                foot = z[r : r + PAD_SIZE[1], c : c + PAD_SIZE[0]]
                foot[...] = np.median(foot) + PAD_RAISE
                count += 1
    return count


# ============================================================ road and brook
def brook_axis_col(rows):
    t = np.maximum(rows - SOUTH_FOOT_ROW, 0.0)
    return TRIB_COL_AT_FOOT + 0.15 * t + 12.0 * np.sin(t / 50.0)


def carve_brook(z, cols, rows) -> None:
    """Kiln Brook: a side valley from the south edge, then a ditch to the river."""
    v = np.maximum(rows - south_foot(cols), 0.0) * CELL
    bed = TRIB_MOUTH + TRIB_GRADE * v + TRIB_GRADE_CURVE * v * v
    across = np.abs(cols - brook_axis_col(rows)) * CELL
    valley = bed + TRIB_SIDE_SLOPE * np.maximum(across - TRIB_FLOOR_HALF_WIDTH, 0.0)
    np.minimum(z, np.where(rows > south_foot(cols), valley, np.inf), out=z)
    # ditch across the floodplain, from the valley mouth north to the river bank
    mouth_col = float(brook_axis_col(np.array(SOUTH_FOOT_ROW)))
    mouth_row = float(south_foot(np.array(mouth_col)))
    bank_row = float(river_row(mouth_col)) + RIVER_BED_HALF_WIDTH + 4.0
    dist, s, length = polyline_distance([(mouth_col, mouth_row + 2.0), (mouth_col, bank_row)], 3.0)
    bed_end = float(floodplain_level(mouth_col)) - RIVER_BED_DEPTH + 1.5
    ditch = TRIB_MOUTH - TRIB_DITCH_DEPTH + (bed_end - TRIB_MOUTH + TRIB_DITCH_DEPTH) * s / length
    np.minimum(z, np.where(np.isfinite(dist), ditch, np.inf), out=z)


def build_road(z) -> dict:
    """Ford Road on an embankment from the bridge, dipping across Kiln Brook (no culvert).

    The crest has a single low spot along its length: ``ROAD_LOW`` over the brook.
    """
    pts = [(c, r) for c, r, _ in ROAD_POINTS]
    reach = ROAD_CREST_HALF_WIDTH + 4.0 / ROAD_SIDE_SLOPE
    dist, s, _ = polyline_distance(pts, reach)
    s_vertex = vertex_chainages(pts)
    crest = np.interp(s, s_vertex, [e for _, _, e in ROAD_POINTS])
    # the low spot: where the road line crosses the brook axis
    fine = np.linspace(0.0, s_vertex[-1], 4000)
    fc = np.interp(fine, s_vertex, [c for c, _ in pts])
    fr = np.interp(fine, s_vertex, [r for _, r in pts])
    i_low = int(np.argmin(np.abs(fc - brook_axis_col(fr)) + 1e3 * (fr < SOUTH_FOOT_ROW)))
    s_low = fine[i_low]
    sag = ROAD_LOW + ((s - s_low) / ROAD_SAG_LENGTH) ** 2
    crest = np.minimum(crest, sag)
    # fill: side slopes below the crest; the carriageway itself is cut or filled to grade
    surface = crest - ROAD_SIDE_SLOPE * np.maximum(dist - ROAD_CREST_HALF_WIDTH, 0.0)
    np.maximum(z, np.where(np.isfinite(dist), surface, -np.inf), out=z)
    carriageway = dist <= ROAD_CREST_HALF_WIDTH
    z[carriageway] = crest[carriageway]
    return {"low_colrow": (float(fc[i_low]), float(fr[i_low]))}


# ============================================================ gravel pit lake
def build_gravel_pit(z, cols, rows) -> np.ndarray:
    """Flooded gravel pit: steep banks, a spoil bund with one gap; returns the lake mask."""
    cc, rc = PIT_CENTRE
    a, b = PIT_SEMI_AXES
    th = np.radians(PIT_ROTATION_DEG)
    dx, dy = (cols - cc) * CELL, (rc - rows) * CELL  # dy positive to the north
    u = dx * np.cos(th) + dy * np.sin(th)
    w = -dx * np.sin(th) + dy * np.cos(th)
    ang = np.arctan2(dy, dx)
    wobble = 1.0 + 0.06 * np.sin(3 * ang + 0.7) + 0.04 * np.sin(5 * ang + 2.1)
    rho = np.sqrt((u / a) ** 2 + (w / b) ** 2) / wobble
    q = (rho - 1.0) * b  # approximate distance outside the water's edge, m
    lake = q <= 0.0
    bank = PIT_WATER + PIT_BANK_SLOPE * np.maximum(q, 0.0)
    np.minimum(z, np.where(q < 20.0, bank, np.inf), out=z)
    gap_dir = np.radians(PIT_BUND_GAP_ANGLE_DEG)
    gap_off = np.abs(np.angle(np.exp(1j * (ang - gap_dir)))) * np.hypot(dx, dy)  # m along the bund
    crest = np.where(gap_off < 3.0, PIT_BUND_GAP, PIT_BUND_CREST)
    bund = crest - 0.5 * np.maximum(np.abs(q - PIT_BUND_OFFSET) - PIT_BUND_HALF_WIDTH, 0.0)
    np.maximum(z, np.where(np.abs(q - PIT_BUND_OFFSET) < 6.0, bund, -np.inf), out=z)
    return lake


# ================================================================ farm ponds
def build_pond(z, cols, rows, centre, radius, spill, depth, downhill) -> None:
    """A dug farm pond: bowl, a bank all round, one spillway at exactly ``spill``."""
    cc, rc = centre
    dc, dr = downhill
    r = np.hypot(cols - cc, rows - rc) * CELL
    top = spill + POND_BANK_FREEBOARD
    bowl = (spill - depth) + (top - spill + depth) * (r / radius) ** 2
    np.minimum(z, np.where(r < radius, bowl, np.inf), out=z)
    ring = (r >= radius) & (r < radius + POND_BANK_WIDTH)
    z[ring] = np.maximum(z[ring], top)
    along = (cols - cc) * dc + (rows - rc) * dr  # m along the spillway direction
    side = np.abs((cols - cc) * dr - (rows - rc) * dc)
    way = (side < 1.6) & (along > 0) & (r < radius + POND_BANK_WIDTH + 40.0)
    profile = np.where(along <= radius + POND_BANK_WIDTH, spill,
                       spill - SPILLWAY_GRADE * (along - radius - POND_BANK_WIDTH))
    z[way] = np.minimum(z[way], profile[way])


def build_ponds(z, cols, rows) -> None:
    for _, centre, radius, spill, depth, downhill in PONDS:
        build_pond(z, cols, rows, centre, radius, spill, depth, downhill)


# ================================================================ the Hollows
def build_hollows(z, cols, rows) -> None:
    """Three kettle holes in a hummock: two merge, then the third, then all spill north."""
    hc, hr = HOLLOWS_CENTRE
    ha, hb = HOLLOWS_SEMI_AXES
    ell = np.sqrt(((cols - hc) / ha) ** 2 + ((rows - hr) / hb) ** 2)
    outside = np.maximum(ell - 1.0, 0.0) * hb * CELL  # rough distance outside the hummock
    np.maximum(z, np.where(ell < 1.5, HOLLOWS_PLATE - 0.25 * outside, -np.inf), out=z)
    for (pc, pr), pit in HOLLOW_PITS.values():
        r = np.hypot(cols - pc, rows - pr) * CELL
        bowl = pit + (HOLLOWS_BOWL_TOP - pit) * (r / HOLLOWS_BOWL_RADIUS) ** 3
        np.minimum(z, np.where(r < HOLLOWS_BOWL_RADIUS, bowl, np.inf), out=z)
    west, middle, east = (HOLLOW_PITS[k][0] for k in ("West Hollow", "Middle Hollow", "East Hollow"))
    for (p, q), saddle in (((west, middle), HOLLOWS_SADDLE_WM), ((middle, east), HOLLOWS_SADDLE_ME)):
        mid_c = 0.5 * (p[0] + q[0])
        wall = (np.abs(cols - mid_c) <= SADDLE_HALF_THICKNESS) & (np.abs(rows - p[1]) <= SADDLE_HALF_LENGTH)
        z[wall] = np.maximum(z[wall], saddle)
    # spillway from East Hollow north over the sill and down onto the bench
    sc, sr = HOLLOWS_SILL_POINT
    (_, er), _ = HOLLOW_PITS["East Hollow"]
    t = (er - rows) * CELL  # m north of the East Hollow centre
    t_sill = (er - sr) * CELL
    way = (np.abs(cols - sc) < 1.6) & (t > 25.0) & (t < t_sill + 60.0)
    profile = HOLLOWS_SILL - SPILLWAY_GRADE * np.abs(t - t_sill)
    z[way] = np.minimum(z[way], profile[way])


# ======================================================================= nodata
def survey_gap(cols, rows) -> np.ndarray:
    """Unsurveyed patch in the north-east corner, touching both edges."""
    a, b = GAP_CORNER_RADII
    ang = np.arctan2(rows, COLS - cols)
    wob = 1.0 + 0.08 * np.sin(7 * ang) + 0.05 * np.sin(13 * ang + 1.0)
    return np.hypot((COLS - cols) / a, rows / b) < wob


# ======================================================================= output
def _atomic_write(path: Path, write) -> None:
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix="." + path.name, suffix=".tmp")
    os.close(fd)
    try:
        write(tmp)
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.remove(tmp)


def write_dem(path: Path, z: np.ndarray) -> None:
    profile = {
        "driver": "GTiff", "width": COLS, "height": ROWS, "count": 1, "dtype": "float32",
        "crs": CRS, "transform": from_origin(X_WEST, Y_NORTH, CELL, CELL), "nodata": NODATA,
        "tiled": True, "blockxsize": 256, "blockysize": 256,
        "compress": "deflate", "predictor": 3, "zlevel": 9,
    }

    def write(tmp):
        with rasterio.open(tmp, "w", **profile) as dst:
            dst.write(z, 1)
            dst.update_tags(1, UNITS="m")
            dst.update_tags(SOURCE="Invented demo terrain built by demo_dem/build_demo.py")

    _atomic_write(path, write)


def _write_text(path: Path, text: str) -> None:
    def write(tmp):
        with open(tmp, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)

    _atomic_write(path, write)


def write_vectors() -> None:
    to_wgs84 = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True)
    rows = [(name, kind, *xy_of(c, r)) for name, kind, (c, r) in ASSETS]
    table = io.StringIO()
    writer = csv.writer(table, lineterminator="\n")
    writer.writerow(["name", "kind", "x", "y"])
    writer.writerows([name, kind, f"{x:.2f}", f"{y:.2f}"] for name, kind, x, y in rows)
    _write_text(HERE / "riverbend_assets.csv", table.getvalue())

    features = []
    for name, kind, x, y in rows:
        lon, lat = to_wgs84.transform(x, y)
        features.append({"type": "Feature", "properties": {"name": name, "kind": kind},
                         "geometry": {"type": "Point", "coordinates": [round(lon, 7), round(lat, 7)]}})
    assets = {"type": "FeatureCollection", "features": features}
    _write_text(HERE / "riverbend_assets.geojson", json.dumps(assets, indent=1) + "\n")

    xs, ys = zip(*(xy_of(c, r) for c, r in river_centreline()))
    lon, lat = to_wgs84.transform(np.array(xs), np.array(ys))
    river = {"type": "FeatureCollection", "features": [{
        "type": "Feature",
        "properties": {"name": "River Torvey", "kind": "river_centreline", "flow": "west to east"},
        "geometry": {"type": "LineString",
                     "coordinates": [[round(float(a), 7), round(float(b), 7)] for a, b in zip(lon, lat)]},
    }]}
    _write_text(HERE / "river.geojson", json.dumps(river) + "\n")
    write_access_vectors(to_wgs84)


def write_access_vectors(to_wgs84) -> None:
    """``roads.geojson`` (lines) and ``refuges.geojson`` (polygons) in WGS84."""
    def lonlat(points):
        xs, ys = zip(*(xy_of(c, r) for c, r in points))
        lon, lat = to_wgs84.transform(np.array(xs), np.array(ys))
        return [[round(float(a), 7), round(float(b), 7)] for a, b in zip(lon, lat)]

    roads = {"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"name": name},
         "geometry": {"type": "LineString", "coordinates": lonlat(points)}}
        for name, points in ROADS]}
    _write_text(HERE / "roads.geojson", json.dumps(roads) + "\n")
    refuges = {"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"name": name},
         "geometry": {"type": "Polygon", "coordinates": [lonlat([*ring, ring[0]])]}}
        for name, ring in REFUGES]}
    _write_text(HERE / "refuges.geojson", json.dumps(refuges) + "\n")


def main() -> None:
    rng = np.random.default_rng(SEED)
    cols, rows = cell_centres()
    z = valley_surface(cols, rows, rng)
    carve_brook(z, cols, rows)
    carve_river(z, cols, rows)
    carve_carr(z, cols, rows)
    pads = build_pads(z, rng)
    levee = build_levee(z)
    road = build_road(z)
    lake = build_gravel_pit(z, cols, rows)
    build_ponds(z, cols, rows)
    build_hollows(z, cols, rows)
    gap = survey_gap(cols, rows)

    dem = np.round(z, 2).astype(np.float32)
    dem[lake | gap] = NODATA
    tif = HERE / "riverbend.tif"
    write_dem(tif, dem)
    write_vectors()

    valid = dem != NODATA
    nc, nr = levee["notch_colrow"]
    lc, lr = road["low_colrow"]
    print(f"riverbend.tif: {ROWS} rows x {COLS} cols ({ROWS * COLS / 1e6:.1f} M cells), "
          f"cell {CELL:g} m, {CRS}")
    print(f"  bounds x {X_WEST:.0f}..{X_WEST + COLS * CELL:.0f}, y {Y_NORTH - ROWS * CELL:.0f}..{Y_NORTH:.0f}")
    print(f"  elevation {dem[valid].min():.2f} .. {dem[valid].max():.2f} m; "
          f"nodata {100 * (~valid).mean():.2f} % (pit lake {lake.sum()} cells, survey gap {gap.sum()} cells)")
    print(f"  file size {tif.stat().st_size / 1e6:.2f} MB; {pads} building pads")
    print(f"  flood bank notch {LEVEE_NOTCH:.2f} m at col {nc:.0f}, row {nr:.0f}; "
          f"Ford Road low spot {ROAD_LOW:.2f} m at col {lc:.0f}, row {lr:.0f}")
    print(f"  Hollows: saddles {HOLLOWS_SADDLE_WM:.2f} / {HOLLOWS_SADDLE_ME:.2f} m, sill {HOLLOWS_SILL:.2f} m")
    print(f"  wrote riverbend_assets.csv/.geojson ({len(ASSETS)} assets) and river.geojson")


if __name__ == "__main__":
    main()
