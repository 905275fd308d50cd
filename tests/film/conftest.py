"""Films of known growth for the film checks: simulated clusters rendered frame by frame.

Each film is made once per session (small frames, few frames) and shared by the checks.
"""

from __future__ import annotations

import numpy as np
import pytest

from service.film.synthetic import render_film
from service.simulate import grow

#: Seconds between frames of the test films.
INTERVAL_S = 60.0


@pytest.fixture(scope="session")
def dla_order() -> np.ndarray:
    return grow("dla", 700, seed=3)


@pytest.fixture(scope="session")
def dla_film(dla_order):
    """12 frames, 512 px: branches drawn about 3.9 px wide (one site), thick enough for area to be read well."""
    return render_film(dla_order, 12, seed=5, size_px=512, interval_s=INTERVAL_S, first_share=0.3)


@pytest.fixture(scope="session")
def eden_film():
    return render_film(grow("eden", 1500, seed=4), 8, seed=6, size_px=384, interval_s=INTERVAL_S)


def true_max_radius(mask: np.ndarray, center_rc) -> float:
    rows, cols = np.nonzero(mask)
    return float(np.sqrt((rows - center_rc[0]) ** 2 + (cols - center_rc[1]) ** 2).max())
