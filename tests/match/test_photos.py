"""Photographs of freshly grown clusters (not in the library), of one specimen at three
resolutions, and of things that are not growth patterns, analysed end to end."""

from __future__ import annotations

import io

import numpy as np
import pytest
from PIL import Image

from service.analysis import analyze
from service.errors import RamiformError
from service.imaging.render import render_specimen
from service.match import universality_class
from service.simulate import grow

#: (regime, parameters, particles, photo side px, polarity, jpeg quality, thickening factor).
#: Sizes keep at least 3 px per lattice site (stringy high-eta DBM spans far, so it is grown
#: smaller and photographed larger).
#: Seeds are far from the library's (which are SHA-256 derived 32-bit numbers); a quarter
#: of the photographs are bright on dark; 2.5 is a DBM eta between the library's values.
SPECIMENS = (
    ("dla", {}, 3000, 1200, "dark", 85, 1.0),
    ("dla", {}, 6000, 1600, "bright", None, 1.3),
    ("dla", {"neighborhood": "moore"}, 2500, 1000, "dark", 80, 1.0),
    ("dla", {"sticking": 0.3}, 3000, 1100, "dark", None, 1.2),
    ("dla", {"sticking": 0.1}, 2000, 800, "bright", 90, 1.0),
    ("dla", {"neighborhood": "moore", "sticking": 0.3}, 4000, 1400, "dark", 85, 1.0),
    ("eden", {}, 3000, 900, "dark", 85, 1.0),
    ("eden", {}, 6000, 1300, "bright", None, 1.0),
    ("eden", {}, 1500, 600, "dark", 75, 1.0),
    ("ballistic", {}, 2000, 800, "dark", None, 1.0),
    ("ballistic", {}, 5000, 1400, "dark", 85, 1.2),
    ("ballistic", {}, 8000, 1600, "bright", 90, 1.0),
    ("dbm", {"eta": 0.5}, 1000, 700, "dark", 85, 1.0),
    ("dbm", {"eta": 1.0}, 1200, 900, "dark", None, 1.0),
    ("dbm", {"eta": 1.5}, 1000, 800, "bright", 85, 1.2),
    ("dbm", {"eta": 2.0}, 1000, 1200, "dark", 80, 1.0),
    ("dbm", {"eta": 2.5}, 1000, 1300, "dark", None, 1.0),
    ("dbm", {"eta": 3.0}, 800, 1600, "dark", 85, 1.2),
    ("dbm", {"eta": 4.0}, 600, 1600, "dark", 90, 1.0),
    ("dla", {}, 1500, 600, "dark", 85, 1.0),
)
#: At least this share of the photographs must have the right regime first (issue 4).
MIN_RIGHT_SHARE = 0.9
#: DBM's eta must be estimated within this (issue 4).
ETA_TOLERANCE = 0.75


def _png(image: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    Image.fromarray(image).save(buffer, format="PNG")
    return buffer.getvalue()


def _photo(regime, parameters, n, size_px, polarity, jpeg, thicken, seed):
    cluster = grow(regime, n, seed=seed, **parameters)
    rows, cols = np.nonzero(cluster)
    radius_sites = float(np.sqrt(((rows - cluster.shape[0] // 2) ** 2 + (cols - cluster.shape[1] // 2) ** 2).max()))
    scale = 0.7 * 0.46 * size_px / (radius_sites + 0.5)  # render_specimen's default framing
    rendered = render_specimen(
        cluster, seed=seed, size_px=size_px, polarity=polarity, jpeg_quality=jpeg,
        thickness_px=max(3.0, scale) * thicken,
    )
    return rendered.image


def right_regime(truth_regime: str, truth_parameters: dict, match: dict) -> bool:
    """Same regime, or the same universality class (DLA ~ DBM eta = 1, Eden ~ DBM eta near 0)."""
    if match["regime"] == truth_regime:
        return True
    truth_class = universality_class(truth_regime, truth_parameters)
    return truth_class is not None and truth_class == universality_class(match["regime"], match["parameters"])


@pytest.fixture(scope="module")
def analysed(reference_set):
    results = []
    for i, (regime, parameters, n, size_px, polarity, jpeg, thicken) in enumerate(SPECIMENS):
        image = _photo(regime, parameters, n, size_px, polarity, jpeg, thicken, seed=7_000_001 + 17 * i)
        results.append(analyze(_png(image), reference_set=reference_set).to_dict())
    return results


@pytest.mark.slow
def test_fresh_photographs_are_ranked_to_their_regime(analysed):
    lines, right = [], 0
    for (regime, parameters, n, size_px, *_), result in zip(SPECIMENS, analysed):
        top = result["matches"][0]
        ok = right_regime(regime, parameters, top)
        right += ok
        lines.append(f"{regime} {parameters} n={n} {size_px}px -> {top['regime']} {top['parameters']} "
                     f"p={top['probability']:.2f} in_library={result['in_library']} "
                     f"d={result['explanation']['novelty']['nearest_distance']:.1f} "
                     f"connected={result['explanation']['novelty']['connected_fraction']:.3f} "
                     f"{'ok' if ok else 'WRONG'}")
    print("\n".join(lines))
    assert right >= MIN_RIGHT_SHARE * len(SPECIMENS), "\n".join(lines)


@pytest.mark.slow
def test_dbm_eta_is_estimated_within_tolerance(analysed):
    # Issue 10 changed this check: a specimen outside every reference gets no point claim
    # but an honest interval, so there the 95% interval must hold the true eta instead; and
    # where the electrode's distance is still in play (the interval joined over near and far
    # electrode families, which trade off against eta) the interval must hold it too.
    errors = []
    for (regime, parameters, *_), result in zip(SPECIMENS, analysed):
        if regime == "dbm":
            estimate = result["parameter_estimates"]["dbm"]["eta"]
            open_question = not result["in_library"] or bool(estimate["widened_for"])
            errors.append((parameters["eta"], estimate["value"], estimate["ci95"], open_question))
    print("eta true, estimated, ci95, electrode or library in question:", errors)
    for true, value, (lo, hi), open_question in errors:
        assert abs(true - value) <= ETA_TOLERANCE or (open_question and lo <= true <= hi), errors


@pytest.mark.slow
def test_fresh_photographs_lie_inside_the_library(analysed):
    inside = sum(r["in_library"] for r in analysed)
    assert inside >= MIN_RIGHT_SHARE * len(analysed), [r["explanation"]["novelty"] for r in analysed]


@pytest.mark.slow
def test_one_specimen_at_three_resolutions(reference_set):
    cluster = grow("dla", 4000, seed=7_100_003)
    results = []
    for size_px in (600, 1200, 2000):
        image = render_specimen(cluster, seed=5, size_px=size_px, jpeg_quality=90).image
        results.append(analyze(_png(image), reference_set=reference_set).to_dict())
    tops = {r["matches"][0]["regime"] for r in results}
    dims = [r["features"]["box_dimension"]["value"] for r in results]
    print("top regimes", tops, "box dimensions", dims)
    assert len(tops) == 1
    assert max(dims) - min(dims) <= 0.05  # issue 4: within 0.05 across the three


def _not_growth_images() -> dict[str, np.ndarray]:
    from skimage import data

    yy, xx = np.mgrid[:800, :800]
    disc = np.where((yy - 400) ** 2 + (xx - 410) ** 2 <= 250**2, 40, 220).astype(np.uint8)
    noise = np.random.default_rng(1).integers(0, 256, size=(700, 700), dtype=np.uint8)
    checker = np.where(((yy // 50) + (xx // 50)) % 2 == 0, 30, 225).astype(np.uint8)
    return {
        "coins": data.coins(), "text": data.text(), "gravel": data.gravel(), "grass": data.grass(),
        "disc": disc, "noise": noise, "checkerboard": checker,
    }


#: Of the seven images with no growth pattern, at least this many must be out of library.
MIN_OUT_OF_LIBRARY = 6


@pytest.mark.slow
def test_images_without_growth_are_outside_the_library(reference_set):
    verdicts = {}
    for name, image in _not_growth_images().items():
        try:
            result = analyze(_png(image), reference_set=reference_set).to_dict()
        except RamiformError as exc:  # a refusal (nothing to measure) is also "not in the library"
            verdicts[name] = (False, f"refused: {exc}")
            continue
        verdicts[name] = (result["in_library"], result["explanation"].get("novelty"))
    print(verdicts)
    assert sum(not inside for inside, _ in verdicts.values()) >= MIN_OUT_OF_LIBRARY, verdicts
