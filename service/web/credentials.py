"""Who is calling: API keys, and the signed page cookie that stands for a lab's key.

With ``RAMIFORM_API_KEYS`` set, REST clients send ``Authorization: Bearer KEY`` on every
request; a browser signs in once on ``/login`` (``service.web.auth``) and receives a cookie
naming its lab, signed with the service's secret (itsdangerous). The cookie holds no key,
only a keyed fingerprint of it, so changing or removing a lab's key ends that lab's
sessions. Keys are never logged. This module imports no route module, so every route
module may import it.
"""

from __future__ import annotations

import hashlib
import hmac
import logging
from urllib.parse import urlsplit

from fastapi import HTTPException, Request
from itsdangerous import BadSignature, URLSafeTimedSerializer

from service.web.settings import Settings

COOKIE_NAME = "ramiform_lab"
#: A working day: a page session ends by itself.
COOKIE_MAX_AGE_S = 12 * 3600
SAFE_METHODS = ("GET", "HEAD", "OPTIONS")

log = logging.getLogger("ramiform.web.auth")


def _secret(settings: Settings) -> bytes:
    if settings.secret_key:
        return settings.secret_key.encode()
    # Derived from every key together: a lab that knows only its own cannot forge another's cookie.
    return hashlib.sha256(b"ramiform page cookie\0" + settings.api_keys.encode()).digest()


def _fingerprint(settings: Settings, key: str) -> str:
    return hmac.new(_secret(settings), key.encode(), hashlib.sha256).hexdigest()[:32]


def _serializer(settings: Settings) -> URLSafeTimedSerializer:
    return URLSafeTimedSerializer(_secret(settings), salt="ramiform-lab-cookie")


def cookie_value(settings: Settings, lab: str) -> str:
    """The signed cookie of a signed-in ``lab`` (whose key must be configured)."""
    key = settings.keys_by_lab[lab]
    return _serializer(settings).dumps({"lab": lab, "key": _fingerprint(settings, key)})


def lab_from_cookie(request: Request, settings: Settings) -> str | None:
    """The lab the request's cookie was signed for, or None (absent, forged, expired, stale).

    A cookie-borne request that changes something (POST, DELETE, ...) must also come from a
    page of this service: an ``Origin`` naming another host is refused.
    """
    value = request.cookies.get(COOKIE_NAME)
    if not value:
        return None
    try:
        data = _serializer(settings).loads(value, max_age=COOKIE_MAX_AGE_S)
    except BadSignature:  # also SignatureExpired
        return None
    lab = data.get("lab") if isinstance(data, dict) else None
    key = settings.keys_by_lab.get(lab) if isinstance(lab, str) else None
    if key is None or not hmac.compare_digest(str(data.get("key", "")), _fingerprint(settings, key)):
        return None
    if request.method not in SAFE_METHODS and not same_origin(request):
        log.warning("refused a cross-site %s %s carrying a page cookie", request.method, request.url.path)
        return None
    return lab


def same_origin(request: Request) -> bool:
    """False when the browser says the request comes from a page of another host."""
    origin = request.headers.get("origin")
    return not origin or urlsplit(origin).netloc == request.headers.get("host")


def lab_for_key(settings: Settings, presented: str) -> str | None:
    """The lab whose key this is (constant-time comparison against every key), or None."""
    found = None
    for lab, key in settings.keys_by_lab.items():
        if hmac.compare_digest(presented.encode(), key.encode()):
            found = lab
    return found


def current_lab(request: Request) -> str | None:
    """The calling lab, scoping every read and write; ``None`` when access control is off.

    With ``RAMIFORM_API_KEYS`` set, the caller must send ``Authorization: Bearer KEY``, or
    (a browser) the signed cookie that signing in on ``/login`` gave it.
    """
    settings: Settings = request.app.state.settings
    if not settings.keys_by_lab:
        return None
    scheme, _, presented = request.headers.get("authorization", "").partition(" ")
    lab = lab_for_key(settings, presented.strip()) if scheme.lower() == "bearer" else None
    if lab is None and "authorization" not in request.headers:
        lab = lab_from_cookie(request, settings)
    if lab is None:
        raise HTTPException(401, "a valid API key is required (Authorization: Bearer KEY)",
                            headers={"WWW-Authenticate": "Bearer"})
    return lab
