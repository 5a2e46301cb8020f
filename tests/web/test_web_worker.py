"""The background worker and job runner: progress in SQLite, failures with a reason,
earlier results untouched, runs that survive a restart, a real worker process."""

from __future__ import annotations

import shutil
import sqlite3
import time

import pytest

from tests.web_support import Client, analysed_site, confirm, make_app, upload_dem
from sillmark.web import db, layout
from sillmark.web.jobs import JobRunner


def run_rows(app, site_id):
    conn = sqlite3.connect(app.extensions["sillmark"].db_path)
    conn.row_factory = sqlite3.Row
    try:
        return conn.execute("SELECT * FROM runs WHERE site_id = ? ORDER BY id", (site_id,)).fetchall()
    finally:
        conn.close()


def test_a_failing_run_records_the_engines_reason_and_keeps_the_earlier_results(fresh, lowbank_tif):
    app, client = fresh
    site_id = analysed_site(client, lowbank_tif, assets=False)
    good = client.get(f"/api/sites/{site_id}").get_json()["current_run"]
    before = client.get(f"/api/sites/{site_id}/stage?level=10.5").get_json()
    # Damage the stored DEM, then analyse again.
    data = app.extensions["sillmark"].data_dir
    dem_file = next((layout.site_dir(data, site_id) / "dem").iterdir())
    saved = dem_file.read_bytes()
    dem_file.write_bytes(b"this is no longer a GeoTIFF")
    r = client.post(f"/api/sites/{site_id}/rerun")
    assert r.status_code == 202
    st = client.get(f"/api/sites/{site_id}/status").get_json()
    assert st["run"]["status"] == "failed"
    assert "'lowbank.tif' is not a raster Sillmark can read" in st["run"]["message"]
    assert "Traceback" not in st["run"]["message"]
    assert st["current_run"] == good and st["state"] == "ready"
    assert client.get(f"/api/sites/{site_id}/stage?level=10.5").get_json() == before
    html = client.get(f"/sites/{site_id}").get_data(as_text=True)
    assert "The latest analysis failed" in html and "is not a raster Sillmark can read" in html
    log = layout.run_dir(data, site_id, r.get_json()["run_id"]) / "worker.log"
    assert "Traceback" in log.read_text()  # the details go to the log, not the page
    dem_file.write_bytes(saved)


def test_a_first_run_that_fails_shows_its_reason_on_the_progress_page(fresh, lowbank_tif):
    app, client = fresh
    site_id = upload_dem(client, lowbank_tif).get_json()["site_id"]
    data = app.extensions["sillmark"].data_dir
    assert confirm(client, site_id, outlets=("nodata",)).status_code == 202  # passes the check...
    st = client.get(f"/api/sites/{site_id}/status").get_json()
    assert st["state"] == "ready"
    # ...now one that fails inside the worker: the DEM disappears after the check.
    site2 = upload_dem(client, lowbank_tif).get_json()["site_id"]
    real = app.extensions["sillmark"].registry.configure
    dem_dir = layout.site_dir(data, site2) / "dem"

    def configure_then_lose_the_dem(*a, **k):
        run_id = real(*a, **k)
        shutil.rmtree(dem_dir)
        return run_id

    app.extensions["sillmark"].registry.configure = configure_then_lose_the_dem
    try:
        assert confirm(client, site2).status_code == 202
    finally:
        app.extensions["sillmark"].registry.configure = real
    st = client.get(f"/api/sites/{site2}/status").get_json()
    assert st["state"] == "failed" and "does not exist" in st["run"]["message"]
    html = client.get(f"/sites/{site2}").get_data(as_text=True)
    assert "The analysis failed" in html and "does not exist" in html and "Try again" in html


def test_progress_is_recorded_phase_by_phase(fresh, lowbank_tif, monkeypatch):
    from sillmark.web import worker

    seen = []
    real = db.update_run

    def spy(conn, run_id, **fields):
        if "phase" in fields:
            seen.append((fields["phase"], fields.get("percent")))
        return real(conn, run_id, **fields)

    monkeypatch.setattr(worker.db, "update_run", spy)
    monkeypatch.setattr(worker, "PROGRESS_INTERVAL", 0.0)
    _, client = fresh
    analysed_site(client, lowbank_tif, assets=False)
    phases = [p for p, _ in seen]
    for name, _ in worker.PHASES:
        assert name in phases
    percents = [p for _, p in seen if p is not None]
    assert percents == sorted(percents) and percents[-1] <= 100


def test_runs_left_running_by_a_stopped_server_are_queued_again(fresh, lowbank_tif):
    app, client = fresh
    site_id = analysed_site(client, lowbank_tif, assets=False)
    svc = app.extensions["sillmark"]
    conn = db.connect(svc.db_path)
    try:
        with db.transaction(conn):
            cur = conn.execute(
                "INSERT INTO runs(site_id, created_utc, status, phase, settings, worker_pid) "
                "SELECT site_id, created_utc, 'running', 'flooding', settings, 999999999 FROM runs WHERE site_id = ?",
                (site_id,))
            stale = cur.lastrowid
    finally:
        conn.close()
    runner = JobRunner(svc.db_path, svc.data_dir, mode="inline")
    assert runner.recover() == 1
    assert [r["status"] for r in run_rows(app, site_id)][-1] == db.QUEUED
    runner.submit(stale)
    assert run_rows(app, site_id)[-1]["status"] == db.DONE


def test_a_worker_killed_by_the_system_is_marked_failed(fresh, lowbank_tif):
    app, client = fresh
    site_id = analysed_site(client, lowbank_tif, assets=False)
    svc = app.extensions["sillmark"]
    conn = db.connect(svc.db_path)
    try:
        with db.transaction(conn):
            cur = conn.execute(
                "INSERT INTO runs(site_id, created_utc, status, phase, settings) "
                "SELECT site_id, created_utc, 'running', 'flooding', settings FROM runs WHERE site_id = ?",
                (site_id,))
            run_id = cur.lastrowid
    finally:
        conn.close()

    class Killed:
        exitcode = -9

        def join(self):
            return None

    JobRunner(svc.db_path, svc.data_dir, mode="process")._watch(run_id, Killed())
    row = run_rows(app, site_id)[-1]
    assert row["status"] == db.FAILED and "signal 9" in row["message"] and "memory" in row["message"]


def test_stale_results_ask_for_the_analysis_again(fresh, lowbank_tif):
    app, client = fresh
    site_id = analysed_site(client, lowbank_tif, assets=False)
    data = app.extensions["sillmark"].data_dir
    run = client.get(f"/api/sites/{site_id}").get_json()["current_run"]
    (layout.arrays_dir(data, site_id, run) / "meta.json").write_text("{}")
    app.extensions["sillmark"].cache.drop(site_id)
    r = client.get(f"/api/sites/{site_id}/stage?level=10")
    assert r.status_code == 409 and "run the analysis again" in r.get_json()["error"]
    html = client.get(f"/sites/{site_id}").get_data(as_text=True)
    assert "The results must be made again" in html and "Try again" in html
    assert client.post(f"/api/sites/{site_id}/rerun").status_code == 202
    assert client.get(f"/api/sites/{site_id}/stage?level=10").status_code == 200


def test_a_real_worker_process_runs_the_analysis(tmp_path, lowbank_tif):
    """JOB_RUNNER = "process": a spawned worker process, supervised by a thread."""
    app = make_app(tmp_path / "data", JOB_RUNNER="process")
    client = Client(app)
    try:
        site_id = upload_dem(client, lowbank_tif).get_json()["site_id"]
        assert confirm(client, site_id).status_code == 202
        deadline = time.monotonic() + 90
        while True:
            st = client.get(f"/api/sites/{site_id}/status").get_json()
            if st["run"]["status"] in ("done", "failed") or time.monotonic() > deadline:
                break
            time.sleep(0.2)
        assert st["run"]["status"] == "done", st
        row = run_rows(app, site_id)[-1]
        assert row["worker_pid"] and row["worker_pid"] != __import__("os").getpid()
        assert client.get(f"/api/sites/{site_id}/stage?level=10.5").status_code == 200
    finally:
        app.extensions["sillmark"].runner.stop()


def test_unknown_runner_mode_is_refused(tmp_path):
    with pytest.raises(ValueError, match="JOB_RUNNER"):
        make_app(tmp_path / "data", JOB_RUNNER="celery")
