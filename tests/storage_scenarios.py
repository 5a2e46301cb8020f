"""Storage scenarios of tests/web/test_web_crash.py: a full disk and a read-only data folder.

Each scenario mounts a real file system in a private mount namespace (the test
runs this module under ``unshare -m --propagation private``, so the mounts
vanish with the process and nothing outside sees them): a small tmpfs that is
filled up, or a read-only bind mount of the data folder. It drives the real
app (inline job runner) through the Flask test client and prints one JSON line
with what it saw; the test makes the assertions.

Usage: python -m tests.storage_scenarios full-disk|full-disk-upload|read-only-start|read-only-run WORKDIR
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import shutil
import socket
import subprocess
import sys
from pathlib import Path

import numpy as np

from tests.rasters import grid, write_raster
from tests.web_support import Client, analysed_site, make_app, upload_dem, write_lowbank
from sillmark.web import layout

#: Side of the DEM of the full-disk scenario: its results need several MiB.
FULL_DISK_SIDE = 700


def mount(*args: str) -> None:
    subprocess.run(["mount", *args], check=True, capture_output=True)


def read_only(path: Path) -> None:
    """Make ``path`` a read-only bind mount of itself (EROFS even for root)."""
    mount("--bind", str(path), str(path))
    mount("-o", "remount,ro,bind", str(path))


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def served(client: Client, site_id: int) -> dict:
    from sillmark.io.summary import FILE_NAMES

    out = {}
    for name in FILE_NAMES:
        r = client.get(f"/api/sites/{site_id}/files/results/{name}")
        out[name] = sha(r.get_data()) if r.status_code == 200 else r.status_code
    return out


def tile(client: Client, site_id: int) -> str:
    from sillmark.web import render

    w, s, e, n = client.get(f"/api/sites/{site_id}").get_json()["summary"]["lonlat_bounds"]
    x, y = render.lonlat_to_tile((w + e) / 2, (s + n) / 2, 17)
    r = client.get(f"/tiles/{site_id}/10.5/17/{x}/{y}.png")
    return sha(r.get_data()) if r.status_code == 200 else str(r.status_code)


def state(client: Client, site_id: int, level: float) -> dict:
    return {
        "current_run": client.get(f"/api/sites/{site_id}").get_json()["current_run"],
        "stage": client.get(f"/api/sites/{site_id}/stage?level={level}").get_json(),
        "files": served(client, site_id),
        "tile": tile(client, site_id),
    }


def fill(folder: Path, leave: int) -> Path:
    """Write a ballast file until the disk is full, then shrink it to leave ``leave`` bytes."""
    ballast = folder / f"ballast{len(list(folder.glob('ballast*')))}.bin"
    fd = os.open(ballast, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    try:
        for block in (1 << 20, 4096):  # big blocks, then what still fits
            chunk = b"\0" * block
            while True:
                try:
                    os.write(fd, chunk)
                except OSError as exc:
                    if exc.errno != errno.ENOSPC:
                        raise
                    break
    finally:
        os.close(fd)
    size = ballast.stat().st_size
    os.truncate(ballast, max(0, size - leave))
    return ballast


def full_disk(work: Path) -> dict:
    n = FULL_DISK_SIDE
    yy, xx = np.mgrid[0:n, 0:n].astype(np.float32) / n
    z = (10.0 + 8.0 * xx + 1.5 * np.sin(11.0 * xx) * np.cos(9.0 * yy)).astype(np.float32)
    dem = write_raster(work / "tarnby.tif", z, transform=grid(2.0), compress="deflate")
    data = work / "data"
    data.mkdir()
    mount("-t", "tmpfs", "-o", "size=96m", "tmpfs", str(data))
    app = make_app(data)
    client = Client(app)
    site_id = analysed_site(client, dem)
    level = 13.0
    before = state(client, site_id, level)
    out: dict = {"current_run_before": before["current_run"], "stage_before": before["stage"],
                 "files_before": before["files"], "tile_before": before["tile"]}

    ballast = fill(data, leave=1 << 20)
    out["free_before_rerun"] = shutil.disk_usage(data).free
    r = client.post(f"/api/sites/{site_id}/rerun")
    out["rerun_status"] = r.status_code
    failed_id = (r.get_json() or {}).get("run_id")
    out["failed"] = client.get(f"/api/sites/{site_id}/status").get_json()["run"]
    out["free_after_failure"] = shutil.disk_usage(data).free
    after = state(client, site_id, level)
    out.update(current_run_after_failure=after["current_run"], stage_after_failure=after["stage"],
               files_after_failure=after["files"], tile_after_failure=after["tile"])
    folder = layout.run_dir(data, site_id, failed_id) if failed_id else None
    out["failed_run_folder"] = sorted(os.listdir(folder)) if folder and folder.exists() else None

    for leftover in data.glob("ballast*"):
        leftover.unlink()
    del ballast
    r = client.post(f"/api/sites/{site_id}/rerun")
    out["final"] = client.get(f"/api/sites/{site_id}/status").get_json()["run"]
    out["stage_final"] = client.get(f"/api/sites/{site_id}/stage?level={level}").get_json()
    return out


def full_disk_upload(work: Path) -> dict:
    """A DEM uploaded to a server whose disk is full."""
    dem = write_lowbank(work / "lowbank.tif")
    data = work / "data"
    data.mkdir()
    mount("-t", "tmpfs", "-o", "size=8m", "tmpfs", str(data))
    client = Client(make_app(data))
    fill(data, leave=0)
    r = upload_dem(client, dem)
    body = r.get_json(silent=True) or {}
    return {"status": r.status_code, "error": body.get("error"),
            "left_in_uploads": sorted(os.listdir(layout.uploads_dir(data)))}


def read_only_start(work: Path) -> dict:
    """`sillmark serve` on a read-only data folder: an installation, and an empty folder."""
    existing = work / "existing"
    app = make_app(existing)
    client = Client(app)
    analysed_site(client, write_lowbank(work / "lowbank.tif"), assets=False)
    app.extensions["sillmark"].runner.stop()
    listing = sorted(str(p.relative_to(existing)) for p in existing.rglob("*"))
    digest = sha((existing / layout.DB_NAME).read_bytes())
    empty = work / "empty"
    empty.mkdir()
    read_only(existing)
    read_only(empty)
    out: dict = {}
    for name, folder in (("existing", existing), ("empty", empty)):
        try:
            proc = subprocess.run(
                [sys.executable, "-m", "sillmark", "serve", "--data", str(folder), "--port",
                 str(free_port())],
                capture_output=True, text=True, timeout=60)
            out[name] = {"exit_code": proc.returncode, "stderr": proc.stderr.strip()}
        except subprocess.TimeoutExpired:  # it served: the check failed
            out[name] = {"exit_code": None, "stderr": "served on a read-only folder"}
    out["untouched"] = (sorted(str(p.relative_to(existing)) for p in existing.rglob("*")) == listing
                        and sha((existing / layout.DB_NAME).read_bytes()) == digest)
    return out


def read_only_run(work: Path) -> dict:
    data = work / "data"
    app = make_app(data)
    client = Client(app)
    site_id = analysed_site(client, write_lowbank(work / "lowbank.tif"))
    level = 10.5
    before = state(client, site_id, level)
    out: dict = {"current_run_before": before["current_run"], "stage_before": before["stage"],
                 "files_before": before["files"]}

    # The site's folder turns read-only (the database beside it still takes changes).
    site_folder = layout.site_dir(data, site_id)
    read_only(site_folder)
    r = client.post(f"/api/sites/{site_id}/rerun")
    out["failed"] = client.get(f"/api/sites/{site_id}/status").get_json()["run"]
    after = state(client, site_id, level)
    out.update(current_run_after_failure=after["current_run"], stage_after_failure=after["stage"],
               files_after_failure=after["files"])

    # Now the whole data folder: reading goes on, changing is refused.
    read_only(data)
    r = client.post(f"/api/sites/{site_id}/rerun")
    out["rerun_when_all_read_only"] = {"status": r.status_code,
                                       "error": (r.get_json(silent=True) or {}).get("error")}
    out["reads_when_all_read_only"] = [
        client.get(f"/api/sites/{site_id}").status_code,
        client.get(f"/api/sites/{site_id}/stage?level={level}").status_code,
        client.get(f"/sites/{site_id}").status_code,
    ]
    subprocess.run(["umount", str(data)], check=True)
    subprocess.run(["umount", str(site_folder)], check=True)
    client.post(f"/api/sites/{site_id}/rerun")
    out["final"] = client.get(f"/api/sites/{site_id}/status").get_json()["run"]
    out["stage_final"] = client.get(f"/api/sites/{site_id}/stage?level={level}").get_json()
    return out


def full_disk_export(work: Path) -> dict:
    """Level exports asked for when the disk holding the data folder is full."""
    dem = write_lowbank(work / "lowbank.tif")
    data = work / "data"
    data.mkdir()
    mount("-t", "tmpfs", "-o", "size=16m", "tmpfs", str(data))
    app = make_app(data)
    client = Client(app)
    site_id = analysed_site(client, dem)
    out: dict = {"data_dir": str(data)}

    def ask(url: str) -> dict:
        r = client.get(url)
        return {"status": r.status_code, "error": (r.get_json(silent=True) or {}).get("error")}

    # A new level, with no other export to give up.
    fill(data, leave=0)
    out["depth"] = ask(f"/api/sites/{site_id}/files/level/10.75/depth")
    out["stage_status"] = client.get(f"/api/sites/{site_id}/stage?level=10.75").status_code
    # The ZIP of a level whose files were written while there was room.
    for leftover in data.glob("ballast*"):
        leftover.unlink()
    assert client.get(f"/api/sites/{site_id}/files/level/11.5/depth").status_code == 200
    fill(data, leave=0)
    out["zip"] = ask(f"/api/sites/{site_id}/files/level/11.5.zip")
    out["hidden_left"] = sorted(str(p.relative_to(data)) for p in data.rglob(".*")
                                if p.name.endswith(".tmp"))
    # With room again, the export is written.
    for leftover in data.glob("ballast*"):
        leftover.unlink()
    out["after_freeing"] = client.get(f"/api/sites/{site_id}/files/level/10.75/depth").status_code
    return out


SCENARIOS = {"full-disk-export": full_disk_export, "full-disk": full_disk, "full-disk-upload": full_disk_upload, "read-only-start": read_only_start, "read-only-run": read_only_run}


def main(argv: list[str]) -> int:
    name, work = argv[0], Path(argv[1])
    work.mkdir(parents=True, exist_ok=True)
    print(json.dumps(SCENARIOS[name](work)), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
