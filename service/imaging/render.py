"""Photo-like renderings of known masks, for tests and the demo specimen.

A lattice cluster (branches one site wide) or any drawn mask is scaled up and thickened to
branches several pixels wide, then photographed: blurred, tinted (copper on a pale blue
solution, or bright on dark), lit unevenly, placed in a dish with a rim and a centre
electrode, given sensor noise and, optionally, a JPEG round trip. Because the mask that was
drawn is known exactly, a segmentation of the rendering can be scored against it.
"""

from __future__ import annotations

import io
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import ndimage

from service.distance import distance_to_background

__all__ = ["RenderedPhoto", "render_photo", "render_specimen"]

# Colours (linear RGB in [0, 1]) of the two looks, chosen to resemble photographs of copper
# electrodeposits: a brown-red deposit in pale blue copper sulfate solution, or a deposit lit
# from the side so that it shines on a dark solution.
_LOOKS = {
    "dark": {"specimen": (0.42, 0.24, 0.14), "solution": (0.70, 0.80, 0.88), "outside": (0.30, 0.30, 0.32),
             "rim": (0.30, 0.22, 0.18), "electrode": (0.28, 0.25, 0.24)},
    "bright": {"specimen": (0.92, 0.74, 0.50), "solution": (0.10, 0.13, 0.20), "outside": (0.45, 0.45, 0.45),
               "rim": (0.80, 0.62, 0.45), "electrode": (0.85, 0.85, 0.86)},
}


@dataclass(frozen=True, eq=False)
class RenderedPhoto:
    """A rendering and the mask it shows.

    Attributes
    ----------
    image : ndarray of uint8, shape (size_px, size_px, 3)
        The photograph.
    truth : ndarray of bool, shape (size_px, size_px)
        The specimen as drawn (after scaling and thickening), the centre electrode
        included when one is drawn, since the deposit grows from it.
    center_rc : tuple of float
        Where the seed (electrode centre) lies in the image, (row, col) px.
    dish_center_rc : tuple of float
        Centre of the dish, (row, col) px.
    dish_radius_px : float
        Inner radius of the dish rim; 0 when no rim is drawn.
    scale_px : float
        Pixels per site (or per pixel) of the input mask.
    thickness_px : float
        Width of one lattice branch after thickening.
    polarity : str
        ``"dark"`` or ``"bright"`` specimen.
    """

    image: np.ndarray
    truth: np.ndarray
    center_rc: tuple[float, float]
    dish_center_rc: tuple[float, float]
    dish_radius_px: float
    scale_px: float
    thickness_px: float
    polarity: str

    def to_dict(self) -> dict[str, Any]:
        """The rendering's geometry (not its pixels)."""
        return {
            "size_px": int(self.image.shape[0]),
            "center_rc": [float(v) for v in self.center_rc],
            "dish_center_rc": [float(v) for v in self.dish_center_rc],
            "dish_radius_px": float(self.dish_radius_px),
            "scale_px": float(self.scale_px),
            "thickness_px": float(self.thickness_px),
            "polarity": self.polarity,
        }


def render_photo(mask: np.ndarray, *, seed: int, **options: Any) -> np.ndarray:
    """Render a known mask as a photograph; the uint8 RGB image only.

    Takes the same arguments as :func:`render_specimen`, which also returns the mask drawn.
    """
    return render_specimen(mask, seed=seed, **options).image


def render_specimen(
    mask: np.ndarray,
    *,
    seed: int,
    polarity: str = "dark",
    size_px: int | None = 1024,
    seed_rc: tuple[float, float] | None = None,
    extent: float = 0.7,
    thickness_px: float | None = None,
    blur_px: float = 1.2,
    tint: dict[str, tuple[float, float, float]] | None = None,
    uneven_light: float = 0.35,
    dish_rim: bool = True,
    electrode: bool = True,
    electrode_radius_px: float | None = None,
    noise: float = 0.025,
    jpeg_quality: int | None = None,
    offset: float = 0.03,
) -> RenderedPhoto:
    """Render a known mask as a photograph of a specimen in a dish.

    Parameters
    ----------
    mask : ndarray, 2-D
        The specimen; non-zero is occupied (a lattice cluster or a drawn mask).
    seed : int
        Seed of the random colours, light, offset and noise; same seed, same image.
    polarity : {"dark", "bright"}
        Dark specimen on a bright solution, or bright on dark.
    size_px : int, optional
        Side of the square photograph. Default 1024; None keeps the mask's own size
        (scale 1, and ``extent`` is ignored).
    seed_rc : (float, float), optional
        Where the specimen grew from in ``mask``. Default: the array centre
        ``(h // 2, w // 2)``, the simulators' seed site.
    extent : float
        Radius of the specimen (farthest occupied site from the seed) as a fraction of
        the dish's inner radius.
    thickness_px : float, optional
        Width of a one-site branch in the photo. Default ``max(3, scale)``: branches are
        widened by dilation when thicker than the scale, narrowed by erosion when thinner.
    blur_px : float
        Gaussian blur (sigma, px) of the optics.
    tint : dict, optional
        Overrides of the colours ``specimen``, ``solution``, ``outside``, ``rim``,
        ``electrode`` (RGB in [0, 1]).
    uneven_light : float
        Strength of the lighting gradient plus vignette (0 = even light).
    dish_rim, electrode : bool
        Draw the dish rim (and the outside beyond it) and a centre electrode disc.
    electrode_radius_px : float, optional
        Default: twice the branch thickness, at least 1.5% of the image side.
    noise : float
        Standard deviation of Gaussian sensor noise (fraction of full scale).
    jpeg_quality : int, optional
        Round-trip the image through JPEG at this quality (1-95).
    offset : float
        Largest shift of the seed from the image centre, as a fraction of the side.

    Returns
    -------
    RenderedPhoto
    """
    if polarity not in _LOOKS:
        raise ValueError(f"polarity must be 'dark' or 'bright', got {polarity!r}")
    mask = np.asarray(mask)
    if mask.ndim != 2:
        raise ValueError(f"mask must be 2-D, got shape {mask.shape}")
    occupied = mask != 0
    if not occupied.any():
        raise ValueError("mask is empty: nothing to render")
    if jpeg_quality is not None and not 1 <= int(jpeg_quality) <= 95:
        raise ValueError(f"jpeg_quality must be in 1..95, got {jpeg_quality}")
    if not 0.0 < extent <= 1.0:
        raise ValueError(f"extent must be in (0, 1], got {extent}")
    rng = np.random.default_rng(seed)
    h0, w0 = occupied.shape
    sr, sc = (h0 // 2, w0 // 2) if seed_rc is None else (float(seed_rc[0]), float(seed_rc[1]))

    if size_px is None:
        size_h, size_w, scale = h0, w0, 1.0
        cy, cx = sr, sc
        dish_r = 0.5 * min(h0, w0) - 2.0
        dcy, dcx = 0.5 * (h0 - 1), 0.5 * (w0 - 1)
    else:
        size_h = size_w = int(size_px)
        if size_h < 32:
            raise ValueError(f"size_px must be at least 32, got {size_px}")
        dcy = dcx = 0.5 * (size_h - 1)
        dish_r = 0.46 * size_h if dish_rim else 0.5 * size_h
        rows, cols = np.nonzero(occupied)
        radius_sites = float(np.sqrt(((rows - sr) ** 2 + (cols - sc) ** 2).max())) + 0.5
        scale = extent * dish_r / radius_sites
        shift = rng.uniform(-offset, offset, size=2) * size_h
        cy, cx = dcy + shift[0], dcx + shift[1]
    thickness = max(3.0, scale) if thickness_px is None else float(thickness_px)

    # Strategy: nearest-site upscaling by index maps (each site becomes a scale x scale
    # block, diagonal neighbours keep touching at corners), then one distance transform
    # moves every outline by (thickness - scale) / 2 to reach the requested width.
    row_site = np.rint(sr + (np.arange(size_h) - cy) / scale).astype(np.intp)
    col_site = np.rint(sc + (np.arange(size_w) - cx) / scale).astype(np.intp)
    row_ok = (row_site >= 0) & (row_site < h0)
    col_ok = (col_site >= 0) & (col_site < w0)
    truth = np.zeros((size_h, size_w), dtype=bool)
    truth[np.ix_(row_ok, col_ok)] = occupied[np.ix_(row_site[row_ok], col_site[col_ok])]
    grow_px = 0.5 * (thickness - scale)
    if grow_px >= 0.5:
        truth = distance_to_background(~truth) <= grow_px
    elif grow_px <= -0.5:
        truth = distance_to_background(truth) > -grow_px

    yy = np.arange(size_h, dtype=np.float32)[:, None]
    xx = np.arange(size_w, dtype=np.float32)[None, :]
    colours = {k: np.array(v, dtype=np.float32) for k, v in _LOOKS[polarity].items()}
    for key, value in (tint or {}).items():
        if key not in colours:
            raise ValueError(f"unknown tint {key!r}; known: {sorted(colours)}")
        colours[key] = np.asarray(value, dtype=np.float32)
    for key in colours:  # a little variation between photographs
        colours[key] = np.clip(colours[key] * rng.uniform(0.93, 1.07, size=3).astype(np.float32), 0.0, 1.0)

    if electrode:
        e_r = max(2.0 * thickness, 0.015 * size_h) if electrode_radius_px is None else float(electrode_radius_px)
        disc = (yy - np.float32(cy)) ** 2 + (xx - np.float32(cx)) ** 2 <= np.float32(e_r**2)
        truth |= disc
    # Keep the specimen inside the dish, as a grown deposit is (the run stops before the rim).
    dish_d2 = (yy - np.float32(dcy)) ** 2 + (xx - np.float32(dcx)) ** 2
    if dish_rim:
        truth &= dish_d2 < np.float32((dish_r - 2.0 * thickness) ** 2)

    # Layers, back to front: outside, solution, rim, specimen, electrode; each blends by a
    # blurred coverage so edges look like optics, not pixels.
    sigma = max(float(blur_px), 1e-3)

    def coverage(layer: np.ndarray) -> np.ndarray:
        return ndimage.gaussian_filter(layer.astype(np.float32), sigma) if blur_px > 0 else layer.astype(np.float32)

    photo = np.empty((size_h, size_w, 3), dtype=np.float32)
    photo[:] = colours["solution"]
    if dish_rim:
        rim_w = max(3.0, 0.012 * size_h)
        inside = coverage(dish_d2 <= np.float32(dish_r**2))
        ring = coverage((dish_d2 > np.float32(dish_r**2)) & (dish_d2 <= np.float32((dish_r + rim_w) ** 2)))
        outside = np.clip(1.0 - inside - ring, 0.0, 1.0)
        photo = (photo * inside[:, :, None] + colours["rim"] * ring[:, :, None]
                 + colours["outside"] * outside[:, :, None])
        del inside, ring, outside
    # Deposits are not uniformly coloured: a smooth brightness texture across the specimen.
    texture = ndimage.zoom(rng.normal(0.0, 1.0, size=(9, 9)).astype(np.float32),
                           (size_h / 9, size_w / 9), order=3, grid_mode=True, mode="nearest")[:size_h, :size_w]
    specimen_colour = colours["specimen"][None, None, :] * (1.0 + 0.08 * texture[:, :, None])
    alpha = coverage(truth & ~disc) if electrode else coverage(truth)
    photo += alpha[:, :, None] * (specimen_colour - photo)
    del alpha, specimen_colour, texture
    if electrode:
        alpha = coverage(disc)
        photo += alpha[:, :, None] * (colours["electrode"][None, None, :] - photo)
        del alpha, disc

    if uneven_light > 0:
        angle = rng.uniform(0.0, 2.0 * np.pi)
        ramp = ((yy - dcy) * np.float32(np.sin(angle)) + (xx - dcx) * np.float32(np.cos(angle))) / np.float32(size_h)
        vignette = dish_d2 / np.float32((0.5 * size_h) ** 2)
        light = 1.0 + np.float32(uneven_light) * (ramp - np.float32(0.35) * vignette)
        photo *= light[:, :, None]
        del light, ramp, vignette
    if noise > 0:
        for c in range(3):
            photo[:, :, c] += rng.normal(0.0, noise, size=(size_h, size_w)).astype(np.float32)
    np.clip(photo, 0.0, 1.0, out=photo)
    image = (photo * 255.0 + 0.5).astype(np.uint8)
    del photo
    if jpeg_quality is not None:
        from PIL import Image

        buffer = io.BytesIO()
        Image.fromarray(image).save(buffer, format="JPEG", quality=int(jpeg_quality))
        image = np.asarray(Image.open(io.BytesIO(buffer.getvalue())).convert("RGB"))
    return RenderedPhoto(
        image=image,
        truth=truth,
        center_rc=(float(cy), float(cx)),
        dish_center_rc=(float(dcy), float(dcx)),
        dish_radius_px=float(dish_r) if dish_rim else 0.0,
        scale_px=float(scale),
        thickness_px=float(thickness),
        polarity=polarity,
    )
