"""The job runner: analyses run outside the request, one worker process each.

The queue is the ``runs`` table itself: a run is created ``queued`` by the
request that asks for it, and :class:`JobRunner` (a supervisor thread in the
server process) claims queued runs in order, starts a fresh worker process for
each (``multiprocessing``, *spawn* start method, so the worker shares nothing
with the server's threads), waits for it and checks that it recorded an end:
a worker killed by a signal (SIGKILL from the system when memory runs out, or
from an operator) leaves its run ``running``; the supervisor marks it failed,
with phase ``interrupted`` and a message naming the signal and the phase it
stopped in, and removes what the run had half written (its ``worker.log``
stays). A run's results only become the site's current results in the
worker's last transaction, so an interrupted run is never shown.

Because the queue lives in SQLite, a run queued before the server stopped is
picked up when it starts again. A run the server was running when it stopped
is queued again: :meth:`JobRunner.stop` queues the runs it ends, and
:meth:`JobRunner.recover` (at start, and on every pass of the supervisor)
queues runs left ``running`` by a worker process that no longer exists, such
as one killed together with a server that crashed.

A worker process ends with the server that started it, also a server killed
outright (:func:`end_with_parent`), so no orphan goes on writing a run that
the next server queues again. Queued runs start in order, at most
``JOB_WORKERS`` at once, and only while the memory estimates of those running
(cells × ``ANALYSIS_BYTES_PER_CELL``) fit in ``ANALYSIS_MEMORY_BUDGET``.

``JOB_RUNNER = "thread"`` runs the same job body in a thread of the server
(no process start-up cost); ``"inline"`` runs it inside :meth:`JobRunner.submit`
(tests).
"""

from __future__ import annotations

import ctypes
import logging
import multiprocessing
import os
import signal
import sys
import threading
import time
from pathlib import Path

from sillmark.process_memory import return_freed_memory
from sillmark.web import db, layout
from sillmark.web.worker import discard_partial_output, run_job

log = logging.getLogger("sillmark.jobs")

MODES = ("process", "thread", "inline")


#: Phase recorded for a run whose worker was killed before it finished.
INTERRUPTED_PHASE = "interrupted"
#: Phase recorded for a run queued again because the server stopped during it.
REQUEUED_PHASE = "queued again after a restart"


def _pid_alive(pid: int | None) -> bool:
    """Whether ``pid`` is a live process that may be an analysis worker.

    On Linux a live process whose command line is not a Python multiprocessing
    child (the pid was reused after a reboot, say) does not count.
    """
    if not pid:
        return False
    try:
        os.kill(int(pid), 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # pragma: no cover - someone else's process
        return True
    try:
        with open(f"/proc/{int(pid)}/cmdline", "rb") as fh:
            cmdline = fh.read()
    except OSError:  # no /proc: trust kill(0)
        return True
    if int(pid) == os.getpid():  # thread and inline runs record the server's own pid
        return True
    return b"multiprocessing" in cmdline or b"sillmark.web.worker" in cmdline


#: prctl option asking the kernel to signal this process when its parent ends (Linux).
PR_SET_PDEATHSIG = 1
#: How often a worker checks that the server that started it is still there, in seconds.
PARENT_CHECK_SECONDS = 0.5


def end_with_parent(parent_pid: int, *, every: float = PARENT_CHECK_SECONDS) -> None:
    """Make this process end as soon as the process ``parent_pid`` (its server) ends.

    A server killed outright (SIGKILL, a crash, the system out of memory) runs
    no clean-up, and a worker it leaves would go on writing results for a run
    the next server takes back, holding memory nobody asked for. Two guards:

    - on Linux, ``prctl(PR_SET_PDEATHSIG, SIGKILL)``: the kernel kills this
      process when the server thread that started it ends (the job runner's
      supervisor thread, which lives as long as the server);
    - everywhere, a daemon thread that checks ``os.getppid()`` every ``every``
      seconds: an orphan is re-parented, so a changed parent means the server
      is gone, and the process kills itself (the run it leaves ``running`` is
      queued again by the next server, see :meth:`JobRunner.recover`).

    The check is also made once at once, for a server that died before the guard was set.
    """
    if sys.platform.startswith("linux"):
        try:
            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)
        except (OSError, AttributeError):  # pragma: no cover - no prctl: the thread still guards
            pass
    if os.getppid() != parent_pid:
        os.kill(os.getpid(), signal.SIGKILL)

    def watch() -> None:
        while True:
            time.sleep(every)
            if os.getppid() != parent_pid:
                os.kill(os.getpid(), signal.SIGKILL)

    threading.Thread(target=watch, name="sillmark-parent-watch", daemon=True).start()


def _process_main(db_path: str, data_dir: str, run_id: int, parent_pid: int | None = None) -> None:
    """Entry point of a worker process: it ends with its server, and Ctrl-C is for the server.

    The terminal sends SIGINT to the whole process group; the server stops its
    workers itself (and queues their runs again), so a worker ignores it.
    """
    if parent_pid is not None:
        end_with_parent(parent_pid)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    return_freed_memory()  # whole-grid arrays go back to the system when freed
    run_job(db_path, data_dir, run_id)


def interruption_message(code: int, phase: str) -> str:
    """What the page says about a worker process that ended with ``code`` (negative: a signal)."""
    where = f" while {phase}" if phase and phase not in ("starting", "queued") else ""
    if code < 0:
        number = -code
        try:
            name = signal.Signals(number).name
        except ValueError:
            name = f"signal {number}"
        why = f"its process was stopped by signal {number} ({name})"
        if number == signal.SIGKILL:
            why += "; the system may have run out of memory, or someone ended the process"
    else:
        why = f"its process ended without recording a result (exit code {code})"
    return (f"The analysis was interrupted{where}: {why}. Nothing from this run is shown; "
            "start it again")


class JobRunner:
    """Claims queued runs from SQLite and executes them (see the module docstring)."""

    def __init__(self, db_path: Path, data_dir: Path, *, mode: str = "process", workers: int = 1,
                 poll_seconds: float = 1.0, memory_budget: int | None = None,
                 bytes_per_cell: int = 64) -> None:
        if mode not in MODES:
            raise ValueError(f"JOB_RUNNER must be one of {MODES}, not {mode!r}")
        #: Bytes the running analyses may need together (None: no limit but ``workers``).
        self.memory_budget = None if memory_budget is None else max(1, int(memory_budget))
        self.bytes_per_cell = max(1, int(bytes_per_cell))
        self._need: dict[int, int] = {}  # run id -> its memory estimate, while it runs
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
        self._closing = False
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
        """Stop supervising; worker processes still running are ended and their runs queued again."""
        self._stop.set()
        self._wake.set()
        with self._lock:
            # From here on _launch starts no process: the list below is complete.
            self._closing = True
            active = [(rid, proc) for rid, proc in self._active.items()
                      if isinstance(proc, multiprocessing.process.BaseProcess) and proc.is_alive()]
        # Queue them again first, so the watcher of a process ended here does not
        # record a failure: the next start runs them from the beginning. This comes
        # before the supervisor thread ends, because a worker process ends with the
        # thread that started it (see end_with_parent).
        requeued = self._requeue([rid for rid, _ in active]) if active else []
        for _, proc in active:
            proc.terminate()
        for _, proc in active:
            proc.join(timeout)
        if self._thread is not None:
            self._thread.join(timeout)
        self._discard(requeued)

    def _requeue(self, run_ids: list[int]) -> list[tuple[int, int]]:
        """Queue ``run_ids`` again if they are still running; returns their (site, run) ids."""
        conn = db.connect(self.db_path)
        try:
            with db.transaction(conn):
                done = []
                for rid in run_ids:
                    cur = conn.execute(
                        "UPDATE runs SET status = ?, phase = ?, percent = 0, worker_pid = NULL, "
                        "message = '' WHERE id = ? AND status = ?",
                        (db.QUEUED, REQUEUED_PHASE, rid, db.RUNNING),
                    )
                    if cur.rowcount:
                        site = conn.execute("SELECT site_id FROM runs WHERE id = ?", (rid,)).fetchone()
                        done.append((int(site["site_id"]), int(rid)))
            return done
        finally:
            conn.close()

    def _discard(self, runs: list[tuple[int, int]]) -> None:
        """Remove what the interrupted attempts of ``runs`` wrote; they start afresh."""
        for site_id, run_id in runs:
            discard_partial_output(layout.run_dir(self.data_dir, site_id, run_id),
                                   note="the server stopped during this run; it is queued again")

    def recover(self) -> int:
        """Runs left ``running`` by a worker process that is gone are queued again; returns how many.

        Runs this runner is supervising itself are left alone.
        """
        conn = db.connect(self.db_path)
        try:
            rows = conn.execute("SELECT id, worker_pid FROM runs WHERE status = ?", (db.RUNNING,)).fetchall()
        finally:
            conn.close()
        with self._lock:
            mine = set(self._active)
        stale = [r["id"] for r in rows if r["id"] not in mine and not _pid_alive(r["worker_pid"])]
        if stale:
            self._discard(self._requeue(stale))
            log.info("queued again runs %s, whose worker process is gone", stale)
        return len(stale)

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

    def _next_queued(self) -> tuple[int, int] | None:
        """The oldest queued run and its memory estimate in bytes (cells × bytes per cell)."""
        conn = db.connect(self.db_path)
        try:
            row = conn.execute(
                "SELECT r.id, s.dem_info FROM runs r JOIN sites s ON s.id = r.site_id "
                "WHERE r.status = ? ORDER BY r.id LIMIT 1", (db.QUEUED,)
            ).fetchone()
            if row is None:
                return None
            info = db.loads(row["dem_info"], {}) or {}
            cells = int(info.get("cells") or 0)
            return int(row["id"]), cells * self.bytes_per_cell
        finally:
            conn.close()

    def _fits(self, need: int) -> bool:
        """Whether a run needing ``need`` bytes may start beside those running now.

        Runs start in the order they were queued: a large run at the head of the
        queue waits for memory rather than being overtaken for ever by small ones.
        A run larger than the whole budget starts when nothing else runs.
        """
        if self.memory_budget is None:
            return True
        with self._lock:
            if not self._active:
                return True
            return sum(self._need.values()) + need <= self.memory_budget

    def _loop(self) -> None:
        while not self._stop.is_set():
            try:
                self.recover()  # e.g. a worker of an earlier server that was killed with it
                with self._lock:
                    free = self.workers - len(self._active)
                while free > 0 and not self._stop.is_set():
                    head = self._next_queued()
                    if head is None or not self._fits(head[1]):
                        break  # nothing queued, or the next run waits for memory
                    run_id, need = head
                    if not self._claim(run_id):
                        break
                    with self._lock:
                        self._need[run_id] = need
                    self._launch(run_id)
                    free -= 1
            except Exception:  # pragma: no cover - keep supervising whatever happens
                log.exception("job supervisor error")
            self._wake.wait(self.poll_seconds)
            self._wake.clear()

    def _launch(self, run_id: int) -> None:
        args = (str(self.db_path), str(self.data_dir), run_id)
        if self.mode == "process":
            proc = self._ctx.Process(target=_process_main, args=(*args, os.getpid()),
                                     name=f"sillmark-run-{run_id}", daemon=True)
            with self._lock:
                if self._closing:  # stop() has begun: the next server runs it
                    self._requeue([run_id])
                    self._need.pop(run_id, None)
                    return
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
        try:
            self._record_end(run_id, code)
        finally:
            # Only now: until the end is recorded, recover() must see the run as ours
            # (it would otherwise queue the killed run again instead).
            with self._lock:
                self._active.pop(run_id, None)
                self._need.pop(run_id, None)
            self._wake.set()

    def _record_end(self, run_id: int, code: int | None) -> None:
        """A worker has ended: if it recorded no end, mark its run interrupted and clear its folder."""
        try:
            conn = db.connect(self.db_path)
        except Exception:  # pragma: no cover - the database itself is gone
            log.exception("could not record the end of run %s", run_id)
            return
        try:
            run = db.get_run(conn, run_id)
            if run is None or run["status"] != db.RUNNING:
                return
            message = interruption_message(int(code or 0) if self.mode == "process" else 0,
                                           run["phase"])
            with db.transaction(conn):
                # Only if the run is still running (not queued again by stop() meanwhile).
                changed = conn.execute(
                    "UPDATE runs SET status = ?, phase = ?, message = ?, finished_utc = ? "
                    "WHERE id = ? AND status = ?",
                    (db.FAILED, INTERRUPTED_PHASE, message, db.utc_now(), run_id, db.RUNNING),
                ).rowcount
            if changed:
                log.warning("run %s: %s", run_id, message)
                folder = layout.run_dir(self.data_dir, run["site_id"], run_id)
                discard_partial_output(folder, note=message)
        except Exception:  # pragma: no cover - the database itself is gone
            log.exception("could not record the end of run %s", run_id)
        finally:
            conn.close()

    def busy(self) -> int:
        with self._lock:
            return len(self._active)
