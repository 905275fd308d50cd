"""Access between labs: keys on the API, a signed cookie on the pages, nothing crosses labs.

With ``RAMIFORM_API_KEYS="lab-a:KEY,lab-b:KEY"`` every specimen belongs to the lab that
uploaded it; another lab's id must answer exactly like an id that does not exist.
"""

from __future__ import annotations

import logging
import secrets
import socket
from urllib.parse import unquote

import httpx
import pytest
from fastapi.testclient import TestClient

from service.web import credentials
from service.web.app import create_app
from service.web.auth import COOKIE_NAME, cookie_value
from tests.reliability.conftest import app_client, encode, make_settings, specimen_rgb

KEY_A = "a3f9-lab-a-secret-7c21"
KEY_B = "b81e-lab-b-secret-04d9"
KEYS = f"lab-a:{KEY_A},lab-b:{KEY_B}"
WRONG_KEY = "c0ffee-not-a-lab-key-99"


def bearer(key: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {key}"}


def cookie(value: str) -> dict[str, str]:
    return {"Cookie": f"{COOKIE_NAME}={value}"}


def browser(client: TestClient) -> TestClient:
    """A client of its own cookie jar on the same running app, seeing redirects as they come."""
    return TestClient(client.app, follow_redirects=False, raise_server_exceptions=False)


@pytest.fixture(scope="module")
def labs(tmp_path_factory):
    """A keyed service with one specimen per lab: ``(client, {"lab-a": id, "lab-b": id})``."""
    png = encode(specimen_rgb())
    with app_client(tmp_path_factory.mktemp("labs"), api_keys=KEYS) as client:
        ids = {}
        for lab, key in (("lab-a", KEY_A), ("lab-b", KEY_B)):
            response = client.post("/api/specimens", headers=bearer(key), data={"label": "dish 1"},
                                   files={"image": (f"{lab}.png", png, "image/png")})
            assert response.status_code == 201, response.text
            ids[lab] = response.json()["id"]
        yield client, ids


def _routes(specimen_id: str) -> list[tuple[str, str]]:
    return [("GET", "/api/specimens"), ("GET", "/api/specimens/export.csv"), ("GET", f"/api/specimens/{specimen_id}"),
            ("GET", f"/api/specimens/{specimen_id}/export.csv"),
            ("GET", f"/api/specimens/{specimen_id}/files/thumbnail.png"), ("DELETE", f"/api/specimens/{specimen_id}"),
            ("GET", f"/api/specimens/{specimen_id}/history"), ("POST", f"/api/specimens/{specimen_id}/reanalyze"),
            ("GET", "/api/references")]


@pytest.mark.parametrize("headers", [{}, bearer(WRONG_KEY), bearer(""), bearer(KEY_A + "0"),
                                     bearer(KEY_A[:-1]), {"Authorization": f"Basic {KEY_A}"},
                                     {"Authorization": KEY_A}, {"X-API-Key": KEY_A}])
def test_api_answers_401_without_a_valid_key(labs, headers):
    client, ids = labs
    for method, path in _routes(ids["lab-a"]):
        response = client.request(method, path, headers=headers)
        assert response.status_code == 401, (method, path, headers, response.status_code)
        assert response.headers.get("www-authenticate") == "Bearer"
        assert "key" in response.json()["detail"]
    upload = client.post("/api/specimens", headers=headers, files={"image": ("a.png", b"\x89PNG", "image/png")})
    assert upload.status_code == 401
    # Nothing was deleted by the refused requests.
    assert client.get(f"/api/specimens/{ids['lab-a']}", headers=bearer(KEY_A)).status_code == 200


def test_each_lab_lists_and_exports_only_its_own(labs):
    client, ids = labs
    for lab, key, other in (("lab-a", KEY_A, "lab-b"), ("lab-b", KEY_B, "lab-a")):
        listing = client.get("/api/specimens", headers=bearer(key)).json()
        assert listing["total"] == 1 and [item["id"] for item in listing["items"]] == [ids[lab]]
        by_label = client.get("/api/specimens", params={"label": "dish 1"}, headers=bearer(key)).json()
        assert [item["id"] for item in by_label["items"]] == [ids[lab]]
        csv = client.get("/api/specimens/export.csv", headers=bearer(key)).text
        assert ids[lab] in csv and ids[other] not in csv
        assert client.get(f"/api/specimens/{ids[lab]}", headers=bearer(key)).json()["id"] == ids[lab]


def test_another_labs_id_answers_exactly_like_a_missing_one(labs):
    client, ids = labs
    theirs, missing = ids["lab-b"], secrets.token_urlsafe(18)
    paths = [("GET", "/api/specimens/{}"), ("GET", "/api/specimens/{}/export.csv"),
             ("GET", "/api/specimens/{}/files/thumbnail.png"), ("GET", "/api/specimens/{}/files/source.png"),
             ("DELETE", "/api/specimens/{}"), ("GET", "/specimens/{}")]
    for method, template in paths:
        foreign = client.request(method, template.format(theirs), headers=bearer(KEY_A))
        absent = client.request(method, template.format(missing), headers=bearer(KEY_A))
        assert foreign.status_code == absent.status_code == 404, (template, foreign.status_code)
        assert foreign.json()["detail"].replace(theirs, "ID") == absent.json()["detail"].replace(missing, "ID")
    for path in ("/api/specimens/{}/reanalyze",):
        foreign = client.post(path.format(theirs), json={"threshold": 0.4}, headers=bearer(KEY_A))
        absent = client.post(path.format(missing), json={"threshold": 0.4}, headers=bearer(KEY_A))
        assert foreign.status_code == absent.status_code == 404, (path, foreign.status_code)
        assert foreign.json()["detail"].replace(theirs, "ID") == absent.json()["detail"].replace(missing, "ID")
    compare = client.get("/compare", params=[("ids", ids["lab-a"]), ("ids", theirs)], headers=bearer(KEY_A))
    assert compare.status_code == 200 and theirs not in compare.text
    # Lab B's specimen survived lab A's attempts to delete and to re-measure it.
    kept = client.get(f"/api/specimens/{theirs}", headers=bearer(KEY_B))
    assert kept.status_code == 200 and [h["number"] for h in kept.json()["history"]] == [1]


def test_pages_ask_for_the_key_once_and_keep_a_signed_cookie(labs):
    client, ids = labs
    html = {"Accept": "text/html"}
    with browser(client) as b:
        first = b.get("/specimens", headers=html)
        assert first.status_code == 303 and first.headers["location"] == "/login?next=%2Fspecimens"
        assert b.get("/login", params={"next": "/specimens"}).status_code == 200

        refused = b.post("/login", data={"key": WRONG_KEY, "next": "/specimens"})
        assert refused.status_code == 401 and COOKIE_NAME not in b.cookies

        signed_in = b.post("/login", data={"key": KEY_A, "next": "/specimens"})
        assert signed_in.status_code == 303 and signed_in.headers["location"] == "/specimens"
        set_cookie = signed_in.headers["set-cookie"].lower()
        assert "httponly" in set_cookie and "samesite=lax" in set_cookie and "path=/" in set_cookie
        assert KEY_A.lower() not in unquote(set_cookie), "the cookie must not carry the key"

        # From now on the cookie stands for the key: pages, the pictures on them, the API.
        page = b.get("/specimens", headers=html)
        assert page.status_code == 200 and ids["lab-a"] in page.text and ids["lab-b"] not in page.text
        report = b.get(f"/specimens/{ids['lab-a']}", headers=html)
        assert report.status_code == 200
        assert b.get(f"/api/specimens/{ids['lab-a']}/files/overlay.png").status_code == 200
        assert b.get(f"/specimens/{ids['lab-b']}", headers=html).status_code == 404
        assert [i["id"] for i in b.get("/api/specimens").json()["items"]] == [ids["lab-a"]]

        b.post("/logout")
        assert b.get("/specimens", headers=html).status_code == 303


@pytest.mark.parametrize("path", ["/", "/specimens", "/compare", "/library"])
def test_every_page_sends_a_browser_without_a_key_to_sign_in(labs, path):
    client, _ = labs
    response = browser(client).get(path, headers={"Accept": "text/html"})
    assert response.status_code == 303 and response.headers["location"].startswith("/login?next=")


def test_forged_stale_and_cross_site_cookies_are_refused(labs, tmp_path):
    client, ids = labs
    settings = client.app.state.settings
    good = cookie_value(settings, "lab-a")
    other_keys = make_settings(tmp_path, api_keys=f"lab-a:{KEY_A}-rotated,lab-b:{KEY_B}")
    refused = {
        "tampered": good[:-2] + ("AA" if good[-2:] != "AA" else "BB"),
        "signed for other keys (key rotated)": cookie_value(other_keys, "lab-a"),
        "signed with another secret": cookie_value(make_settings(tmp_path, api_keys=KEYS, secret_key="x" * 32),
                                                   "lab-a"),
        "plain lab name": "lab-a",
    }
    for name, value in refused.items():
        response = client.get("/api/specimens", headers=cookie(value))
        assert response.status_code == 401, name
    assert client.get("/api/specimens", headers=cookie(good)).status_code == 200
    # A change carried by the cookie from another site's page is refused; from our own, it goes through.
    missing = secrets.token_urlsafe(18)
    cross = client.delete(f"/api/specimens/{missing}", headers={**cookie(good), "Origin": "http://evil.example"})
    same = client.delete(f"/api/specimens/{missing}", headers={**cookie(good), "Origin": "http://testserver"})
    assert (cross.status_code, same.status_code) == (401, 404)


def test_another_sites_form_cannot_sign_a_browser_in(labs):
    client, _ = labs
    response = browser(client).post("/login", data={"key": KEY_A, "next": "/"}, headers={"Origin": "http://evil.example"})
    assert response.status_code == 401 and "set-cookie" not in response.headers


@pytest.mark.parametrize("target", ["//evil.example/x", "https://evil.example", "/\\evil.example", "specimens"])
def test_sign_in_never_redirects_off_the_service(labs, target):
    client, _ = labs
    response = browser(client).post("/login", data={"key": KEY_A, "next": target})
    assert response.status_code == 303 and response.headers["location"] == "/"


def test_keys_are_compared_in_constant_time(monkeypatch, tmp_path):
    """Every configured key goes through hmac.compare_digest, whichever matches (no early exit)."""
    compared = []

    def spy(a, b):
        compared.append(b)
        return secrets.compare_digest(a, b)

    monkeypatch.setattr(credentials.hmac, "compare_digest", spy)
    settings = make_settings(tmp_path, api_keys=KEYS)
    assert credentials.lab_for_key(settings, KEY_A) == "lab-a"
    assert sorted(compared) == sorted([KEY_A.encode(), KEY_B.encode()])
    compared.clear()
    assert credentials.lab_for_key(settings, WRONG_KEY) is None and len(compared) == 2


def test_keys_never_appear_in_logs(labs, caplog):
    client, ids = labs
    with caplog.at_level(logging.DEBUG):
        client.get("/api/specimens", headers=bearer(KEY_A))
        client.get(f"/api/specimens/{ids['lab-b']}", headers=bearer(KEY_A))
        client.get("/api/specimens", headers=bearer(WRONG_KEY))
        browser(client).post("/login", data={"key": KEY_B, "next": "/"})
        browser(client).post("/login", data={"key": WRONG_KEY, "next": "/"})
        client.post("/api/specimens", headers=bearer(KEY_B), files={"image": ("x.png", b"not an image", "image/png")})
    logged = caplog.text + " ".join(repr(r.args) for r in caplog.records)
    assert caplog.records, "expected the service to log something"
    for key in (KEY_A, KEY_B, WRONG_KEY):
        assert key not in logged


def test_keys_never_appear_in_the_real_servers_log(server_factory, tmp_path):
    server = server_factory(tmp_path / "data", RAMIFORM_API_KEYS=KEYS, RAMIFORM_WORKERS="0")
    with httpx.Client(base_url=server.url, timeout=30) as http:
        assert http.get("/api/specimens", headers=bearer(KEY_A)).status_code == 200
        assert http.get("/api/specimens", headers=bearer(WRONG_KEY)).status_code == 401
        assert http.post("/login", data={"key": KEY_B}).status_code == 303
    log = server.log()
    assert "GET /api/specimens" in log  # the access log is on, so the check below means something
    for key in (KEY_A, KEY_B, WRONG_KEY):
        assert key not in log


def test_without_keys_the_service_runs_open(tmp_path):
    with app_client(tmp_path) as client:
        assert client.get("/api/specimens").status_code == 200
        assert client.get("/specimens", headers={"Accept": "text/html"}).status_code == 200


def test_malformed_keys_stop_the_start(tmp_path):
    with pytest.raises(ValueError, match="lab:key"):
        create_app(make_settings(tmp_path, api_keys="lab-a-without-a-key"))


@pytest.mark.parametrize(("host", "keys", "warns"), [("0.0.0.0", "", True), ("192.168.1.20", "", True),
                                                     ("127.0.0.1", "", False), ("localhost", "", False),
                                                     ("0.0.0.0", KEYS, False)])
def test_open_service_warns_when_bound_beyond_localhost(monkeypatch, caplog, tmp_path, host, keys, warns):
    from service.web import server

    # uvicorn.run is replaced, so nothing is bound: the check is on the start-up path only.
    monkeypatch.setattr(server.uvicorn, "run", lambda app, **kwargs: None)
    monkeypatch.setenv("RAMIFORM_DATA_DIR", str(tmp_path))
    monkeypatch.setenv("RAMIFORM_API_KEYS", keys)
    with caplog.at_level(logging.WARNING, logger="ramiform.web"):
        server.serve(host=host, port=8000)
    warned = [r for r in caplog.records if r.levelno >= logging.WARNING and "RAMIFORM_API_KEYS" in r.getMessage()]
    assert bool(warned) == warns, caplog.text


def test_an_unauthenticated_upload_is_refused_before_its_body_is_read(server_factory, tmp_path):
    """Headers announcing 500 kB and no body at all: the real server answers 401 without waiting for it."""
    server = server_factory(tmp_path / "data", RAMIFORM_API_KEYS=KEYS, RAMIFORM_WORKERS="0")
    head = (f"POST /api/specimens HTTP/1.1\r\nHost: 127.0.0.1\r\nAuthorization: Bearer {WRONG_KEY}\r\n"
            "Content-Type: multipart/form-data; boundary=b\r\nContent-Length: 500000\r\n\r\n")
    with socket.create_connection(("127.0.0.1", server.port)) as sock:
        sock.sendall(head.encode())
        sock.settimeout(10.0)
        assert sock.recv(4096).startswith(b"HTTP/1.1 401 ")
