"""The demo specimen: a simulated deposit rendered as a photograph, made by Ramiform itself.

The scenario is made up and labelled as such wherever it is shown: a diffusion-limited
aggregate standing in for a copper deposit in a fictional cell, photographed by
:func:`service.imaging.render_photo`. It lets a newcomer see a full report in one click.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
from PIL import Image

from service.store import write_durably

DEMO_LABEL = "DEMO (simulated, not a real specimen)"
DEMO_FILENAME = "ramiform-demo-simulated-deposit.jpg"
DEMO_STORY = (
    "Demo data, made up: a 'copper deposit' from a fictional dish named Demo cell 1. It is in fact "
    "a diffusion-limited aggregate of 3000 particles (seed 2026) that Ramiform grew and rendered "
    "as a photograph, so its true growth regime is known: DLA."
)
_N_PARTICLES = 3000
_GROWTH_SEED = 2026
_RENDER_SEED = 11
_SIZE_PX = 720
#: Bump when the recipe above changes, so a cached demo image is not reused.
DEMO_VERSION = 1


def make_demo_jpeg() -> bytes:
    """Grow and render the demo specimen; JPEG bytes, as a camera gives (deterministic, seconds of CPU)."""
    from service.imaging import render_photo
    from service.simulate import grow

    cluster = grow("dla", _N_PARTICLES, seed=_GROWTH_SEED)
    rgb = render_photo(cluster > 0, seed=_RENDER_SEED, size_px=_SIZE_PX, polarity="dark")
    out = io.BytesIO()
    Image.fromarray(np.asarray(rgb, dtype=np.uint8)).save(out, format="JPEG", quality=92)
    return out.getvalue()


def demo_path(data_dir: Path) -> Path:
    return Path(data_dir) / "demo" / f"demo-specimen-v{DEMO_VERSION}.jpg"


def ensure_demo_jpeg(data_dir: Path) -> bytes:
    """The demo image from the data folder, made and stored durably on first use."""
    path = demo_path(data_dir)
    if path.is_file():
        return path.read_bytes()
    data = make_demo_jpeg()
    write_durably(path, data)
    return data
