"""A second way of photographing a simulated cluster, written for the tests apart from the
matcher's reference drawings (``service.match.nuisance``) and from ``service.imaging.render``.

Its own choices throughout, so that agreement with the matcher says something:

- thickness law: a branch is thicker the earlier its sites arrived (old trunks near the
  centre thicken as a deposit keeps growing), ``w = w_tip * (1 + taper * (1 - k / n))``;
- strokes: anti-aliased line segments between neighbouring sites (``skimage.draw.line_aa``)
  widened with a soft edge of its own width, not a blurred hard mask;
- optics: a defocus box blur (uniform filter), not a Gaussian;
- lighting: a tilted, vignetted illumination field multiplying deposit and background;
- sensor: Poisson-like noise, then JPEG at a drawn quality;
- segmentation: flat-field by a wide median background, then Otsu's threshold
  (``skimage.filters.threshold_otsu``) and removal of specks.
"""

from __future__ import annotations

import io

import numpy as np
from PIL import Image
from scipy import ndimage
from skimage.draw import line_aa
from skimage.filters import threshold_otsu


def _strokes(arrival: np.ndarray, px: float, pad: int) -> tuple[np.ndarray, np.ndarray]:
    """Anti-aliased centrelines (coverage in [0, 1]) and the arrival fraction along them."""
    occupied = arrival > 0
    h, w = occupied.shape
    shape = (int(np.ceil(h * px)) + 2 * pad, int(np.ceil(w * px)) + 2 * pad)
    coverage = np.zeros(shape, dtype=np.float32)
    age = np.zeros(shape, dtype=np.float32)
    n = float(arrival.max())
    rows, cols = np.nonzero(occupied)
    position = {(r, c): i for i, (r, c) in enumerate(zip(rows, cols))}

    def at(r, c):
        return int(round(pad + (r + 0.5) * px)), int(round(pad + (c + 0.5) * px))

    for (r, c) in position:
        r0, c0 = at(r, c)
        coverage[r0, c0] = 1.0
        age[r0, c0] = max(age[r0, c0], 1.0 - arrival[r, c] / n)
        for dr, dc in ((0, 1), (1, 0), (1, 1), (1, -1)):
            if (r + dr, c + dc) not in position:
                continue
            if dr and dc and ((r + dr, c) in position or (r, c + dc) in position):
                continue  # a diagonal already joined through a shared side neighbour
            r1, c1 = at(r + dr, c + dc)
            rr, cc, val = line_aa(r0, c0, r1, c1)
            np.maximum.at(coverage, (rr, cc), val.astype(np.float32))
            older = 1.0 - min(arrival[r, c], arrival[r + dr, c + dc]) / n
            np.maximum.at(age, (rr, cc), np.float32(older))
    return coverage, age


def photograph(arrival: np.ndarray, *, seed: int) -> np.ndarray:
    """A segmented photograph of the cluster ``arrival`` (arrival-order lattice): bool mask.

    Settings drawn from ``seed``: pixels per site 3-5.5, tip width 0.7-1.5 sites, taper
    0-1, edge softness 0.5-1.5 px, defocus box 1-3 px, illumination tilt and vignette,
    noise, JPEG quality 45-95, and either polarity.
    """
    rows, cols = np.nonzero(arrival)
    arrival = arrival[max(rows.min() - 2, 0): rows.max() + 3, max(cols.min() - 2, 0): cols.max() + 3]
    rng = np.random.default_rng(seed)
    px = rng.uniform(3.0, 5.5)
    tip_sites = rng.uniform(0.7, 1.5)
    taper = rng.uniform(0.0, 1.0)
    softness = rng.uniform(0.5, 1.5)
    defocus = int(rng.integers(1, 4))
    quality = int(rng.integers(45, 96))
    bright = bool(rng.random() < 0.3)
    pad = int(3 * px * tip_sites * (1 + taper)) + 8
    coverage, age = _strokes(arrival, px, pad)
    on_line = coverage > 0.2
    distance, index = ndimage.distance_transform_edt(~on_line, return_indices=True)
    local_age = age[index[0], index[1]]
    half_width = 0.5 * px * tip_sites * (1.0 + taper * local_age)
    ink = np.clip(0.5 + (half_width - distance) / softness, 0.0, 1.0)
    ink = ndimage.uniform_filter(ink, size=defocus) if defocus > 1 else ink
    h, w = ink.shape
    yy, xx = np.mgrid[:h, :w]
    angle = rng.uniform(0, 2 * np.pi)
    tilt = 1.0 + 0.25 * ((yy / h - 0.5) * np.cos(angle) + (xx / w - 0.5) * np.sin(angle))
    vignette = 1.0 - 0.25 * (((yy / h - 0.5) ** 2 + (xx / w - 0.5) ** 2) / 0.5)
    light = tilt * vignette
    background, deposit = (40.0, 200.0) if bright else (205.0, 70.0)
    grey = light * (background + (deposit - background) * ink)
    grey = rng.poisson(np.clip(grey, 1, None) / 2.0) * 2.0
    buffer = io.BytesIO()
    Image.fromarray(np.clip(grey, 0, 255).astype(np.uint8)).save(buffer, format="JPEG", quality=quality)
    photo = np.asarray(Image.open(io.BytesIO(buffer.getvalue())), dtype=np.float32)
    # Segment: Otsu, fit a quadratic light field to the background it found, divide, Otsu again.
    signed = photo if bright else 255.0 - photo
    mask = signed > threshold_otsu(signed)
    terms = np.stack([np.ones_like(yy), yy / h, xx / w, (yy / h) ** 2, (xx / w) ** 2, yy * xx / (h * w)], -1)
    for _ in range(2):
        sample = ~mask
        sample[::3, :] = False  # a lighter fit; the light field is smooth
        coefficients, *_ = np.linalg.lstsq(terms[sample].astype(float), photo[sample].astype(float), rcond=None)
        field = np.maximum(terms @ coefficients, 1.0)
        contrast = photo / field if bright else field / np.maximum(photo, 1.0)
        mask = contrast > threshold_otsu(contrast)
    labels, count = ndimage.label(mask, structure=np.ones((3, 3)))
    if count > 1:
        sizes = np.bincount(labels.ravel())
        sizes[0] = 0
        keep = sizes >= 4 * px * px
        keep[int(sizes.argmax())] = True
        keep[0] = False
        mask = keep[labels]
    return mask
