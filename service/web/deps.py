"""Dependencies of the routes: settings, the store, the analysis pool, the reference library, the caller's lab."""

from __future__ import annotations

from fastapi import Request

from service.match.library import ReferenceLibrary
from service.store import Store
from service.web.credentials import current_lab, lab_for_key
from service.web.jobs import AnalysisPool
from service.web.settings import Settings

__all__ = ["current_lab", "get_library", "get_pool", "get_settings", "get_store", "lab_for_key"]


def get_settings(request: Request) -> Settings:
    return request.app.state.settings


def get_store(request: Request) -> Store:
    return request.app.state.store


def get_pool(request: Request) -> AnalysisPool:
    return request.app.state.pool


def get_library(request: Request) -> ReferenceLibrary:
    """The app's reference library (the open set and its model), made once at start-up."""
    return request.app.state.library
