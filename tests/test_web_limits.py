"""Limits a viewer or an uploader must not be able to push the server past:
the disk taken by level exports, the memory of uploads and analyses, and worker
processes that outlive their server.

Sites are the small invented ones of tests/web_support.py, and a large
invented one written here (a flat 60-million-cell plain that compresses to a
few hundred KB); the full disk is a small tmpfs in a private mount namespace
(tests/storage_scenarios.py, as in tests/test_web_crash.py).
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

from tests.test_web_crash import (KILL_PHASE, free_port, harrowmere_tif, needs_mounts, run_row,  # noqa: F401
                                   scenario, wait_for)
from tests.web_support import Client, analysed_site, make_app
from sillmark.web import db, layout
from sillmark.web.jobs import REQUEUED_PHASE, _pid_alive
from sillmark.web.exports import folder_bytes

ROOT = Path(__file__).resolve().parents[1]


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
        assert "CAUTION.txt" in zf.namelist() and len(zf.namelist()) > 3
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
