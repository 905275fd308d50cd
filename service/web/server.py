"""``ramiform serve``: run the app on uvicorn."""

from __future__ import annotations

import logging

import uvicorn

from service.web.app import create_app
from service.web.settings import Settings

_LOCAL_HOSTS = {"127.0.0.1", "localhost", "::1"}


def serve(host: str = "127.0.0.1", port: int = 8000) -> None:
    """Serve on ``host:port`` with the settings read from ``RAMIFORM_*`` variables."""
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    settings = Settings()
    if not settings.keys_by_lab and host not in _LOCAL_HOSTS:
        logging.getLogger("ramiform.web").warning(
            "serving on %s without RAMIFORM_API_KEYS: anyone who can reach this address can read, "
            "upload and delete specimens", host)
    uvicorn.run(create_app(settings), host=host, port=port, log_level="info")
