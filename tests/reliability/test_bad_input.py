"""Bad uploads get a clear 4xx JSON reason, never a 5xx, and the service keeps serving.

The format is decided from the bytes alone: the corpus sends every file under an innocent
name and declared type ("specimen.png", image/png), so only the content can refuse it.
"""

from __future__ import annotations

import csv
import gzip
import io
import resource
import socket
import struct
import time
import zipfile
import zlib

import numpy as np
import pytest

from tests.reliability.conftest import BACKENDS, LOOPBACK, app_client, database_url, encode, specimen_rgb


def _png_chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))


def decompression_bomb_png(side_px: int = 40_000) -> bytes:
    """A valid 1-bit grey PNG of side_px x side_px black pixels: ~200 kB that inflate to 1.6 Gpx.

    Built chunk by chunk from the PNG specification (W3C PNG, 2nd ed.: signature, IHDR with
    width, height, bit depth 1, colour type 0; zlib-compressed scanlines each led by a filter
    byte; IEND), so the header is exactly what a decoder would trust.
    """
    row = b"\x00" * (1 + side_px // 8)  # filter type 0, then side_px bits
    compressor = zlib.compressobj(9)
    rows_per_piece = 1000
    idat = b"".join(compressor.compress(row * rows_per_piece) for _ in range(side_px // rows_per_piece))
    idat += compressor.flush()
    ihdr = struct.pack(">IIBBBBB", side_px, side_px, 1, 0, 0, 0, 0)
    return b"\x89PNG\r\n\x1a\n" + _png_chunk(b"IHDR", ihdr) + _png_chunk(b"IDAT", idat) + _png_chunk(b"IEND", b"")


def _zip_of_png() -> bytes:
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as archive:
        archive.writestr("specimen.png", encode(np.zeros((64, 64, 3), np.uint8)))
    return out.getvalue()


def bad_uploads() -> dict[str, tuple[bytes, set[int]]]:
    """Name -> (bytes, acceptable statuses). Refused formats must answer exactly 415."""
    rng = np.random.default_rng(2026)
    jpeg = encode(specimen_rgb(size_px=256), "JPEG", quality=90)
    return {
        "empty": (b"", {415}),
        "truncated JPEG": (jpeg[: len(jpeg) // 3], {422}),
        "text named .png": (b"copper sulfate 0.5 M, 6 V, dish 3\n" * 20, {415}),
        "HTML with script": (b"<!DOCTYPE html><html><body><script>alert(document.cookie)</script></body></html>", {415}),
        "SVG with script": (b'<?xml version="1.0"?><svg xmlns="http://www.w3.org/2000/svg">'
                            b"<script>alert(1)</script><circle r='5'/></svg>", {415}),
        "PDF": (b"%PDF-1.7\n1 0 obj << /Type /Catalog >> endobj\ntrailer << /Root 1 0 R >>\n%%EOF\n", {415}),
        "zip archive": (_zip_of_png(), {415}),
        "gzip archive": (gzip.compress(b"dish 3, 6 V\n" * 100), {415}),
        "GIF": (encode(np.zeros((32, 32, 3), np.uint8), "GIF"), {415}),
        "1 x 1 image": (encode(np.zeros((1, 1, 3), np.uint8)), {422}),
        "all black": (encode(np.zeros((256, 256, 3), np.uint8)), {422}),
        "all white": (encode(np.full((256, 256, 3), 255, np.uint8)), {422}),
        "random bytes": (rng.integers(0, 256, 4096, dtype=np.uint8).tobytes(), {415}),
        "40k x 40k bomb": (decompression_bomb_png(), {413}),
        "oversize body": (b"\xff\xd8\xff" + bytes(int(1.5 * 2**20)), {413}),
    }


CORPUS = bad_uploads()


@pytest.fixture(scope="module", params=BACKENDS)
def client(request, tmp_path_factory):
    with database_url(request.param) as url, app_client(tmp_path_factory.mktemp("bad-input"), database_url=url) as c:
        yield c


def test_corpus_is_large_enough():
    # The issue asks for at least 12 bad uploads.
    assert len(CORPUS) >= 12


@pytest.mark.parametrize("name", list(CORPUS))
def test_bad_upload_answers_4xx_with_a_reason(client, name):
    data, statuses = CORPUS[name]
    before_rss_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    started = time.perf_counter()
    response = client.post("/api/specimens", files={"image": ("specimen.png", data, "image/png")},
                           data={"label": "bad input"})
    elapsed_s = time.perf_counter() - started
    assert response.status_code in statuses, (name, response.status_code, response.text)
    assert response.headers["content-type"].startswith("application/json")
    detail = response.json()["detail"]
    assert isinstance(detail, str) and len(detail) > 10, detail
    if name == "40k x 40k bomb":
        # Refused from the header: fast, and without the 1.6 GB (1 byte/px grey) a decode would need.
        grown_mb = (resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - before_rss_kb) / 1024
        assert elapsed_s < 5.0, elapsed_s
        assert grown_mb < 200, grown_mb
        assert "40,000" in detail or "40000" in detail, detail


def test_service_healthy_and_nothing_stored_after_the_corpus(client, tmp_path_factory):
    for data, _ in CORPUS.values():
        assert client.post("/api/specimens", files={"image": ("x.png", data, "image/png")}).status_code < 500
    assert client.get("/api/health").json()["status"] == "ok"
    listing = client.get("/api/specimens").json()
    assert listing["total"] == 0 and listing["items"] == []
    specimens_dir = client.app.state.store.specimens_dir
    assert list(specimens_dir.iterdir()) == [], "a refused upload left files behind"


@pytest.mark.parametrize("fields", [
    {"pixel_size_mm": "-1"}, {"pixel_size_mm": "abc"}, {"pixel_size_mm": "nan"}, {"threshold": "2"},
    {"roi": "10,10"}, {"roi": "a,b,c"}, {"roi": "10,10,-5"}, {"page": "-1"}, {"kind": "<script>"},
    {"mode": "guess"}, {"polarity": "sideways"}, {"label": "x" * 1000},
])
def test_bad_form_fields_answer_422(client, fields):
    png = encode(np.zeros((64, 64, 3), np.uint8))
    response = client.post("/api/specimens", files={"image": ("a.png", png, "image/png")}, data=fields)
    assert response.status_code == 422, (fields, response.text)
    assert response.json()["detail"]


@pytest.mark.parametrize("label", ["dish\x003", "two\nlines", "bell\x07"])
def test_labels_with_control_characters_answer_422(client, label):
    png = encode(np.zeros((64, 64, 3), np.uint8))
    response = client.post("/api/specimens", files={"image": ("a.png", png, "image/png")}, data={"label": label})
    assert response.status_code == 422 and "label" in response.json()["detail"]


@pytest.mark.parametrize("path", ["/api/specimens/%00", "/api/specimens?label=%00", "/specimens?label=dish%003",
                                  "/api/specimens/a%00b/export.csv"])
def test_nul_characters_in_urls_answer_400(client, path):
    response = client.get(path)
    assert response.status_code == 400 and "NUL" in response.json()["detail"]


@pytest.mark.parametrize("path", ["/api/specimens?offset=99999999999999999999999", "/specimens?offset=2147483648",
                                  "/api/specimens?limit=abc", "/api/specimens?limit=0", "/compare?ids=" + "&ids=".join("a" * 13)])
def test_out_of_range_queries_answer_422(client, path):
    response = client.get(path)
    assert response.status_code == 422, (path, response.status_code)
    assert response.json()["detail"]


@pytest.mark.parametrize(("name", "request_kwargs", "status"), [
    ("JSON instead of a form", {"json": {"image": "x"}}, 422),
    ("multipart without boundary", {"content": b"abc", "headers": {"content-type": "multipart/form-data"}}, 400),
    ("image sent as a text field", {"content": b'--b\r\nContent-Disposition: form-data; name="image"\r\n\r\nhi\r\n--b--\r\n',
                                    "headers": {"content-type": "multipart/form-data; boundary=b"}}, 422),
    ("1,200 form fields", {"content": b"".join(b'--b\r\nContent-Disposition: form-data; name="f%d"\r\n\r\nx\r\n' % i
                                               for i in range(1200)) + b"--b--\r\n",
                           "headers": {"content-type": "multipart/form-data; boundary=b"}}, 400),
])
def test_malformed_requests_answer_4xx(client, name, request_kwargs, status):
    response = client.post("/api/specimens", **request_kwargs)
    assert response.status_code == status, (name, response.text)
    assert response.json()["detail"]


def test_missing_image_field_answers_422(client):
    response = client.post("/api/specimens", data={"label": "no image"})
    assert response.status_code == 422 and "image" in response.json()["detail"]


def test_format_is_read_from_content_not_name_or_type(client):
    """A PNG sent as 'notes.txt' of type text/plain is analysed as PNG and stored as source.png."""
    png = encode(specimen_rgb())
    response = client.post("/api/specimens", files={"image": ("notes.txt", png, "text/plain")})
    assert response.status_code == 201, response.text
    body = response.json()
    assert body["image"]["format"] == "PNG"
    assert "source.png" in body["files"]
    assert client.delete(f"/api/specimens/{body['id']}").status_code == 204


@pytest.mark.parametrize("filename", ["../../etc/passwd", "<script>alert(1)</script>.png", "/tmp/x.png",
                                      "..\\..\\boot.ini", "long " * 120 + ".png"])
def test_client_filename_is_data_never_a_path(client, filename):
    store = client.app.state.store
    png = encode(specimen_rgb())
    response = client.post("/api/specimens", files={"image": (filename, png, "image/png")})
    assert response.status_code == 201, response.text
    body = response.json()
    folder = store.folder(body["id"])
    stored = sorted(p.name for p in folder.iterdir())
    # Generated names only: the upload is source.<format>, the rest are the service's renderings.
    assert stored == sorted(body["files"]) and "source.png" in stored
    assert all(name.isascii() and "/" not in name and ".." not in name for name in stored)
    assert [p for p in store.data_dir.rglob("*") if "passwd" in p.name or "script" in p.name] == []
    assert body["source"]["filename"] == filename[:255]  # kept as data, shortened to 255 characters
    assert client.delete(f"/api/specimens/{body['id']}").status_code == 204


def test_labels_and_filenames_are_escaped_on_pages(client):
    hostile = '<script>alert("label")</script><img src=x onerror=alert(2)>'
    formula = '=HYPERLINK("http://evil.example","open")' + hostile  # would run in a spreadsheet
    png = encode(specimen_rgb())
    ids = []
    for label in (hostile, formula):  # two, so the compare page shows them side by side
        response = client.post("/api/specimens", files={"image": (f"{hostile}.png", png, "image/png")},
                               data={"label": label})
        assert response.status_code == 201, response.text
        ids.append(response.json()["id"])
    specimen_id = ids[0]
    for path in (f"/specimens/{specimen_id}", "/specimens", f"/compare?ids={ids[0]}&ids={ids[1]}"):
        page = client.get(path)
        assert page.status_code == 200, (path, page.status_code)
        assert "<script>alert" not in page.text and "<img src=x" not in page.text, path
        assert "&lt;script&gt;" in page.text, f"{path} does not show the label at all"
    export = client.get("/api/specimens/export.csv")
    assert export.status_code == 200 and export.headers["content-type"].startswith("text/csv")
    cells = [cell for row in csv.reader(io.StringIO(export.text)) for cell in row]
    assert "'" + formula in cells and formula not in cells  # a text cell, never a formula
    for i in ids:
        assert client.delete(f"/api/specimens/{i}").status_code == 204


def _read_status_line(sock: socket.socket, timeout_s: float) -> bytes:
    sock.settimeout(timeout_s)
    received = b""
    while b"\r\n" not in received:
        chunk = sock.recv(4096)
        if not chunk:
            break
        received += chunk
    return received


def test_upload_limit_answers_before_the_body_is_read(server_factory, tmp_path):
    """On the real server (uvicorn), 413 arrives while the client is still sending.

    Declared too large: refused on the headers alone. Chunked with no length: refused once
    the running count passes 1 MiB, though the body has not ended (no final chunk is sent).
    """
    server = server_factory(tmp_path / "data", RAMIFORM_WORKERS="0")
    head = (f"POST /api/specimens HTTP/1.1\r\nHost: {LOOPBACK}\r\n"
            "Content-Type: multipart/form-data; boundary=b\r\n")
    with socket.create_connection((LOOPBACK, server.port)) as sock:
        sock.sendall((head + f"Content-Length: {200 * 2**20}\r\n\r\n").encode())
        assert b" 413 " in _read_status_line(sock, 10.0)
    with socket.create_connection((LOOPBACK, server.port)) as sock:
        part_head = (b'--b\r\nContent-Disposition: form-data; name="image"; filename="a.png"\r\n'
                     b"Content-Type: image/png\r\n\r\n\x89PNG\r\n\x1a\n")
        sock.sendall((head + "Transfer-Encoding: chunked\r\n\r\n").encode()
                     + f"{len(part_head):x}\r\n".encode() + part_head + b"\r\n")
        chunk = b"x" * 65536
        status = b""
        for _ in range(40):  # up to 2.5 MiB; never the final zero-length chunk
            try:
                sock.sendall(f"{len(chunk):x}\r\n".encode() + chunk + b"\r\n")
            except (BrokenPipeError, ConnectionResetError):
                break
            sock.settimeout(0.05)
            try:
                status = sock.recv(4096)
            except (TimeoutError, BlockingIOError):
                continue
            break
        status = status or _read_status_line(sock, 10.0)
        assert b" 413 " in status, status
    assert server.process.poll() is None


def test_pixel_limit_setting_applies_to_uploads(tmp_path):
    """RAMIFORM_MAX_PIXELS: a 600 x 600 photo (360,000 px) is refused by a service set to 250,000."""
    png = encode(specimen_rgb(size_px=600))
    with app_client(tmp_path, max_pixels=250_000) as small:
        response = small.post("/api/specimens", files={"image": ("big.png", png, "image/png")})
    assert response.status_code == 413, response.text
    assert "250,000" in response.json()["detail"]


ODD_IMAGES = {
    "2 x 2": np.array([[0, 255], [255, 0]], np.uint8),
    "8 x 8 noise": np.random.default_rng(1).integers(0, 256, (8, 8), dtype=np.uint8),
    "one bright pixel": np.pad(np.full((1, 1), 255, np.uint8), 63),
    "one dark pixel": np.pad(np.zeros((1, 1), np.uint8), 63, constant_values=255),
    "1 x 400 strip": np.random.default_rng(2).integers(0, 256, (1, 400), dtype=np.uint8),
    "400 x 3 strip": np.random.default_rng(3).integers(0, 256, (400, 3), dtype=np.uint8),
    "half black, half white": np.repeat(np.array([[0, 255]], np.uint8), 128, axis=1).repeat(128, axis=0),
    "two grey levels": np.where(np.indices((200, 200)).sum(0) % 7 == 0, 120, 121).astype(np.uint8),
    "noise 256 x 256": np.random.default_rng(4).integers(0, 256, (256, 256), dtype=np.uint8),
    "checkerboard": (np.indices((256, 256)).sum(0) % 2 * 255).astype(np.uint8),
    "16-bit ramp": (np.linspace(0, 65535, 256 * 256).reshape(256, 256)).astype(np.uint16),
}


@pytest.mark.parametrize("name", list(ODD_IMAGES))
def test_odd_but_decodable_images_never_answer_5xx(client, name):
    """Images that decode but hold little or nothing to measure: 201 or a 4xx reason, never 5xx."""
    response = client.post("/api/specimens", files={"image": ("odd.png", encode(ODD_IMAGES[name]), "image/png")})
    assert response.status_code == 201 or 400 <= response.status_code < 500, (name, response.text[:300])
    if response.status_code == 201:
        assert client.delete(f"/api/specimens/{response.json()['id']}").status_code == 204
    else:
        assert response.json()["detail"]


def test_every_answer_forbids_foreign_scripts_framing_and_type_sniffing(client):
    for path in ("/", "/specimens", "/api/health", "/api/specimens/missing"):
        headers = client.get(path).headers
        policy = headers["content-security-policy"]
        assert "script-src 'self'" in policy and "frame-ancestors 'none'" in policy, path
        assert "unsafe-inline" not in policy.split("script-src")[1].split(";")[0], path
        assert headers["x-content-type-options"] == "nosniff", path
