"""Fixtures and helpers of the web tests: a small invented site, an app on a
temporary data folder, and a CSRF-aware test client.

The site ("Lowbank", invented): 40 × 50 cells of 2 m in UTM zone 33N. Ground
rises eastward from 10.00 m at the west edge (z = 10 + 0.05 · col). A walled
basin (rows 10–25, cols 15–35) lies at 9.00 m behind a bank at 12.00 m with a
notch at 11.00 m in its west wall (row 17, col 14); a nodata lake sits in the
south-east (rows 30–34, cols 40–45). With the DEM edge as outlet, the basin is
one depression spilling at 11.00 m: at a level of 10.5 m it is shielded low
ground, at 11.0 m it floods through the notch.
"""

from __future__ import annotations

import contextlib
import io
import re
import struct
import threading
import zlib
from pathlib import Path

import numpy as np
import pytest
from affine import Affine

from tests.rasters import write_raster

CELL = 2.0
WEST, NORTH = 500_000.0, 5_000_000.0
TRANSFORM = Affine(CELL, 0.0, WEST, 0.0, -CELL, NORTH)
NOTCH = (17, 14)
SPILL = 11.0


def lowbank_elevation() -> np.ndarray:
    rows, cols = 40, 50
    z = (10.0 + 0.05 * np.arange(cols, dtype=np.float64))[None, :].repeat(rows, axis=0)
    z[9:27, 14:37] = 12.0  # the bank
    z[10:26, 15:36] = 9.0  # the basin
    z[NOTCH] = SPILL  # the notch
    z[30:35, 40:46] = -9999.0  # the lake (nodata)
    return z.astype(np.float32)


def write_lowbank(path: Path) -> Path:
    return write_raster(path, lowbank_elevation(), transform=TRANSFORM, nodata=-9999.0)


def cell_centre(row: int, col: int) -> tuple[float, float]:
    return WEST + (col + 0.5) * CELL, NORTH - (row + 0.5) * CELL


def lonlat(x: float, y: float) -> tuple[float, float]:
    import pyproj

    t = pyproj.Transformer.from_crs("EPSG:32633", "OGC:CRS84", always_xy=True)
    lon, lat = t.transform(x, y)
    return float(lon), float(lat)


ASSETS_CSV = (
    "name,kind,x,y\n"
    f"Basin school,school,{cell_centre(18, 25)[0]},{cell_centre(18, 25)[1]}\n"
    f"Hill farm,farmhouse,{cell_centre(5, 45)[0]},{cell_centre(5, 45)[1]}\n"
    f"West pump,pumping_station,{cell_centre(38, 2)[0]},{cell_centre(38, 2)[1]}\n"
    "Far away,depot,400000,4000000\n"
)


# --------------------------------------------------------------------------- apps


def make_app(data_dir: Path, **overrides):
    from sillmark.web import create_app

    config = {
        "DATA_DIR": str(data_dir),
        "JOB_RUNNER": "inline",
        "REGISTER_DEMO": False,
        "WARM_ZOOMS": -1,
        "TESTING": True,
    }
    config.update(overrides)
    return create_app(config)


class Client:
    """The Flask test client, sending the session's CSRF token with every change."""

    def __init__(self, app) -> None:
        self.app = app
        self.raw = app.test_client()
        self.raw.get("/")  # a page: the session gets its token
        with self.raw.session_transaction() as s:
            self.token = s["csrf"]

    def get(self, *a, **k):
        return _buffered(self.raw.get(*a, **k))

    def post(self, url, *, headers=None, **k):
        h = {"X-Sillmark-Token": self.token}
        h.update(headers or {})
        return _buffered(self.raw.post(url, headers=h, **k))


def _buffered(response):
    """Read the whole body and close the response (file downloads hold a file open)."""
    response.get_data()
    response.close()
    return response


def upload_dem(client: Client, path: Path, *, name: str | None = None):
    body = path.read_bytes()
    return client.post("/uploads/dem", data=body, headers={
        "Content-Type": "application/octet-stream",
        "X-File-Name": name or path.name,
        "Accept": "application/json",
    })


def confirm(client: Client, site_id: int, *, unit: str = "m", outlets=("edge",), connectivity="8",
            water: tuple[bytes, str] | None = None, name: str | None = None,
            vertical_accuracy: str | None = None):
    data = {"vertical_unit": unit, "outlet": list(outlets), "connectivity": connectivity}
    if vertical_accuracy is not None:
        data["vertical_accuracy"] = vertical_accuracy
    if name is not None:
        data["name"] = name
    if water is not None:
        data["water"] = (io.BytesIO(water[0]), water[1])
    return client.post(f"/uploads/sites/{site_id}/settings", data=data,
                       content_type="multipart/form-data", headers={"Accept": "application/json"})


def analysed_site(client: Client, dem_path: Path, *, assets: bool | str = True,
                  vertical_accuracy: str | None = None) -> int:
    """Upload, confirm (analysed inline) and give assets to a site; its id.

    ``assets``: True for Lowbank's :data:`ASSETS_CSV`, a CSV text of a site's
    own, or False for none."""
    r = upload_dem(client, dem_path)
    assert r.status_code == 201, r.get_data(as_text=True)
    site_id = r.get_json()["site_id"]
    r = confirm(client, site_id, vertical_accuracy=vertical_accuracy)
    assert r.status_code == 202, r.get_data(as_text=True)
    status = client.get(f"/api/sites/{site_id}/status").get_json()
    assert status["state"] == "ready", status
    if assets:
        csv = ASSETS_CSV if assets is True else assets
        r = client.post(f"/uploads/sites/{site_id}/assets",
                        data={"assets": (io.BytesIO(csv.encode()), "assets.csv")},
                        content_type="multipart/form-data")
        assert r.status_code == 201, r.get_data(as_text=True)
    return site_id


@pytest.fixture(scope="module")
def lowbank_tif(tmp_path_factory) -> Path:
    return write_lowbank(tmp_path_factory.mktemp("lowbank") / "lowbank.tif")


@pytest.fixture(scope="module")
def ready(tmp_path_factory, lowbank_tif):
    """(app, client, site_id): one analysed Lowbank site with assets, shared by a module."""
    app = make_app(tmp_path_factory.mktemp("data"))
    client = Client(app)
    site_id = analysed_site(client, lowbank_tif)
    return app, client, site_id


@pytest.fixture
def fresh(tmp_path):
    """(app, client): an empty app on its own data folder."""
    app = make_app(tmp_path / "data")
    return app, Client(app)


@pytest.fixture(scope="module")
def reference(lowbank_tif):
    """The engine run directly on the Lowbank DEM (edge outlets, D8): what the app must match."""
    from sillmark.engine.flood import analyse_site
    from sillmark.grid.dem import read_dem
    from sillmark.grid.outlets import build_outlets

    dem = read_dem(lowbank_tif)
    outlets = build_outlets(dem, ("edge",))
    return dem, outlets, analyse_site(dem, outlets)


# --------------------------------------------------------------------------- PNG reading


def read_png(data: bytes) -> dict:
    """Decode the PNGs Sillmark writes (8-bit palette or RGBA, no interlace, filter 0)."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    pos, chunks, idat = 8, {}, b""
    while pos < len(data):
        (n,) = struct.unpack(">I", data[pos:pos + 4])
        kind = data[pos + 4:pos + 8]
        body = data[pos + 8:pos + 8 + n]
        (crc,) = struct.unpack(">I", data[pos + 8 + n:pos + 12 + n])
        assert crc == zlib.crc32(kind + body) & 0xFFFFFFFF
        if kind == b"IDAT":
            idat += body
        else:
            chunks[kind] = body
        pos += 12 + n
    w, h, depth, colour, _, _, interlace = struct.unpack(">IIBBBBB", chunks[b"IHDR"])
    assert depth == 8 and interlace == 0
    channels = {3: 1, 6: 4}[colour]
    raw = np.frombuffer(zlib.decompress(idat), dtype=np.uint8).reshape(h, w * channels + 1)
    assert np.all(raw[:, 0] == 0)
    pixels = raw[:, 1:].reshape(h, w, channels)
    out = {"width": w, "height": h, "colour_type": colour, "pixels": pixels}
    if colour == 3:
        out["palette"] = np.frombuffer(chunks[b"PLTE"], dtype=np.uint8).reshape(-1, 3)
        out["alpha"] = np.frombuffer(chunks.get(b"tRNS", b""), dtype=np.uint8)
        out["pixels"] = pixels[..., 0]
    return out


EXTERNAL = re.compile(r"""(?:src|href|action)\s*=\s*["']?\s*(?:https?:)?//""", re.I)
CSS_URL = re.compile(r"""url\(\s*["']?\s*(?:https?:)?//""", re.I)


def external_references(html: str) -> list[str]:
    """Attributes and CSS urls in ``html`` that point at another origin."""
    found = [m.group(0) for m in EXTERNAL.finditer(html)]
    found += [m.group(0) for m in CSS_URL.finditer(html)]
    return found


@contextlib.contextmanager
def served_app(app):
    """The app served by waitress on a free loopback port (4 threads), as its origin
    URL; the server and the app's job runner stop afterwards."""
    import waitress

    srv = waitress.create_server(app, host="127.0.0.1", port=0, threads=4)
    threading.Thread(target=srv.run, daemon=True).start()
    try:
        yield f"http://127.0.0.1:{srv.effective_port}"
    finally:
        srv.close()
        app.extensions["sillmark"].runner.stop()
