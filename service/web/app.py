"""The application factory: settings in, a FastAPI app with its store and analysis pool out."""

from __future__ import annotations

import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from pathlib import Path

from fastapi import FastAPI
from fastapi.staticfiles import StaticFiles

from service import __version__
from service.match.library import ReferenceLibrary
from service.store import Store
from service.web import api, auth, films, pages, studies
from service.web.errors import install_error_handlers
from service.web.jobs import AnalysisPool
from service.web.limits import NulGuardMiddleware, UploadLimitMiddleware, UploadQueueMiddleware
from service.web.security import SecurityHeadersMiddleware
from service.web.settings import Settings

STATIC_DIR = Path(__file__).resolve().parents[2] / "static"
log = logging.getLogger("ramiform.web")


def create_app(settings: Settings | None = None) -> FastAPI:
    """Build the app; the store (schema created if missing) and the pool start with it.

    Several apps built on the same ``database_url`` and ``data_dir`` (in one process or on
    several machines) serve the same specimens: no state lives only in the process.
    """
    settings = settings or Settings()
    settings.keys_by_lab  # noqa: B018 - a malformed RAMIFORM_API_KEYS stops the start, not a request

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        app.state.store = Store.open(settings.resolved_database_url, settings.data_dir)
        swept = app.state.store.sweep_orphans()
        if swept:
            log.info("removed %d specimen folders that no record names (left by an interrupted upload)", len(swept))
        unused = app.state.store.sweep_unused_readings()
        if unused:
            log.info("removed %d reading folders that no record names (left by an interrupted re-measurement)",
                     len(unused))
        # One reference library per process: the routes get it from here, each analysis
        # process opens its own once (the pool's initializer).
        app.state.library = ReferenceLibrary(str(settings.library_dir) if settings.library_dir else None)
        app.state.pool = AnalysisPool(settings.worker_count, app.state.library)
        log.info("ramiform %s: database %s, data folder %s, %d analysis processes", __version__,
                 app.state.store.engine.dialect.name, settings.data_dir.resolve(), settings.worker_count)
        try:
            yield
        finally:
            app.state.pool.shutdown()
            app.state.store.close()

    app = FastAPI(
        title="Ramiform",
        version=__version__,
        description="Measure photographed branching specimens and rank them against simulated growth.",
        docs_url=None,  # the bundled Swagger UI and ReDoc load scripts from a CDN; /docs is our own page
        redoc_url=None,
        lifespan=lifespan,
    )
    app.state.settings = settings
    install_error_handlers(app)
    auth.install_login_redirect(app)
    # 413 with a JSON reason while the body streams (FastAPI's own limit answers in plain text)
    app.add_middleware(UploadLimitMiddleware, max_bytes=settings.max_upload_bytes)
    # A burst beyond what the analysis processes can work through gets 503 and Retry-After.
    app.add_middleware(UploadQueueMiddleware, max_in_flight=max(16, 8 * settings.worker_count))
    app.add_middleware(auth.KeyBeforeBodyMiddleware)  # 401 before an unauthenticated body is read
    app.add_middleware(NulGuardMiddleware)  # 400 before a NUL in a URL reaches the database
    app.add_middleware(SecurityHeadersMiddleware)  # CSP, nosniff, no framing, on every answer
    app.mount("/static", StaticFiles(directory=STATIC_DIR), name="static")
    for router in ROUTERS:
        app.include_router(router)
    return app


#: Every router the app serves, in the order they are matched; a new module adds its router here.
ROUTERS = (api.router, studies.router, films.router, pages.router, auth.router)
