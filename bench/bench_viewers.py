"""Benchmark: many people viewing the demo site at once, over loopback.

Starts ``sillmark serve`` (waitress, 8 request threads, the real process job
runner) on a fresh data folder and a free port on 127.0.0.1, waits until the
demo site (Caddlewick on the River Torvey, invented) is analysed, then lets N
viewers (threads, one keep-alive HTTP connection each) use its map for a fixed
time. Each viewer opens the site page and its stage table, then repeats, with
a pause of a few tenths of a second to a few seconds between actions:

- *pan* (3 in 5): a new view of 5 × 4 tiles (a 1280 × 1024 window) centred
  somewhere on the site at one of three zooms (the zoom that fits the site and
  the two above it), fetching its hillshade and water-level tiles;
- *stage* (2 in 5): the stage control moves by 1 to 25 slider steps of 0.01 m
  (a random walk that starts just below the spill elevation of the largest
  depression, as the page does), fetching the view's water tiles at the new
  level, the figures (``/stage``) and the asset table (``/assets``).

Like a browser, a viewer keeps what it fetched (tile URLs carry ``?run=`` and
may be kept for an hour) and does not ask for the same URL twice. Every answer
other than 200, and every failed connection, is an error.

Prints requests served, errors, and p50 / p95 / max latency per kind. Targets
(issue #6): no errors, and tile p95 under 300 ms with 50 viewers on a 2-core
machine. Exit status 0 when both are met.

All traffic goes to 127.0.0.1 only; the run is bounded by ``--seconds`` and
each request by a 30 s timeout, and the server is stopped at the end.

Usage: python bench/bench_viewers.py [--viewers 50] [--seconds 60] [--think 0.3 2.0]
                                     [--seed 6] [--json FILE]
"""

from __future__ import annotations

import argparse
import dataclasses
import http.client
import json
import math
import os
import random
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))

TILE_P95_TARGET_MS = 300.0
#: A 1280 × 1024 browser window shows 5 × 4 tiles of 256 px.
VIEW_COLS, VIEW_ROWS = 5, 4
LEVEL_STEP = 0.01


# --------------------------------------------------------------------------- the server


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@dataclasses.dataclass
class Server:
    """``sillmark serve`` in its own process group on 127.0.0.1."""

    process: subprocess.Popen
    port: int
    data: Path

    @property
    def host(self) -> str:
        return "127.0.0.1"

    def stop(self) -> None:
        if self.process.poll() is None:
            os.killpg(self.process.pid, signal.SIGINT)  # as Ctrl-C: the server stops its runner
            try:
                self.process.wait(20)
            except subprocess.TimeoutExpired:
                os.killpg(self.process.pid, signal.SIGKILL)
                self.process.wait(10)


def start_server(data: Path, *, threads: int = 8, timeout: float = 180.0) -> Server:
    """Start the server on a fresh data folder and wait until the demo site is analysed."""
    port = free_port()
    proc = subprocess.Popen(
        [sys.executable, "-m", "sillmark", "serve", "--data", str(data), "--port", str(port),
         "--threads", str(threads)],
        cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    server = Server(proc, port, data)
    deadline = time.monotonic() + timeout
    while True:
        if proc.poll() is not None:
            raise RuntimeError(f"the server stopped with exit code {proc.returncode}")
        try:
            status, body = get_json(server, "/api/sites/1/status")
            if status == 200 and body["state"] == "ready":
                return server
            if status == 200 and body["state"] == "failed":
                raise RuntimeError(f"the demo analysis failed: {body['run']['message']}")
        except (OSError, http.client.HTTPException, ValueError):
            pass
        if time.monotonic() > deadline:
            server.stop()
            raise RuntimeError("the demo site was not analysed in time")
        time.sleep(0.25)


def get_json(server: Server, path: str):
    conn = http.client.HTTPConnection(server.host, server.port, timeout=30)
    try:
        conn.request("GET", path)
        r = conn.getresponse()
        return r.status, json.loads(r.read())
    finally:
        conn.close()


# --------------------------------------------------------------------------- the viewers


def lonlat_to_tile(lon: float, lat: float, z: int) -> tuple[float, float]:
    """Fractional XYZ tile coordinates of a point (Web Mercator)."""
    n = 1 << z
    x = (lon + 180.0) / 360.0 * n
    y = (1.0 - math.asinh(math.tan(math.radians(lat))) / math.pi) / 2.0 * n
    return x, y


def fit_zoom(bounds, width_px: int = 1100, height_px: int = 760) -> int:
    w, s, e, n = bounds
    for z in range(22, -1, -1):
        x0, y0 = lonlat_to_tile(w, n, z)
        x1, y1 = lonlat_to_tile(e, s, z)
        if (x1 - x0) * 256 <= width_px and (y1 - y0) * 256 <= height_px:
            return z
    return 0


@dataclasses.dataclass
class Site:
    site_id: int
    run_id: int
    bounds: list
    level_min: float
    level_max: float
    level_start: float
    zooms: tuple


def describe_site(server: Server, site_id: int = 1) -> Site:
    _, site = get_json(server, f"/api/sites/{site_id}")
    _, deps = get_json(server, f"/api/sites/{site_id}/depressions")
    s = site["summary"]
    lo = math.floor(s["onset_min"] / LEVEL_STEP) * LEVEL_STEP
    hi = math.ceil(s["elevation_max"] / LEVEL_STEP) * LEVEL_STEP
    largest = max(deps["depressions"], key=lambda d: d["area_m2"]) if deps["depressions"] else None
    start = largest["spill_elevation"] - 10 * LEVEL_STEP if largest else lo + 0.25 * (hi - lo)
    z0 = fit_zoom(s["lonlat_bounds"])
    return Site(site_id, site["current_run"], s["lonlat_bounds"], lo, hi,
                min(max(start, lo), hi), (z0, z0 + 1, z0 + 2))


@dataclasses.dataclass
class Sample:
    kind: str
    ms: float
    ok: bool
    detail: str = ""


class Viewer:
    """One person at the map: a keep-alive connection, a browser cache, a level and a view."""

    def __init__(self, server: Server, site: Site, rng: random.Random, think: tuple[float, float],
                 samples: list, lock: threading.Lock) -> None:
        self.server, self.site, self.rng, self.think = server, site, rng, think
        self.samples, self.lock = samples, lock
        self.conn: http.client.HTTPConnection | None = None
        self.seen: set[str] = set()
        self.level = site.level_start
        self.view: list[tuple[int, int, int]] = []

    def fetch(self, kind: str, path: str) -> None:
        if path in self.seen:
            return
        t0 = time.perf_counter()
        ok, detail = False, ""
        for attempt in (1, 2):  # a keep-alive connection the server closed: reconnect once
            try:
                if self.conn is None:
                    self.conn = http.client.HTTPConnection(self.server.host, self.server.port, timeout=30)
                self.conn.request("GET", path, headers={"Accept-Encoding": "identity"})
                r = self.conn.getresponse()
                body = r.read()
                ok = r.status == 200 and len(body) > 0
                detail = "" if ok else f"{r.status} {path}"
                if r.getheader("Connection", "").lower() == "close":
                    self.conn.close()
                    self.conn = None
                break
            except (http.client.RemoteDisconnected, ConnectionResetError, BrokenPipeError) as exc:
                self.conn = None
                detail = f"{exc.__class__.__name__} {path}"
                if attempt == 2:
                    break
                t0 = time.perf_counter()
            except (OSError, http.client.HTTPException) as exc:
                self.conn = None
                detail = f"{exc.__class__.__name__} {path}"
                break
        ms = (time.perf_counter() - t0) * 1000.0
        if ok:
            self.seen.add(path)
        with self.lock:
            self.samples.append(Sample(kind, ms, ok, detail))

    def level_text(self) -> str:
        return f"{self.level:.2f}"

    def pan(self) -> None:
        w, s, e, n = self.site.bounds
        z = self.rng.choice(self.site.zooms)
        lon, lat = self.rng.uniform(w, e), self.rng.uniform(s, n)
        cx, cy = lonlat_to_tile(lon, lat, z)
        x0, y0 = int(cx) - VIEW_COLS // 2, int(cy) - VIEW_ROWS // 2
        self.view = [(z, x, y) for y in range(y0, y0 + VIEW_ROWS) for x in range(x0, x0 + VIEW_COLS)]
        sid, run = self.site.site_id, self.site.run_id
        for z_, x, y in self.view:
            self.fetch("tile", f"/tiles/{sid}/hillshade/{z_}/{x}/{y}.png?run={run}")
        self.water()

    def water(self) -> None:
        sid, run, lv = self.site.site_id, self.site.run_id, self.level_text()
        for z, x, y in self.view:
            self.fetch("tile", f"/tiles/{sid}/{lv}/{z}/{x}/{y}.png?run={run}")

    def stage(self) -> None:
        steps = self.rng.randint(1, 25) * self.rng.choice((-1, 1))
        self.level = min(max(self.level + steps * LEVEL_STEP, self.site.level_min), self.site.level_max)
        self.water()
        sid, lv = self.site.site_id, self.level_text()
        self.fetch("stage", f"/api/sites/{sid}/stage?level={lv}")
        self.fetch("assets", f"/api/sites/{sid}/assets?level={lv}")

    def run(self, deadline: float) -> None:
        sid = self.site.site_id
        self.fetch("page", f"/sites/{sid}")
        self.fetch("stage", f"/api/sites/{sid}/stage_table")
        self.pan()
        self.fetch("stage", f"/api/sites/{sid}/stage?level={self.level_text()}")
        while True:
            pause = self.rng.uniform(*self.think)
            if time.monotonic() + pause >= deadline:
                break
            time.sleep(pause)
            if self.rng.random() < 0.6:
                self.pan()
            else:
                self.stage()
        if self.conn is not None:
            self.conn.close()


@dataclasses.dataclass
class Report:
    viewers: int
    seconds: float
    requests: int
    errors: int
    error_samples: list
    per_kind: dict

    @property
    def tile_p95_ms(self) -> float:
        return self.per_kind.get("tile", {}).get("p95_ms", float("nan"))

    def meets_targets(self) -> bool:
        return self.errors == 0 and self.tile_p95_ms < TILE_P95_TARGET_MS

    def text(self) -> str:
        lines = [f"{self.viewers} viewers for {self.seconds:.0f} s: {self.requests} requests served "
                 f"({self.requests / self.seconds:.0f}/s), {self.errors} errors"]
        for kind, k in self.per_kind.items():
            lines.append(f"  {kind:7s} {k['count']:6d} requests   p50 {k['p50_ms']:7.1f} ms   "
                         f"p95 {k['p95_ms']:7.1f} ms   max {k['max_ms']:7.1f} ms")
        for e in self.error_samples:
            lines.append(f"  error: {e}")
        verdict = "meets" if self.meets_targets() else "MISSES"
        lines.append(f"tile p95 {self.tile_p95_ms:.1f} ms, {self.errors} errors: {verdict} the targets "
                     f"(0 errors, p95 < {TILE_P95_TARGET_MS:.0f} ms)")
        return "\n".join(lines)


def percentile(values: list[float], q: float) -> float:
    """The q-th percentile (0..100) by linear interpolation between order statistics."""
    if not values:
        return float("nan")
    v = sorted(values)
    pos = (len(v) - 1) * q / 100.0
    lo, hi = math.floor(pos), math.ceil(pos)
    return v[lo] + (v[hi] - v[lo]) * (pos - lo)


def run_viewers(server: Server, site: Site, *, viewers: int, seconds: float,
                think: tuple[float, float] = (0.3, 2.0), seed: int = 6) -> Report:
    """Let ``viewers`` threads use the map for ``seconds``; gather every request's latency."""
    samples: list[Sample] = []
    lock = threading.Lock()
    start = time.monotonic()
    deadline = start + seconds
    threads = []
    for k in range(viewers):
        v = Viewer(server, site, random.Random(seed * 1000 + k), think, samples, lock)
        t = threading.Thread(target=v.run, args=(deadline,), name=f"viewer-{k}", daemon=True)
        threads.append(t)
        t.start()
        time.sleep(min(0.05, seconds / max(viewers, 1) / 4))  # people do not all arrive at once
    for t in threads:
        t.join(seconds + 60)
    elapsed = time.monotonic() - start
    per_kind = {}
    for kind in ("tile", "stage", "assets", "page"):
        ms = [s.ms for s in samples if s.kind == kind and s.ok]
        if ms:
            per_kind[kind] = {"count": len(ms), "p50_ms": percentile(ms, 50),
                              "p95_ms": percentile(ms, 95), "max_ms": max(ms),
                              "mean_ms": statistics.fmean(ms)}
    bad = [s for s in samples if not s.ok]
    return Report(viewers=viewers, seconds=elapsed, requests=sum(1 for s in samples if s.ok),
                  errors=len(bad), error_samples=[s.detail for s in bad[:10]], per_kind=per_kind)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--viewers", type=int, default=50)
    ap.add_argument("--seconds", type=float, default=60.0)
    ap.add_argument("--think", type=float, nargs=2, default=(0.3, 2.0), metavar=("MIN", "MAX"),
                    help="pause between a viewer's actions, seconds (default 0.3 2.0)")
    ap.add_argument("--threads", type=int, default=8, help="server request threads (default 8)")
    ap.add_argument("--seed", type=int, default=6)
    ap.add_argument("--json", type=Path, default=None, help="also write the figures here")
    args = ap.parse_args(argv)
    if not (1 <= args.viewers <= 200 and 0 < args.seconds <= 600):
        ap.error("--viewers must be 1..200 and --seconds at most 600 (a bounded load test)")

    data = Path(tempfile.mkdtemp(prefix="sillmark-viewers-"))
    t0 = time.perf_counter()
    server = start_server(data, threads=args.threads)
    try:
        print(f"server on 127.0.0.1:{server.port}, demo analysed in {time.perf_counter() - t0:.1f} s")
        site = describe_site(server)
        print(f"site {site.site_id} run {site.run_id}: zooms {site.zooms}, levels "
              f"{site.level_min:.2f}..{site.level_max:.2f} m from {site.level_start:.2f} m")
        report = run_viewers(server, site, viewers=args.viewers, seconds=args.seconds,
                             think=tuple(args.think), seed=args.seed)
    finally:
        server.stop()
        shutil.rmtree(data, ignore_errors=True)
    print(report.text())
    if args.json is not None:
        args.json.write_text(json.dumps(dataclasses.asdict(report), indent=1))
    return 0 if report.meets_targets() else 1


if __name__ == "__main__":
    sys.exit(main())
