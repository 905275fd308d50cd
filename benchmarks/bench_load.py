"""Uploads under load against a single upload, side by side, on the real server.

Goal (issue 6): 32 uploads at concurrency 8 complete without errors and ``/api/health``
answers within a second throughout. Reported: uploads per second, p50/p95 latency under
load, the latency of one upload alone, and the slowest health answer during the load.

The specimen is a rendering of a grown DLA cluster made by the project (demo data). The
server is ``ramiform serve`` on a loopback port with a fresh data folder, killed at the end.
Run: ``.venv/bin/python benchmarks/bench_load.py [--uploads 32] [--concurrency 8]``.
"""

from __future__ import annotations

import argparse
import concurrent.futures
import contextlib
import io
import os
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

import httpx
import numpy as np

ROOT = Path(__file__).resolve().parents[1]
LOOPBACK = "127.0.0.1"


def specimen_png(size_px: int, seed: int = 3) -> bytes:
    from PIL import Image

    from service.imaging import render_photo
    from service.simulate import grow

    rgb = render_photo(grow("dla", 800, seed=seed) > 0, seed=seed, size_px=size_px)
    out = io.BytesIO()
    Image.fromarray(rgb).save(out, format="PNG")
    return out.getvalue()


@contextlib.contextmanager
def running_server(workers: int | None):
    """``ramiform serve`` on a free loopback port with a temporary data folder; yields its URL."""
    data_dir = Path(tempfile.mkdtemp(prefix="ramiform-bench-load-"))
    with socket.socket() as s:
        s.bind((LOOPBACK, 0))
        port = s.getsockname()[1]
    env = {**os.environ, "RAMIFORM_DATA_DIR": str(data_dir), "RAMIFORM_API_KEYS": "", "RAMIFORM_DATABASE_URL": ""}
    if workers is not None:
        env["RAMIFORM_WORKERS"] = str(workers)
    log = open(data_dir / "server.log", "wb")  # noqa: SIM115 - closed below
    process = subprocess.Popen([str(ROOT / ".venv" / "bin" / "ramiform"), "serve", "--host", LOOPBACK,
                                "--port", str(port)], env=env, stdout=log, stderr=subprocess.STDOUT,
                               start_new_session=True)
    url = f"http://{LOOPBACK}:{port}"
    try:
        for _ in range(300):
            if process.poll() is not None:
                raise RuntimeError(f"server exited: {(data_dir / 'server.log').read_text()[-2000:]}")
            with contextlib.suppress(httpx.HTTPError):
                if httpx.get(f"{url}/api/health", timeout=2).status_code == 200:
                    break
            time.sleep(0.2)
        else:
            raise RuntimeError("server did not start within 60 s")
        yield url
    finally:
        with contextlib.suppress(ProcessLookupError):
            os.killpg(process.pid, signal.SIGKILL)
        process.wait(timeout=30)
        log.close()
        shutil.rmtree(data_dir, ignore_errors=True)


def upload(http: httpx.Client, png: bytes, label: str) -> float:
    """Seconds until one upload is answered 201 (raises on anything else)."""
    start = time.perf_counter()
    response = http.post("/api/specimens", data={"label": label}, files={"image": ("specimen.png", png, "image/png")})
    elapsed = time.perf_counter() - start
    if response.status_code != 201:
        raise RuntimeError(f"upload answered {response.status_code}: {response.text[:200]}")
    return elapsed


class HealthWatch:
    """Polls ``/api/health`` from its own thread; records every answer's latency (s)."""

    def __init__(self, url: str, interval_s: float = 0.25) -> None:
        self.url, self.interval_s = url, interval_s
        self.latencies_s: list[float] = []
        self.failures: list[str] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        with httpx.Client(base_url=self.url, timeout=10) as http:
            while not self._stop.is_set():
                start = time.perf_counter()
                try:
                    ok = http.get("/api/health").status_code == 200
                except httpx.HTTPError as exc:
                    ok, reason = False, type(exc).__name__
                else:
                    reason = "not 200"
                self.latencies_s.append(time.perf_counter() - start)
                if not ok:
                    self.failures.append(reason)
                self._stop.wait(self.interval_s)

    def __enter__(self) -> HealthWatch:
        self._thread.start()
        return self

    def __exit__(self, *exc_info) -> None:
        self._stop.set()
        self._thread.join(timeout=30)


def run_load(url: str, png: bytes, n_uploads: int, concurrency: int) -> dict[str, float]:
    """Fire ``n_uploads`` at ``concurrency``; throughput, latency percentiles, slowest health answer."""
    limits = httpx.Limits(max_connections=concurrency)
    with httpx.Client(base_url=url, timeout=600, limits=limits) as http, HealthWatch(url) as health:
        start = time.perf_counter()
        with concurrent.futures.ThreadPoolExecutor(concurrency) as pool:
            latencies = list(pool.map(lambda i: upload(http, png, f"load {i}"), range(n_uploads)))
        wall_s = time.perf_counter() - start
    if health.failures:
        raise RuntimeError(f"/api/health failed during the load: {health.failures}")
    return {
        "uploads_per_s": n_uploads / wall_s,
        "wall_s": wall_s,
        "p50_s": float(np.percentile(latencies, 50)),
        "p95_s": float(np.percentile(latencies, 95)),
        "health_max_s": max(health.latencies_s),
        "health_polls": len(health.latencies_s),
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--uploads", type=int, default=32)
    parser.add_argument("--concurrency", type=int, default=8)
    parser.add_argument("--size-px", type=int, default=320, help="side of the specimen photo")
    parser.add_argument("--workers", type=int, default=None, help="analysis processes (default: one per core)")
    args = parser.parse_args(argv)

    png = specimen_png(args.size_px)
    with running_server(args.workers) as url, httpx.Client(base_url=url, timeout=600) as http:
        upload(http, png, "warm-up")  # starts the analysis processes and loads their caches
        single_s = statistics.median(upload(http, png, f"single {i}") for i in range(3))
        load = run_load(url, png, args.uploads, args.concurrency)
    print(f"specimen: {args.size_px} x {args.size_px} px PNG ({len(png) / 1024:.0f} KiB), "
          f"{os.cpu_count()} cores, workers={args.workers or 'one per core'}")
    print(f"one upload alone (median of 3):           {single_s:6.2f} s   ({1 / single_s:.2f} uploads/s)")
    print(f"{args.uploads} uploads at concurrency {args.concurrency}:"
          f"         {load['uploads_per_s']:6.2f} uploads/s in {load['wall_s']:.1f} s")
    print(f"  latency p50 / p95:                      {load['p50_s']:6.2f} s / {load['p95_s']:.2f} s "
          f"({load['p50_s'] / single_s:.1f}x / {load['p95_s'] / single_s:.1f}x one alone)")
    print(f"  slowest /api/health of {load['health_polls']} polls:        {load['health_max_s'] * 1000:6.0f} ms "
          f"(goal: under 1000 ms)")
    return 0 if load["health_max_s"] < 1.0 else 1


if __name__ == "__main__":
    sys.exit(main())
