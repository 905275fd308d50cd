"""Apps under test, and specimen images whose true dimension is known exactly."""

from __future__ import annotations

import io
import warnings

import numpy as np
import pytest
from PIL import Image

with warnings.catch_warnings():
    warnings.filterwarnings("ignore", message="Using `httpx` with")  # Starlette's note on its test client
    from fastapi.testclient import TestClient

from service.web.app import create_app
from service.web.settings import Settings

#: Similarity dimension of the Vicsek fractal, log 5 / log 3 (exact; CHECK_VALUES.md).
VICSEK_DIMENSION = np.log(5) / np.log(3)


def vicsek_mask(level: int) -> np.ndarray:
    """The Vicsek cross fractal after ``level`` subdivisions: 3**level cells a side."""
    cross = np.array([[0, 1, 0], [1, 1, 1], [0, 1, 0]], dtype=bool)
    mask = np.ones((1, 1), dtype=bool)
    for _ in range(level):
        mask = np.kron(cross, mask).astype(bool)
    return mask


def png(mask: np.ndarray, *, cell_px: int = 4, margin_px: int = 24) -> bytes:
    """A dark specimen on a white background, each cell drawn as ``cell_px`` pixels a side."""
    big = np.kron(mask, np.ones((cell_px, cell_px), dtype=bool))
    big = np.pad(big, margin_px)
    out = io.BytesIO()
    Image.fromarray(np.where(big, 40, 235).astype(np.uint8)).save(out, format="PNG")
    return out.getvalue()


@pytest.fixture(scope="session")
def vicsek_png() -> bytes:
    return png(vicsek_mask(4))  # 81 cells x 4 px + margins = 372 px a side


def make_client(tmp_path, **overrides) -> TestClient:
    settings = Settings(data_dir=tmp_path / "data", workers=0, **overrides)
    return TestClient(create_app(settings))


@pytest.fixture
def client(tmp_path):
    with make_client(tmp_path) as c:
        yield c
