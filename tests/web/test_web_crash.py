"""Crashes and restarts: a worker killed with SIGKILL mid-run, a server stopped or
killed during a run, a restart on the same data folder, SQLite's WAL mode and
transactions, and (in tests.storage_scenarios) a full disk and a read-only data folder.

The slow site ("Harrowmere", invented): 1600 × 1600 cells of 2 m in UTM 33N,
ground rising 20 m from west to east with a gentle egg-box ripple
(3 m · sin(9x) · cos(7y), x and y in grid widths), so that the analysis of
its 2.56 million cells takes a few seconds in a worker process, long enough to
kill the worker while it writes its result files.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import signal
import socket
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from tests.rasters import grid, write_raster
from tests.web_support import ASSETS_CSV, Client, analysed_site, confirm, make_app, upload_dem
from sillmark.web import db, layout
from sillmark.web.jobs import INTERRUPTED_PHASE, REQUEUED_PHASE, JobRunner, _pid_alive

pytestmark = pytest.mark.slow

ROOT = Path(__file__).resolve().parents[2]
SLOW_SIDE = 1600
#: The phase in which the worker is killed: several result files are written then.
KILL_PHASE = "writing result files"


@pytest.fixture(scope="module")
def harrowmere_tif(tmp_path_factory) -> Path:
    n = SLOW_SIDE
    yy, xx = np.mgrid[0:n, 0:n].astype(np.float32) / n
    z = (20.0 * xx + 3.0 * np.sin(9.0 * xx) * np.cos(7.0 * yy)).astype(np.float32)
    return write_raster(tmp_path_factory.mktemp("harrowmere") / "harrowmere.tif", z,
                        transform=grid(2.0), compress="deflate")


# --------------------------------------------------------------------------- helpers


def run_row(db_path: Path, run_id: int) -> sqlite3.Row:
    conn = sqlite3.connect(db_path)
    conn.row_factory = sqlite3.Row
    try:
        return conn.execute("SELECT * FROM runs WHERE id = ?", (run_id,)).fetchone()
    finally:
        conn.close()


def wait_for(predicate, timeout: float, what: str, every: float = 0.02):
    deadline = time.monotonic() + timeout
    while True:
        value = predicate()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout:.0f} s waiting for {what}")
        time.sleep(every)


def wait_until_finished(client: Client, site_id: int, timeout: float = 120.0) -> dict:
    def finished():
        st = client.get(f"/api/sites/{site_id}/status").get_json()
        return st if st["run"] and st["run"]["status"] in ("done", "failed") else None

    return wait_for(finished, timeout, "the run to finish", every=0.1)


def kill_in_phase(db_path: Path, run_id: int, phase: str = KILL_PHASE) -> int:
    """SIGKILL the worker of ``run_id`` once it records ``phase``; return its pid."""
    row = wait_for(lambda: (lambda r: r if r["phase"] == phase and r["worker_pid"] else None)(
        run_row(db_path, run_id)), 120, f"run {run_id} to reach '{phase}'")
    pid = int(row["worker_pid"])
    assert pid != os.getpid()
    os.kill(pid, signal.SIGKILL)
    return pid


def sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def served_results(client: Client, site_id: int) -> dict[str, str]:
    """Digest of every result file the site serves now (as its Files tab lists them)."""
    out = {}
    for f in client.get(f"/api/sites/{site_id}/files").get_json()["files"]:
        r = client.get(f["url"])
        assert r.status_code == 200, (f["name"], r.status_code)
        out[f["name"]] = sha(r.get_data())
    return out


def files_on_disk(folder: Path) -> dict[str, str]:
    return {p.name: sha(p.read_bytes()) for p in sorted(folder.iterdir()) if p.is_file()}


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


# --------------------------------------------------------------------------- SIGKILL mid-run


def test_a_worker_killed_mid_run_is_interrupted_and_never_shown(tmp_path, harrowmere_tif):
    """The real process runner; the worker is killed with SIGKILL while it writes its results,
    first on a site's first run (nothing to show), then on a re-run (the earlier results stay)."""
    app = make_app(tmp_path / "data", JOB_RUNNER="process", MAX_DEM_CELLS=10**8)
    svc = app.extensions["sillmark"]
    client = Client(app)
    try:
        site_id = upload_dem(client, harrowmere_tif).get_json()["site_id"]
        first = confirm(client, site_id).get_json()["run_id"]
        pid = kill_in_phase(svc.db_path, first)
        st = wait_until_finished(client, site_id)
        assert not _pid_alive(pid)
        run = st["run"]
        assert st["state"] == "failed" and run["status"] == "failed" and run["id"] == first
        assert run["phase"] == INTERRUPTED_PHASE
        assert run["message"].startswith(f"The analysis was interrupted while {KILL_PHASE}: ")
        assert "signal 9 (SIGKILL)" in run["message"] and "start it again" in run["message"]
        # Nothing of the killed run is served...
        assert st["current_run"] is None
        for url in (f"/api/sites/{site_id}/stage?level=10", f"/tiles/{site_id}/10/15/17972/11617.png",
                    f"/api/sites/{site_id}/files/results/onset_stage.tif"):
            assert client.get(url).status_code == 409, url
        # ...and what it had half written is gone; its log says why it stopped.
        folder = layout.run_dir(svc.data_dir, site_id, first)
        assert sorted(os.listdir(folder)) == ["worker.log"]
        assert "signal 9 (SIGKILL)" in (folder / "worker.log").read_text()
        page = client.get(f"/sites/{site_id}").get_data(as_text=True)
        assert "The analysis failed" in page and "interrupted while writing result files" in page
        assert "Try again" in page

        # A re-run succeeds.
        good = client.post(f"/api/sites/{site_id}/rerun").get_json()["run_id"]
        st = wait_until_finished(client, site_id)
        assert st["run"]["status"] == "done" and st["current_run"] == good
        stage = client.get(f"/api/sites/{site_id}/stage?level=12.5").get_json()
        results = served_results(client, site_id)
        assert results == files_on_disk(layout.results_dir(svc.data_dir, site_id, good))

        # Killed during a re-run: the earlier results stay current and are what is served,
        # while the worker writes and after it is killed.
        doomed = client.post(f"/api/sites/{site_id}/rerun").get_json()["run_id"]
        wait_for(lambda: run_row(svc.db_path, doomed)["phase"] == KILL_PHASE, 120, "writing")
        assert served_results(client, site_id) == results
        kill_in_phase(svc.db_path, doomed)
        st = wait_until_finished(client, site_id)
        assert st["run"]["id"] == doomed and st["run"]["status"] == "failed"
        assert st["state"] == "ready" and st["current_run"] == good
        assert "SIGKILL" in st["run"]["message"]
        assert served_results(client, site_id) == results
        assert client.get(f"/api/sites/{site_id}/stage?level=12.5").get_json() == stage
        assert sorted(os.listdir(layout.run_dir(svc.data_dir, site_id, doomed))) == ["worker.log"]
        page = client.get(f"/sites/{site_id}").get_data(as_text=True)
        assert "The latest analysis failed: The analysis was interrupted while writing result" in page
        assert "Showing the results of the earlier run" in page

        again = client.post(f"/api/sites/{site_id}/rerun").get_json()["run_id"]
        st = wait_until_finished(client, site_id)
        assert st["run"]["status"] == "done" and st["current_run"] == again
        assert client.get(f"/api/sites/{site_id}/stage?level=12.5").get_json() == stage
    finally:
        svc.runner.stop()


def test_interruption_messages_name_the_signal_and_the_phase():
    from sillmark.web.jobs import interruption_message

    text = interruption_message(-15, "drawing the hillshade")
    assert text.startswith("The analysis was interrupted while drawing the hillshade: ")
    assert "signal 15 (SIGTERM)" in text and "memory" not in text
    assert "exit code 3" in interruption_message(3, "starting")
    assert " while " not in interruption_message(3, "starting")


# --------------------------------------------------------------------------- stop and restart


def snapshot(client: Client, site_ids: list[int]) -> dict:
    """What a user sees of every site: the lists, runs, numbers, assets, files and a tile."""
    out = {"sites": client.get("/api/sites").get_json()}
    for sid in site_ids:
        d = client.get(f"/api/sites/{sid}").get_json()
        out[f"site{sid}"] = d
        conn = sqlite3.connect(client.app.extensions["sillmark"].db_path)
        try:
            run_ids = [r[0] for r in conn.execute("SELECT id FROM runs WHERE site_id = ?", (sid,))]
        finally:
            conn.close()
        out[f"runs{sid}"] = [client.get(f"/api/runs/{rid}").get_json() for rid in run_ids]
        if d["current_run"]:
            out[f"stage{sid}"] = client.get(f"/api/sites/{sid}/stage?level=10.5").get_json()
            out[f"assets{sid}"] = client.get(f"/api/sites/{sid}/assets?level=11").get_json()
            out[f"files{sid}"] = served_results(client, sid)
            w, s, e, n = d["summary"]["lonlat_bounds"]
            from sillmark.web import render

            x, y = render.lonlat_to_tile((w + e) / 2, (s + n) / 2, 19)
            out[f"tile{sid}"] = sha(client.get(f"/tiles/{sid}/10.5/19/{x}/{y}.png").get_data())
            out[f"shade{sid}"] = sha(client.get(f"/tiles/{sid}/hillshade/19/{x}/{y}.png").get_data())
    return out


def test_a_restart_keeps_every_site_run_and_asset(tmp_path, lowbank_tif):
    data = tmp_path / "data"
    app = make_app(data)
    client = Client(app)
    with_assets = analysed_site(client, lowbank_tif)
    assert client.post(f"/api/sites/{with_assets}/rerun").status_code == 202  # a second run
    # A site whose outlet is a water body (a GeoJSON file kept in the site's folder).
    from tests.web_support import cell_centre, lonlat

    corners = [lonlat(*cell_centre(r, c)) for r, c in ((36, 1), (36, 8), (39, 8), (39, 1), (36, 1))]
    pond = json.dumps({"type": "FeatureCollection", "features": [{
        "type": "Feature", "properties": {},
        "geometry": {"type": "Polygon", "coordinates": [corners]}}]}).encode()
    with_water = upload_dem(client, lowbank_tif, name="south pond.tif").get_json()["site_id"]
    assert confirm(client, with_water, outlets=("edge",), water=(pond, "pond.geojson")).status_code == 202
    r = client.post(f"/uploads/sites/{with_water}/assets",
                    data={"assets": (io.BytesIO(ASSETS_CSV.encode()), "second.csv")},
                    content_type="multipart/form-data")
    assert r.status_code == 201
    draft = upload_dem(client, lowbank_tif, name="draft.tif").get_json()["site_id"]
    ids = [with_assets, with_water, draft]
    before = snapshot(client, ids)
    key = app.config["SECRET_KEY"]
    app.extensions["sillmark"].runner.stop()
    del app, client

    again = make_app(data)
    client = Client(again)
    assert again.config["SECRET_KEY"] == key  # sessions and form tokens survive too
    after = snapshot(client, ids)
    assert after == before
    assert [s["id"] for s in after["sites"]["sites"]] == ids
    assert len(after[f"runs{with_assets}"]) == 2 and after[f"assets{with_water}"]["source"]["name"] == "second.csv"
    assert after[f"site{with_water}"]["outlets"][1]["name"] == "pond.geojson"
    assert after[f"site{draft}"]["state"] == "draft"


def test_a_run_the_server_was_running_when_stopped_runs_again_after_the_restart(tmp_path, harrowmere_tif):
    data = tmp_path / "data"
    app = make_app(data, JOB_RUNNER="process", MAX_DEM_CELLS=10**8)
    svc = app.extensions["sillmark"]
    client = Client(app)
    site_id = upload_dem(client, harrowmere_tif).get_json()["site_id"]
    run_id = confirm(client, site_id).get_json()["run_id"]
    row = wait_for(lambda: (lambda r: r if r["phase"] == KILL_PHASE and r["worker_pid"] else None)(
        run_row(svc.db_path, run_id)), 120, "the run to write its results")
    svc.runner.stop()  # what `sillmark serve` does on Ctrl-C
    assert not _pid_alive(row["worker_pid"])
    row = run_row(svc.db_path, run_id)
    assert row["status"] == db.QUEUED and row["phase"] == REQUEUED_PHASE and row["message"] == ""
    assert not (layout.run_dir(data, site_id, run_id) / "results").exists()
    del app, client

    restarted = make_app(data, JOB_RUNNER="process", MAX_DEM_CELLS=10**8)
    client = Client(restarted)
    try:
        st = wait_until_finished(client, site_id)
        assert st["run"]["id"] == run_id and st["run"]["status"] == "done", st
        assert st["current_run"] == run_id
        assert client.get(f"/api/sites/{site_id}/stage?level=12").status_code == 200
    finally:
        restarted.extensions["sillmark"].runner.stop()


def test_a_run_left_behind_by_a_killed_server_is_queued_again_and_finishes(tmp_path, harrowmere_tif):
    """`sillmark serve` (waitress) and its worker are killed together with SIGKILL mid-run:
    the run stays 'running' for a worker that no longer exists, and the next server runs it."""
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
    first = client.get(f"/api/sites/{site_id}").get_json()["current_run"]
    (data / "config.py").write_text("REGISTER_DEMO = False\nMAX_DEM_CELLS = 10**8\n")
    del app, client

    server = subprocess.Popen(
        [sys.executable, "-m", "sillmark", "serve", "--data", str(data), "--port", str(free_port())],
        cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, start_new_session=True)
    try:
        row = wait_for(lambda: (lambda r: r if r["phase"] == KILL_PHASE and r["worker_pid"] else None)(
            run_row(data / layout.DB_NAME, run_id)), 120, "the served run to write its results")
        os.killpg(server.pid, signal.SIGKILL)  # the server and its worker, as a power cut would
        server.wait(10)
        wait_for(lambda: not _pid_alive(row["worker_pid"]), 10, "the worker to die")
    finally:
        if server.poll() is None:  # pragma: no cover - only if the test failed above
            os.killpg(server.pid, signal.SIGKILL)
        server.stderr.close()
    left = run_row(data / layout.DB_NAME, run_id)
    assert left["status"] == db.RUNNING and int(left["worker_pid"]) == int(row["worker_pid"])

    restarted = make_app(data, JOB_RUNNER="process")
    client = Client(restarted)
    try:
        st = client.get(f"/api/sites/{site_id}/status").get_json()
        assert st["run"]["status"] in ("queued", "running") and st["current_run"] == first
        assert client.get(f"/api/sites/{site_id}/stage?level=12").status_code == 200
        st = wait_until_finished(client, site_id)
        assert st["run"]["id"] == run_id and st["run"]["status"] == "done", st
        assert st["current_run"] == run_id
    finally:
        restarted.extensions["sillmark"].runner.stop()


@pytest.mark.parametrize("phase", ["writing result files", "finishing"])
def test_a_worker_whose_run_was_taken_back_records_nothing_and_changes_nothing(
        tmp_path, lowbank_tif, monkeypatch, phase):
    """The server queues a run again (as JobRunner.stop does) while its worker is still busy,
    in the middle of the result files or just before its last transaction: the worker stops,
    the run stays queued, the earlier results stay current and whole, and the run's half
    output is removed; the queued run then runs afresh."""
    from sillmark.web import worker

    app = make_app(tmp_path / "data")
    svc = app.extensions["sillmark"]
    client = Client(app)
    site_id = analysed_site(client, lowbank_tif, assets=False)
    good = client.get(f"/api/sites/{site_id}").get_json()["current_run"]
    results = served_results(client, site_id)
    conn = db.connect(svc.db_path)
    try:
        run_id = svc.registry.rerun(conn, site_id)
    finally:
        conn.close()
    runner = JobRunner(svc.db_path, svc.data_dir, mode="inline")
    real = db.update_run
    taken: list[int] = []

    def take_back_once_in_phase(conn, rid, **fields):
        changed = real(conn, rid, **fields)
        if fields.get("phase") == phase and not taken:
            taken.extend(r for _, r in runner._requeue([rid]))
        return changed

    monkeypatch.setattr(worker, "PROGRESS_INTERVAL", 0.0)
    monkeypatch.setattr(worker.db, "update_run", take_back_once_in_phase)
    runner.submit(run_id)
    monkeypatch.setattr(worker.db, "update_run", real)
    assert taken == [run_id]
    row = run_row(svc.db_path, run_id)
    assert row["status"] == db.QUEUED and row["phase"] == REQUEUED_PHASE and row["message"] == ""
    st = client.get(f"/api/sites/{site_id}/status").get_json()
    assert st["current_run"] == good and st["state"] == "ready"
    assert served_results(client, site_id) == results
    assert sorted(os.listdir(layout.run_dir(svc.data_dir, site_id, run_id))) == ["worker.log"]

    runner.submit(run_id)
    st = client.get(f"/api/sites/{site_id}/status").get_json()
    assert st["run"]["id"] == run_id and st["run"]["status"] == "done" and st["current_run"] == run_id
    # The same DEM and settings: the same files, bar the summary's creation time.
    again = served_results(client, site_id)
    assert {k: v for k, v in again.items() if k != "summary.json"} == {
        k: v for k, v in results.items() if k != "summary.json"}
    summary = client.get(f"/api/sites/{site_id}/files/results/summary.json").get_json()
    assert summary["created_utc"] and summary["connectivity"] == 8


def test_a_worker_never_runs_a_run_it_was_not_given(tmp_path, lowbank_tif):
    """run_job on a run that is queued (not claimed by a runner) leaves it alone."""
    from sillmark.web.worker import run_job

    app = make_app(tmp_path / "data")
    svc = app.extensions["sillmark"]
    client = Client(app)
    site_id = analysed_site(client, lowbank_tif, assets=False)
    good = client.get(f"/api/sites/{site_id}").get_json()["current_run"]
    conn = db.connect(svc.db_path)
    try:
        run_id = svc.registry.rerun(conn, site_id)
    finally:
        conn.close()
    run_job(str(svc.db_path), str(svc.data_dir), run_id)
    row = run_row(svc.db_path, run_id)
    assert row["status"] == db.QUEUED and row["worker_pid"] is None
    assert client.get(f"/api/sites/{site_id}").get_json()["current_run"] == good
    assert not (layout.run_dir(svc.data_dir, site_id, run_id) / "results").exists()


# --------------------------------------------------------------------------- SQLite


def test_the_database_is_in_wal_mode(fresh):
    app, _ = fresh
    conn = sqlite3.connect(app.extensions["sillmark"].db_path)
    try:
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    finally:
        conn.close()


def test_a_transaction_is_all_or_nothing(tmp_path):
    path = tmp_path / "t.sqlite3"
    db.initialise(path)
    conn = db.connect(path)
    try:
        with pytest.raises(RuntimeError, match="half-way"):
            with db.transaction(conn):
                db.set_setting(conn, "first", "1")
                raise RuntimeError("half-way")
        assert db.get_setting(conn, "first") is None and not conn.in_transaction
        with db.transaction(conn):
            db.set_setting(conn, "first", "1")
        assert db.get_setting(conn, "first") == "1"
    finally:
        conn.close()


def test_every_change_of_the_app_runs_inside_a_transaction(tmp_path, lowbank_tif, monkeypatch):
    """Every INSERT, UPDATE and DELETE any connection sends, through a whole session of use
    (upload, settings, analysis, assets, re-run, a failed run), runs inside BEGIN ... COMMIT."""
    seen: list[tuple[str, bool]] = []
    real_connect = db.connect

    def traced(path):
        conn = real_connect(path)

        def trace(sql: str) -> None:
            head = sql.lstrip().split(None, 1)[0].upper() if sql.strip() else ""
            if head in ("INSERT", "UPDATE", "DELETE", "REPLACE"):
                seen.append((" ".join(sql.split())[:60], conn.in_transaction))

        conn.set_trace_callback(trace)
        return conn

    monkeypatch.setattr(db, "connect", traced)
    app = make_app(tmp_path / "data")
    client = Client(app)
    site_id = analysed_site(client, lowbank_tif)
    assert client.post(f"/api/sites/{site_id}/rerun").status_code == 202
    dem_file = next((layout.site_dir(app.extensions["sillmark"].data_dir, site_id) / "dem").iterdir())
    dem_file.write_bytes(b"no longer a raster")
    assert client.post(f"/api/sites/{site_id}/rerun").status_code == 202
    assert client.get(f"/api/sites/{site_id}/status").get_json()["run"]["status"] == "failed"
    outside = [sql for sql, inside in seen if not inside]
    assert len(seen) > 10 and not outside, outside


# --------------------------------------------------------------------------- full and read-only disks


def _namespaces_work() -> bool:
    try:
        return subprocess.run(["unshare", "-m", "--propagation", "private", "true"],
                              capture_output=True, timeout=20).returncode == 0
    except (OSError, subprocess.SubprocessError):
        return False


needs_mounts = pytest.mark.skipif(
    not _namespaces_work(),
    reason="needs a private mount namespace (unshare -m, as root) to mount a small tmpfs "
           "or a read-only bind mount")


def scenario(name: str, work: Path) -> dict:
    """Run ``tests.storage_scenarios NAME`` in a private mount namespace; its JSON report."""
    proc = subprocess.run(
        ["unshare", "-m", "--propagation", "private", sys.executable, "-m",
         "tests.storage_scenarios", name, str(work)],
        cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr[-4000:]
    return json.loads(proc.stdout.strip().splitlines()[-1])


@needs_mounts
def test_a_full_disk_fails_the_run_with_a_message_about_space_and_keeps_the_results(tmp_path):
    got = scenario("full-disk", tmp_path)
    assert got["rerun_status"] == 202
    assert got["failed"]["status"] == "failed"
    assert "disk holding the data folder is full" in got["failed"]["message"]
    assert got["current_run_after_failure"] == got["current_run_before"]
    assert got["stage_after_failure"] == got["stage_before"]
    assert got["files_after_failure"] == got["files_before"]
    assert got["tile_after_failure"] == got["tile_before"]
    # The half-written results were removed, giving the space back.
    assert got["failed_run_folder"] == ["worker.log"]
    assert got["free_after_failure"] >= got["free_before_rerun"] - 256 * 1024
    # With space again, the same site analyses again and gives the same numbers.
    assert got["final"]["status"] == "done" and got["final"]["id"] != got["current_run_before"]
    assert got["stage_final"] == got["stage_before"]


@needs_mounts
def test_an_upload_to_a_full_disk_is_refused_with_a_message(tmp_path):
    got = scenario("full-disk-upload", tmp_path)
    assert got["left_in_uploads"] == []
    assert got["status"] < 500 and "full" in got["error"], got
    assert str(tmp_path) not in got["error"] and "/" not in got["error"], got  # no server path


@needs_mounts
def test_a_read_only_data_folder_is_a_clear_error_at_start_up(tmp_path):
    from sillmark.cli import EXIT_ERROR

    got = scenario("read-only-start", tmp_path)
    for case in ("existing", "empty"):
        res = got[case]
        assert res["exit_code"] == EXIT_ERROR, res
        assert "Traceback" not in res["stderr"], res
        assert res["stderr"].startswith("sillmark: error: "), res
    assert "cannot write to its data folder" in got["existing"]["stderr"]
    assert "read-only" in got["existing"]["stderr"]
    assert "Read-only file system" in got["empty"]["stderr"]
    assert got["untouched"]


@needs_mounts
def test_a_data_folder_that_turns_read_only_fails_the_run_and_keeps_the_results(tmp_path):
    got = scenario("read-only-run", tmp_path)
    assert got["failed"]["status"] == "failed"
    assert "read-only file system" in got["failed"]["message"]
    assert got["current_run_after_failure"] == got["current_run_before"]
    assert got["stage_after_failure"] == got["stage_before"]
    assert got["files_after_failure"] == got["files_before"]
    # With the whole data folder read-only, a change is refused with a clear message.
    assert got["rerun_when_all_read_only"]["status"] == 400
    assert "cannot write to its data folder" in got["rerun_when_all_read_only"]["error"]
    assert got["reads_when_all_read_only"] == [200, 200, 200]
    assert got["final"]["status"] == "done"
    assert got["stage_final"] == got["stage_before"]
