"""Dependencies of the routes: settings, the store, the analysis pool, the caller's lab."""

from __future__ import annotations

import hmac

from fastapi import HTTPException, Request

from service.store import Store
from service.web.auth import lab_from_cookie
from service.web.jobs import AnalysisPool
from service.web.settings import Settings


def get_settings(request: Request) -> Settings:
    return request.app.state.settings


def get_store(request: Request) -> Store:
    return request.app.state.store


def get_pool(request: Request) -> AnalysisPool:
    return request.app.state.pool


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
    settings = get_settings(request)
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
