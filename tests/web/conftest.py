"""Apps under test and small specimen photographs rendered from grown clusters."""

from __future__ import annotations

import io
import warnings

import pytest
from PIL import Image

with warnings.catch_warnings():
    warnings.filterwarnings("ignore", message="Using `httpx` with")  # Starlette's note on its test client
    from fastapi.testclient import TestClient

from service.web.app import create_app
from service.web.settings import Settings

def specimen_png(seed: int, *, n_particles: int = 600, size_px: int = 360) -> bytes:
    """A photo-like rendering (dish, electrode, uneven light, noise) of a DLA cluster."""
    from service.imaging import render_photo
    from service.simulate import grow

    rgb = render_photo(grow("dla", n_particles, seed=seed) > 0, seed=seed, size_px=size_px)
    out = io.BytesIO()
    Image.fromarray(rgb).save(out, format="PNG")
    return out.getvalue()


@pytest.fixture(scope="session")
def dla_png() -> bytes:
    return specimen_png(1)


@pytest.fixture(scope="session")
def tiny_library(tmp_path_factory):
    """The "tiny" reference set (every regime, 200 sites, 2 realisations), grown once per session."""
    from service.library import build_library

    out = tmp_path_factory.mktemp("library") / "tiny"
    build_library("tiny", out, workers=1, progress=False)
    return out


def make_client(tmp_path, **overrides) -> TestClient:
    settings = Settings(**{"data_dir": tmp_path / "data", "workers": 0, **overrides})
    return TestClient(create_app(settings))


@pytest.fixture
def client(tmp_path, tiny_library):
    with make_client(tmp_path, library_dir=tiny_library) as c:
        yield c
