"""The request limits as middleware on their own, around a stand-in app whose pace the test sets."""

from __future__ import annotations

import asyncio

import httpx
import pytest
from starlette.responses import JSONResponse

from service.web.limits import UploadLimitMiddleware, UploadQueueMiddleware


def _held_app(release: asyncio.Event, started: list[str]):
    """An ASGI app that reads the whole body, then waits for ``release`` before answering."""

    async def app(scope, receive, send):
        body = b""
        while True:
            message = await receive()
            body += message.get("body", b"")
            if not message.get("more_body"):
                break
        started.append(scope["path"])
        await release.wait()
        await JSONResponse({"received_bytes": len(body)}, status_code=201)(scope, receive, send)

    return app


def test_uploads_beyond_the_bound_answer_503_and_the_rest_are_served():
    async def run():
        release, started = asyncio.Event(), []
        app = UploadQueueMiddleware(_held_app(release, started), max_in_flight=2)
        async with httpx.AsyncClient(transport=httpx.ASGITransport(app=app), base_url="http://test") as http:
            held = [asyncio.create_task(http.post("/api/specimens", content=b"x")) for _ in range(2)]
            for _ in range(200):  # bounded wait until both are inside the app
                if len(started) == 2:
                    break
                await asyncio.sleep(0.01)
            refused = await http.post("/api/specimens", content=b"x")
            other_route = asyncio.create_task(http.post("/api/other", content=b"x"))
            await asyncio.sleep(0.05)
            release.set()
            answered = [await task for task in held]
            after = await http.post("/api/specimens", content=b"x")
            return refused, answered, await other_route, after, app.in_flight

    refused, answered, other_route, after, in_flight = asyncio.run(run())
    assert refused.status_code == 503 and refused.headers["retry-after"] == "30"
    assert "try again" in refused.json()["detail"]
    assert [r.status_code for r in answered] == [201, 201]
    assert other_route.status_code == 201  # only uploads are counted
    assert after.status_code == 201 and in_flight == 0


def test_upload_limit_counts_a_body_sent_in_chunks():
    async def run(chunks: list[bytes]):
        release, started = asyncio.Event(), []
        release.set()
        app = UploadLimitMiddleware(_held_app(release, started), max_bytes=1000)

        async def body():
            for chunk in chunks:
                yield chunk

        async with httpx.AsyncClient(transport=httpx.ASGITransport(app=app), base_url="http://test") as http:
            return await http.post("/api/specimens", content=body()), started

    within, started = asyncio.run(run([b"x" * 500, b"x" * 500]))
    assert within.status_code == 201 and within.json() == {"received_bytes": 1000}
    over, started = asyncio.run(run([b"x" * 600, b"x" * 600, b"x" * 600]))
    assert over.status_code == 413 and "limit" in over.json()["detail"]
    assert started == []  # the app never got past reading the body


@pytest.mark.parametrize("bad", [0, -5])
def test_limits_must_be_positive(bad):
    with pytest.raises(ValueError):
        UploadQueueMiddleware(None, max_in_flight=bad)
    with pytest.raises(ValueError):
        UploadLimitMiddleware(None, max_bytes=bad)
