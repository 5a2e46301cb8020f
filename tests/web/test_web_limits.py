"""Limits a viewer or an uploader must not be able to push the server past:
the disk taken by level exports, the memory of uploads and analyses, and worker
processes that outlive their server.

Sites are the small invented ones of tests/web_support.py, and a large
invented one written here (a flat 60-million-cell plain that compresses to a
few hundred KB); the full disk is a small tmpfs in a private mount namespace
(tests/storage_scenarios.py, as in tests/web/test_web_crash.py).
"""

from __future__ import annotations

import io
import json
import os
import signal
import subprocess
import sys
import textwrap
import zipfile
from pathlib import Path

import pytest

from tests.web.test_web_crash import (KILL_PHASE, free_port, harrowmere_tif, needs_mounts, run_row,  # noqa: F401
                                   scenario, wait_for)
from tests.web_support import Client, analysed_site, make_app
from sillmark.web import db, layout
from sillmark.web.jobs import REQUEUED_PHASE, _pid_alive
from sillmark.web.exports import folder_bytes

ROOT = Path(__file__).resolve().parents[2]


# --------------------------------------------------------------------------- level exports on disk


def level_folders(data_dir: Path) -> dict[str, int]:
    """Every level export folder under the data folder (hidden ones too) -> its bytes."""
    out = {}
    for levels in data_dir.glob("sites/*/runs/*/levels"):
        for child in levels.iterdir():
            out[child.name] = folder_bytes(child)
    return out


def test_level_exports_stay_within_the_configured_disk_space(tmp_path, lowbank_tif):
    """A viewer asking for level after level fills at most LEVEL_EXPORT_CACHE_BYTES; the
    level used least recently goes first, and a level that went is written again on request."""
    probe = make_app(tmp_path / "probe")
    client = Client(probe)
    site = analysed_site(client, lowbank_tif)
    assert client.get(f"/api/sites/{site}/files/level/10.50/depth").status_code == 200
    one = max(level_folders(probe.extensions["sillmark"].data_dir).values())
    limit = int(3.5 * one)

    app = make_app(tmp_path / "data", LEVEL_EXPORT_CACHE_BYTES=limit)
    client = Client(app)
    data_dir = app.extensions["sillmark"].data_dir
    site = analysed_site(client, lowbank_tif)
    levels = [f"{10 + 0.1 * k:.2f}" for k in range(12)]
    bodies = {}
    for k, level in enumerate(levels):
        r = client.get(f"/api/sites/{site}/files/level/{level}/depth")
        assert r.status_code == 200, r.get_data(as_text=True)
        bodies[level] = r.get_data()
        if k == 2:  # the first level, used again: now the most recent but two
            assert client.get(f"/api/sites/{site}/files/level/{levels[0]}/flood_extent").status_code == 200
        on_disk = level_folders(data_dir)
        assert sum(on_disk.values()) <= limit, (k, on_disk)
        assert not [name for name in on_disk if name.startswith(".")]  # no temporary folders
    kept = sorted(name.split("_")[0] for name in level_folders(data_dir))
    assert len(kept) == 3 and kept == sorted(f"{float(h):.2f}m" for h in levels[-3:])
    # A level that was removed is written again, the same bytes as before.
    r = client.get(f"/api/sites/{site}/files/level/{levels[0]}/depth")
    assert r.status_code == 200 and r.get_data() == bodies[levels[0]]
    # A ZIP counts too.
    r = client.get(f"/api/sites/{site}/files/level/{levels[1]}.zip")
    assert r.status_code == 200
    with zipfile.ZipFile(io.BytesIO(r.get_data())) as zf:
        assert "README.txt" in zf.namelist() and len(zf.namelist()) > 3
    assert sum(level_folders(data_dir).values()) <= limit


def test_a_restarted_server_counts_the_exports_already_on_disk(tmp_path, lowbank_tif):
    data = tmp_path / "data"
    app = make_app(data)
    client = Client(app)
    site = analysed_site(client, lowbank_tif)
    for level in ("10.10", "10.20", "10.30", "10.40"):
        assert client.get(f"/api/sites/{site}/files/level/{level}/depth").status_code == 200
    run = client.get(f"/api/sites/{site}").get_json()["current_run"]
    levels = layout.levels_dir(app.extensions["sillmark"].data_dir, site, run)
    (levels / ".10.50m_noassets.tmp").mkdir()  # a write a crash interrupted
    sizes = level_folders(app.extensions["sillmark"].data_dir)
    one = max(sizes.values())
    app.extensions["sillmark"].runner.stop()
    del app, client

    again = make_app(data, LEVEL_EXPORT_CACHE_BYTES=int(2.5 * one))
    left = level_folders(again.extensions["sillmark"].data_dir)
    assert sorted(n.split("_")[0] for n in left) == ["10.30m", "10.40m"]  # the two newest
    assert again.extensions["sillmark"].exports.bytes_used == sum(left.values())


@needs_mounts
def test_a_level_export_on_a_full_disk_is_refused_with_507_and_leaves_nothing(tmp_path):
    got = scenario("full-disk-export", tmp_path)
    for kind in ("depth", "zip"):
        answer = got[kind]
        assert answer["status"] == 507, answer
        assert "disk is full" in answer["error"] and "free some disk space" in answer["error"], answer
        assert got["data_dir"] not in answer["error"] and "/" not in answer["error"], answer
    assert got["hidden_left"] == [], got
    # The map goes on working, and with room again the export is written.
    assert got["stage_status"] == 200
    assert got["after_freeing"] == 200



# --------------------------------------------------------------------------- memory of uploads and analyses

#: A flat invented plain of 7500 × 8000 = 60 million cells (the default MAX_DEM_CELLS):
#: deflate makes the file a few hundred KB, the cells take 240 MB as float32.
PLAIN_ROWS, PLAIN_COLS = 7500, 8000


@pytest.fixture(scope="module")
def plain_tif(tmp_path_factory) -> Path:
    import numpy as np
    import rasterio
    from rasterio.windows import Window

    from tests.rasters import grid

    path = tmp_path_factory.mktemp("plain") / "plain.tif"
    profile = {"driver": "GTiff", "width": PLAIN_COLS, "height": PLAIN_ROWS, "count": 1,
               "dtype": "float32", "crs": "EPSG:32633", "transform": grid(2.0), "tiled": True,
               "blockxsize": 512, "blockysize": 512, "compress": "deflate"}
    strip = np.full((500, PLAIN_COLS), 12.5, np.float32)
    with rasterio.open(path, "w", **profile) as dst:
        for row in range(0, PLAIN_ROWS, 500):
            dst.write(strip, 1, window=Window(0, row, PLAIN_COLS, 500))
    assert path.stat().st_size < 2 * 2**20
    return path


def upload_peak(data: Path, dem: Path, **config) -> dict:
    """Upload ``dem`` to a fresh app in a fresh interpreter; how much the process's peak
    resident memory grew during the request (resource.getrusage), and the answer."""
    script = textwrap.dedent(f"""
        import json, resource
        from tests.web_support import Client, make_app, upload_dem
        from pathlib import Path
        client = Client(make_app(Path({str(data)!r}), **{config!r}))
        before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        r = upload_dem(client, Path({str(dem)!r}))
        after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        print(json.dumps({{"status": r.status_code, "body": r.get_json(),
                          "grew_kib": after - before}}))
    """)
    out = subprocess.run([sys.executable, "-c", script], cwd=ROOT, capture_output=True, text=True,
                         timeout=300)
    assert out.returncode == 0, out.stderr[-3000:]
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_a_large_compressed_dem_is_read_from_its_header_in_the_upload_request(tmp_path, plain_tif):
    """Reading the 60-million-cell plain in the request would take over 240 MB (float32 cells
    alone); its header takes next to nothing. The site's page says the elevations come later."""
    got = upload_peak(tmp_path / "data", plain_tif)
    assert got["status"] == 201, got
    assert got["grew_kib"] < 64 * 1024, got  # under 64 MiB
    dem = got["body"]["dem"]
    assert (dem["rows"], dem["cols"], dem["cells"]) == (PLAIN_ROWS, PLAIN_COLS, PLAIN_ROWS * PLAIN_COLS)
    assert dem["elevation_min"] is None and dem["nodata_share"] is None
    app = make_app(tmp_path / "data")
    page = Client(app).get(f"/sites/{got['body']['site_id']}/settings")
    assert page.status_code == 200
    assert "read when the analysis runs" in page.get_data(as_text=True)


def test_a_small_dem_is_still_read_whole_and_checked_in_the_request(tmp_path, lowbank_tif):
    got = upload_peak(tmp_path / "data", lowbank_tif)
    assert got["status"] == 201
    assert got["body"]["dem"]["elevation_min"] == pytest.approx(9.0)
    # With UPLOAD_READ_CELLS below its size, only its header is read.
    got = upload_peak(tmp_path / "data2", lowbank_tif, UPLOAD_READ_CELLS=100)
    assert got["status"] == 201 and got["body"]["dem"]["elevation_min"] is None


def test_a_large_dem_analysed_after_a_header_only_upload_fills_in_its_figures(tmp_path, lowbank_tif):
    app = make_app(tmp_path / "data", UPLOAD_READ_CELLS=100)
    client = Client(app)
    site = analysed_site(client, lowbank_tif, assets=False)
    dem = client.get(f"/api/sites/{site}").get_json()["dem"]
    assert dem["elevation_min"] == pytest.approx(9.0) and dem["elevation_max"] == pytest.approx(12.45)
    assert dem["nodata_share"] == pytest.approx(30 / 2000)


def test_analyses_start_only_within_the_memory_budget(tmp_path, lowbank_tif, monkeypatch):
    """Three queued analyses, three workers, and a memory budget that holds two of them: never
    more than two run at once, and all three run, in the order they were queued."""
    import threading
    import time

    from sillmark.web import jobs

    running: list[int] = []
    seen: list[int] = []
    started: list[int] = []
    guard = threading.Lock()

    def fake_run_job(db_path, data_dir, run_id):
        with guard:
            running.append(run_id)
            started.append(run_id)
            seen.append(len(running))
        time.sleep(0.6)
        conn = db.connect(db_path)
        try:
            db.update_run(conn, run_id, status=db.DONE, phase="done", finished_utc=db.utc_now())
        finally:
            conn.close()
        with guard:
            running.remove(run_id)

    monkeypatch.setattr(jobs, "run_job", fake_run_job)
    cells = 50 * 40  # the Lowbank DEM
    app = make_app(tmp_path / "data", JOB_RUNNER="thread", JOB_WORKERS=3,
                   ANALYSIS_BYTES_PER_CELL=1000, ANALYSIS_MEMORY_BUDGET=int(2.5 * cells * 1000))
    client = Client(app)
    try:
        sites = [client.post("/uploads/dem", data=lowbank_tif.read_bytes(), headers={
            "Content-Type": "application/octet-stream", "X-File-Name": "lowbank.tif"}).get_json()["site_id"]
            for _ in range(3)]
        runs = [client.post(f"/uploads/sites/{s}/settings", data={
            "vertical_unit": "m", "outlet": ["edge"], "connectivity": "8"}).get_json()["run_id"]
            for s in sites]
        wait_for(lambda: len(started) == 3 and not running, 30, "the three analyses")
    finally:
        app.extensions["sillmark"].runner.stop()
    assert max(seen) == 2 and started == runs, (seen, started, runs)


# --------------------------------------------------------------------------- workers end with their server


def _serve(data: Path) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "sillmark", "serve", "--data", str(data), "--port", str(free_port())],
        cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, start_new_session=True)


def _worker_of(db_path: Path, run_id: int, other_than: int | None = None) -> int:
    row = wait_for(lambda: (lambda r: r if r["phase"] == KILL_PHASE and r["worker_pid"]
                            and int(r["worker_pid"]) != other_than else None)(run_row(db_path, run_id)),
                   180, f"run {run_id} to write its results")
    return int(row["worker_pid"])


def test_a_worker_ends_with_its_killed_server_and_with_the_next_server_stopped(tmp_path, harrowmere_tif):
    """`sillmark serve` alone (not its process group) is killed with SIGKILL while its worker
    writes results: the worker ends too. The next server runs the run again in a worker of
    its own, and stopping that server (SIGTERM, as a service manager does) ends its worker
    and queues the run again."""
    data = tmp_path / "data"
    app = make_app(data, MAX_DEM_CELLS=10**8)  # inline: analyse once, then queue a re-run
    client = Client(app)
    site_id = analysed_site(client, harrowmere_tif, assets=False)
    svc = app.extensions["sillmark"]
    conn = db.connect(svc.db_path)
    try:
        run_id = svc.registry.rerun(conn, site_id)
    finally:
        conn.close()
    (data / "config.py").write_text("REGISTER_DEMO = False\nMAX_DEM_CELLS = 10**8\n")
    db_path = svc.db_path
    del app, client

    first = _serve(data)
    try:
        worker = _worker_of(db_path, run_id)
        os.kill(first.pid, signal.SIGKILL)  # the server only: its worker is not signalled
        first.wait(10)
        wait_for(lambda: not _pid_alive(worker), 10, "the worker of the killed server to end")
    finally:
        if first.poll() is None:  # pragma: no cover - only if the test failed above
            os.killpg(first.pid, signal.SIGKILL)
        first.stderr.close()
    assert run_row(db_path, run_id)["status"] == db.RUNNING  # nobody recorded its end

    second = _serve(data)
    try:
        worker2 = _worker_of(db_path, run_id, other_than=worker)
        second.send_signal(signal.SIGTERM)
        assert second.wait(30) is not None
        wait_for(lambda: not _pid_alive(worker2), 10, "the worker of the stopped server to end")
    finally:
        if second.poll() is None:  # pragma: no cover
            os.killpg(second.pid, signal.SIGKILL)
        second.stderr.close()
    row = run_row(db_path, run_id)
    assert row["status"] == db.QUEUED and row["phase"] == REQUEUED_PHASE, dict(row)


def test_end_with_parent_kills_a_process_whose_parent_is_gone(tmp_path):
    """The fallback guard alone (no prctl): a grandchild whose parent exits ends within a second."""
    orphan = tmp_path / "orphan.py"
    orphan.write_text(textwrap.dedent(f"""
        import os, sys, time
        sys.path.insert(0, {str(ROOT)!r})
        import sillmark.web.jobs as jobs
        jobs.sys.platform = "other"  # the getppid watch only
        jobs.end_with_parent(os.getppid(), every=0.1)
        print(os.getpid(), flush=True)
        time.sleep(60)
    """))
    parent = tmp_path / "parent.py"
    parent.write_text(textwrap.dedent(f"""
        import os, subprocess, sys
        child = subprocess.Popen([sys.executable, {str(orphan)!r}], stdout=subprocess.PIPE,
                                 stderr=subprocess.DEVNULL, text=True)
        print(child.stdout.readline().strip(), flush=True)
        os._exit(0)  # the parent goes without waiting
    """))
    out = subprocess.run([sys.executable, str(parent)], capture_output=True, text=True, timeout=60,
                         cwd=ROOT)
    pid = int(out.stdout.strip().splitlines()[-1])
    wait_for(lambda: not _pid_alive_at_all(pid), 10, "the orphan to end")


def _pid_alive_at_all(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    try:  # a zombie has ended; only its exit status waits to be collected
        with open(f"/proc/{pid}/stat", "rb") as fh:
            return fh.read().rsplit(b")", 1)[1].split()[0] != b"Z"
    except OSError:
        return True
