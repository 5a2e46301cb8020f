"""Real `sillmark serve` processes for the tests: a free loopback port, start, wait, stop."""

from __future__ import annotations

import contextlib
import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on right now."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def wait_until_listening(port: int, server: subprocess.Popen, timeout: float = 60.0) -> None:
    """Until something accepts connections on ``port``; fails if ``server`` exits first."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if server.poll() is not None:
            raise AssertionError(f"the server exited early: {server.stderr.read().decode()[-2000:]}")
        with socket.socket() as s:
            s.settimeout(0.2)
            if s.connect_ex(("127.0.0.1", port)) == 0:
                return
        time.sleep(0.05)
    raise AssertionError(f"the server did not start listening on port {port}")


def stop(server: subprocess.Popen) -> None:
    """SIGTERM to the server's process group, SIGKILL if it has not ended in 20 s."""
    with contextlib.suppress(ProcessLookupError):
        os.killpg(server.pid, signal.SIGTERM)
    try:
        server.wait(20)
    except subprocess.TimeoutExpired:  # pragma: no cover - only if it hangs
        os.killpg(server.pid, signal.SIGKILL)
        server.wait(20)
    if server.stderr is not None:
        server.stderr.close()


@contextlib.contextmanager
def serving(data: Path, *, command: list[str] | None = None, cwd: Path = ROOT,
            env: dict | None = None) -> Iterator[str]:
    """A `sillmark serve` on a free port for the data folder ``data``; yields its base URL.

    ``command`` replaces ``python -m sillmark`` (e.g. an installed ``sillmark``
    script); the server runs in a session of its own and is stopped on exit.
    """
    port = free_port()
    argv = (command or [sys.executable, "-m", "sillmark"]) + ["serve", "--data", str(data),
                                                            "--port", str(port)]
    server = subprocess.Popen(argv, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                              start_new_session=True, env=env)
    try:
        wait_until_listening(port, server)
        yield f"http://127.0.0.1:{port}"
    finally:
        stop(server)
