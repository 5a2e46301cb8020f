"""The job runner: analyses run outside the request, one worker process each.

The queue is the ``runs`` table itself: a run is created ``queued`` by the
request that asks for it, and :class:`JobRunner` (a supervisor thread in the
server process) claims queued runs in order, starts a fresh worker process for
each (``multiprocessing``, *spawn* start method, so the worker shares nothing
with the server's threads), waits for it and checks that it recorded an end:
a worker killed by the system (out of memory, say) leaves its run ``running``,
and the supervisor marks it failed with the exit code. Because the queue lives
in SQLite, a run queued before the server stopped is picked up when it starts
again, and a run interrupted by the stop is queued again.

``JOB_RUNNER = "thread"`` runs the same job body in a thread of the server
(no process start-up cost); ``"inline"`` runs it inside :meth:`JobRunner.submit`
(tests).
"""

from __future__ import annotations

import logging
import multiprocessing
import os
import threading
from pathlib import Path

from webapp import db
from webapp.worker import run_job

log = logging.getLogger("sillmark.jobs")

MODES = ("process", "thread", "inline")


def _pid_alive(pid: int | None) -> bool:
    if not pid:
        return False
    try:
        os.kill(int(pid), 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # pragma: no cover - someone else's process
        return True
    return True


class JobRunner:
    """Claims queued runs from SQLite and executes them (see the module docstring)."""

    def __init__(self, db_path: Path, data_dir: Path, *, mode: str = "process", workers: int = 1,
                 poll_seconds: float = 1.0) -> None:
        if mode not in MODES:
            raise ValueError(f"JOB_RUNNER must be one of {MODES}, not {mode!r}")
        self.db_path = Path(db_path)
        self.data_dir = Path(data_dir)
        self.mode = mode
        self.workers = max(1, int(workers))
        self.poll_seconds = poll_seconds
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._lock = threading.Lock()
        self._active: dict[int, object] = {}
        self._thread: threading.Thread | None = None
        self._ctx = multiprocessing.get_context("spawn")

    # -- life cycle -------------------------------------------------------

    def start(self) -> None:
        """Queue again the runs an earlier server left running, then start supervising."""
        self.recover()
        if self.mode == "inline" or self._thread is not None:
            return
        self._thread = threading.Thread(target=self._loop, name="sillmark-jobs", daemon=True)
        self._thread.start()

    def stop(self, timeout: float = 5.0) -> None:
        self._stop.set()
        self._wake.set()
        if self._thread is not None:
            self._thread.join(timeout)
        with self._lock:
            active = list(self._active.values())
        for proc in active:
            if isinstance(proc, multiprocessing.process.BaseProcess) and proc.is_alive():
                proc.terminate()

    def recover(self) -> int:
        """Runs left ``running`` by a server that stopped are queued again; returns how many."""
        conn = db.connect(self.db_path)
        try:
            rows = conn.execute("SELECT id, worker_pid FROM runs WHERE status = ?", (db.RUNNING,)).fetchall()
            stale = [r["id"] for r in rows if not _pid_alive(r["worker_pid"])]
            if stale:
                with db.transaction(conn):
                    conn.executemany(
                        "UPDATE runs SET status = ?, phase = 'queued again after a restart', "
                        "percent = 0, worker_pid = NULL WHERE id = ? AND status = ?",
                        [(db.QUEUED, rid, db.RUNNING) for rid in stale],
                    )
            return len(stale)
        finally:
            conn.close()

    # -- queue --------------------------------------------------------------

    def submit(self, run_id: int) -> None:
        """Tell the runner a run was queued (it is already in the table)."""
        if self.mode == "inline":
            if self._claim(run_id):
                run_job(str(self.db_path), str(self.data_dir), run_id)
            return
        self._wake.set()

    def _claim(self, run_id: int) -> bool:
        conn = db.connect(self.db_path)
        try:
            with db.transaction(conn):
                cur = conn.execute(
                    "UPDATE runs SET status = ?, phase = 'starting', started_utc = ? "
                    "WHERE id = ? AND status = ?",
                    (db.RUNNING, db.utc_now(), run_id, db.QUEUED),
                )
            return cur.rowcount == 1
        finally:
            conn.close()

    def _next_queued(self) -> int | None:
        conn = db.connect(self.db_path)
        try:
            row = conn.execute(
                "SELECT id FROM runs WHERE status = ? ORDER BY id LIMIT 1", (db.QUEUED,)
            ).fetchone()
            return None if row is None else int(row["id"])
        finally:
            conn.close()

    def _loop(self) -> None:
        while not self._stop.is_set():
            try:
                with self._lock:
                    free = self.workers - len(self._active)
                while free > 0 and not self._stop.is_set():
                    run_id = self._next_queued()
                    if run_id is None or not self._claim(run_id):
                        break
                    self._launch(run_id)
                    free -= 1
            except Exception:  # pragma: no cover - keep supervising whatever happens
                log.exception("job supervisor error")
            self._wake.wait(self.poll_seconds)
            self._wake.clear()

    def _launch(self, run_id: int) -> None:
        args = (str(self.db_path), str(self.data_dir), run_id)
        if self.mode == "process":
            proc = self._ctx.Process(target=run_job, args=args, name=f"sillmark-run-{run_id}",
                                     daemon=True)
            proc.start()
            db_conn = db.connect(self.db_path)
            try:
                db.update_run(db_conn, run_id, worker_pid=proc.pid)
            finally:
                db_conn.close()
        else:
            proc = threading.Thread(target=run_job, args=args, name=f"sillmark-run-{run_id}", daemon=True)
            proc.start()
        with self._lock:
            self._active[run_id] = proc
        threading.Thread(target=self._watch, args=(run_id, proc), daemon=True).start()

    def _watch(self, run_id: int, proc) -> None:
        proc.join()
        code = getattr(proc, "exitcode", 0)
        with self._lock:
            self._active.pop(run_id, None)
        conn = db.connect(self.db_path)
        try:
            run = db.get_run(conn, run_id)
            if run is not None and run["status"] == db.RUNNING:
                if self.mode == "process" and code is not None and code < 0:
                    why = f"the analysis process was stopped by signal {-code}"
                    if -code == 9:
                        why += " (the system may have run out of memory)"
                else:
                    why = f"the analysis process ended without a result (exit code {code})"
                db.update_run(conn, run_id, status=db.FAILED, message=why + "; start it again",
                              finished_utc=db.utc_now())
        finally:
            conn.close()
        self._wake.set()

    def busy(self) -> int:
        with self._lock:
            return len(self._active)
