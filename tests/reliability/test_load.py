"""Under load: 32 uploads at concurrency 8 on the real server, health answering within 1 s.

The load and the health watch are those of ``benchmarks/bench_load.py``, so the test and the
published figures measure the same thing.
"""

from __future__ import annotations

import httpx
import pytest

from benchmarks.bench_load import run_load, upload
from tests.reliability.conftest import encode, specimen_rgb

N_UPLOADS = 32
CONCURRENCY = 8


@pytest.mark.slow
def test_32_uploads_at_concurrency_8_with_health_under_a_second(server_factory, tmp_path):
    png = encode(specimen_rgb(size_px=256))
    server = server_factory(tmp_path / "data", RAMIFORM_WORKERS="2")
    with httpx.Client(base_url=server.url, timeout=300) as http:
        upload(http, png, "warm-up")  # the analysis processes start on first use
    figures = run_load(server.url, png, N_UPLOADS, CONCURRENCY)  # raises on any failed upload or health check
    assert figures["health_max_s"] < 1.0, figures
    assert figures["health_polls"] >= 10, figures  # polled throughout, not once
    with httpx.Client(base_url=server.url, timeout=60) as http:
        listing = http.get("/api/specimens", params={"limit": 100}).json()
    assert listing["total"] == N_UPLOADS + 1
    assert sorted(item["label"] for item in listing["items"] if item["label"] != "warm-up") == sorted(
        f"load {i}" for i in range(N_UPLOADS))
    assert server.process.poll() is None
