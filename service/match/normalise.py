"""Bring a photographed specimen and a lattice simulation to common terms.

A lattice cluster has branches one site wide; a photographed specimen has branches ``w``
pixels wide and spans some hundreds of widths. Taking one branch width as one lattice site
makes the two comparable whatever the photograph's resolution or magnification:
:func:`normalise` measures ``w`` and resamples the mask onto a grid of ``w``-pixel cells.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from service.features._common import as_specimen_mask, crop_to_specimen, skeleton_of, summed_area_table

#: The branch width is taken no larger than the bounding radius over this many sites, so a
#: compact blob (Eden, a filled disk), whose "width" is its own size, keeps a lattice of at
#: least this radius instead of collapsing to a handful of sites.
MIN_RADIUS_SITES = 25.0
#: Below this width the mask is taken as already on the lattice (a lattice cluster's own
#: clumps give area over skeleton length a little above 1).
MIN_SCALE_PX = 1.5
#: A cell is occupied when at least this fraction of its area is (or a skeleton pixel of the
#: specimen crosses it, so branches narrower than one cell stay connected).
OCCUPIED_FRACTION = 0.5


@dataclass(frozen=True, eq=False)
class NormalisedMask:
    """A specimen resampled to one branch width per lattice site.

    Attributes
    ----------
    lattice : (h, w) bool ndarray
        The specimen on the lattice of ``scale_px``-pixel cells, with a one-site empty border.
    scale_px : float
        Pixels per lattice site (the branch width used, after the cap).
    branch_width_px : float
        Branch width measured as area over skeleton length (before the cap).
    capped : bool
        True when the width was limited by ``MIN_RADIUS_SITES`` (a compact specimen).
    """

    lattice: np.ndarray
    scale_px: float
    branch_width_px: float
    capped: bool

    def to_dict(self) -> dict:
        return {
            "scale_px": float(self.scale_px),
            "branch_width_px": float(self.branch_width_px),
            "width_capped": bool(self.capped),
            "lattice_sites": int(self.lattice.sum()),
        }


def _cell_fractions(mask: np.ndarray, scale: float) -> np.ndarray:
    """Occupied fraction of each ``scale x scale`` cell of a grid laid from the mask's origin.

    Strategy: the integral of a pixel image is bilinear inside each pixel, so bilinear
    interpolation of the summed-area table at fractional cell corners gives the exact
    occupied area of every cell (partial pixels included) in one vectorised pass.
    """
    h, w = mask.shape
    table = summed_area_table(mask, np.float64)
    n_r, n_c = int(np.ceil(h / scale)), int(np.ceil(w / scale))
    edges_r = np.minimum(np.arange(n_r + 1) * scale, h)
    edges_c = np.minimum(np.arange(n_c + 1) * scale, w)
    corners = ndimage.map_coordinates(
        table, np.meshgrid(edges_r, edges_c, indexing="ij"), order=1, mode="nearest"
    )
    area = corners[1:, 1:] - corners[:-1, 1:] - corners[1:, :-1] + corners[:-1, :-1]
    return area / (scale * scale)


def skeleton_length_px(skeleton: np.ndarray) -> float:
    """Length of a one-pixel skeleton: half the sum over its pixels of 1 per side neighbour
    and sqrt(2) per diagonal neighbour (each link is seen from both of its ends)."""
    # Neighbours are counted at the skeleton's own pixels only (a few percent of the crop).
    padded = np.pad(np.asarray(skeleton, dtype=bool), 1)
    w = padded.shape[1]
    flat = padded.ravel()
    px = np.flatnonzero(flat)
    side = np.zeros(px.size, dtype=np.uint8)
    diagonal = np.zeros(px.size, dtype=np.uint8)
    for offset in (-w, -1, 1, w):
        side += flat[px + offset]
    for offset in (-w - 1, -w + 1, w - 1, w + 1):
        diagonal += flat[px + offset]
    return float((side + np.sqrt(2.0) * diagonal).sum() / 2.0)


def normalise(mask: np.ndarray) -> NormalisedMask:
    """Resample a specimen mask so that one branch width becomes one lattice site.

    Parameters
    ----------
    mask : (H, W) array
        Non-zero pixels are the specimen (a segmentation, or a lattice cluster).

    Returns
    -------
    NormalisedMask

    Notes
    -----
    The width ``w`` is the area over the skeleton length (a strip ``w`` wide and ``L`` long
    has area ``w L``): unlike a local thickness read from the distance transform, whose
    pixel rounding costs up to one pixel (a relative bias that changes with resolution),
    its error is a fixed fraction at every resolution. It is capped at ``R / 25`` with
    ``R`` the bounding radius about the centroid. Each ``w x w`` cell is occupied when at
    least half of it is, or when the specimen's skeleton passes through it: thin branches
    keep their connectivity and compact regions keep their area. A lattice cluster
    (``w = 1``) comes back unchanged, cropped.

    Raises
    ------
    SpecimenError
        If the mask is empty.

    References
    ----------
    .. [1] T. Vicsek, *Fractal Growth Phenomena*, 2nd ed., World Scientific (1992),
       ch. 4: lattice units as the lower cutoff of scaling (from memory).
    """
    mask = as_specimen_mask(mask)
    crop, _ = crop_to_specimen(mask, pad_px=1)
    skeleton = skeleton_of(crop)
    width = max(1.0, float(crop.sum()) / max(skeleton_length_px(skeleton), 1.0))
    points = np.argwhere(crop)
    radius = float(np.sqrt(((points - points.mean(axis=0)) ** 2).sum(axis=1).max())) + 0.5
    scale = min(width, max(1.0, radius / MIN_RADIUS_SITES))
    if scale < MIN_SCALE_PX:
        return NormalisedMask(lattice=crop, scale_px=1.0, branch_width_px=width, capped=scale < width)
    lattice = _cell_fractions(crop, scale) >= OCCUPIED_FRACTION
    rows, cols = np.nonzero(skeleton)
    lattice[(rows / scale).astype(np.intp), (cols / scale).astype(np.intp)] = True
    lattice, _ = crop_to_specimen(lattice, pad_px=1)
    return NormalisedMask(lattice=lattice, scale_px=float(scale), branch_width_px=width, capped=scale < width)
