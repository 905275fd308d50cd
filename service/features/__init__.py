"""Measurements of a binary specimen: dimensions, lacunarity, skeleton graph, profiles.

``measure(mask)`` runs them all, sharing one distance transform and one skeleton; the
building blocks are public so the reference library can call the cheap ones alone.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np

from service.distance import distance_to_background
from service.features._common import (
    as_specimen_mask,
    check_pixel_size,
    crop_to_specimen,
    local_width_px,
    median_branch_width_px,
    paste_crop,
    skeleton_of,
    specimen_center,
)
from service.features.dimension import ScalingFit, box_counting, mass_radius, sandbox
from service.features.lacunarity import LacunarityCurve, default_scales_px, lacunarity
from service.features.profiles import RadialProfile, radial_profile
from service.features.skeleton import HortonStrahler, SkeletonGraph, skeleton_graph

__all__ = [
    "Features",
    "HortonStrahler",
    "LacunarityCurve",
    "RadialProfile",
    "ScalingFit",
    "SkeletonGraph",
    "box_counting",
    "lacunarity",
    "local_width_px",
    "mass_radius",
    "measure",
    "median_branch_width_px",
    "radial_profile",
    "sandbox",
    "skeleton_graph",
]

#: Seed of the sandbox centres drawn by ``measure`` (same mask, same numbers).
SANDBOX_SEED = 0


@dataclass(frozen=True)
class Features:
    """Every measurement of one specimen mask.

    Lengths are in pixels; ``to_dict`` adds ``_mm`` twins when ``pixel_size_mm`` is
    known. ``skeleton_mask``, ``tips_rc`` and ``junctions_rc`` (mask coordinates) are
    for overlays and stay out of the dict.
    """

    box_dimension: ScalingFit
    mass_radius_dimension: ScalingFit
    sandbox_dimension: ScalingFit
    lacunarity: LacunarityCurve
    skeleton: SkeletonGraph
    profile: RadialProfile
    branch_width_px: float
    pixel_size_mm: float | None = None
    warnings: tuple[str, ...] = field(default=())

    @property
    def skeleton_mask(self) -> np.ndarray:
        return self.skeleton.skeleton_mask

    @property
    def tips_rc(self) -> np.ndarray:
        return self.skeleton.tips_rc

    @property
    def junctions_rc(self) -> np.ndarray:
        return self.skeleton.junctions_rc

    def to_dict(self) -> dict:
        s = self.pixel_size_mm
        lac = self.lacunarity.to_dict(s)
        lac["scales_widths"] = [v / self.branch_width_px for v in lac["scales_px"]]
        out = {
            "calibrated": s is not None,
            "pixel_size_mm": s,
            "branch_width_px": self.branch_width_px,
            "box_dimension": self.box_dimension.to_dict(s),
            "mass_radius_dimension": self.mass_radius_dimension.to_dict(s),
            "sandbox_dimension": self.sandbox_dimension.to_dict(s),
            "lacunarity": lac,
            "skeleton": self.skeleton.to_dict(s),
            "profile": self.profile.to_dict(s),
            "warnings": [str(w) for w in self.warnings],  # plain text; codes: service.contract
        }
        if s is not None:
            out["branch_width_mm"] = self.branch_width_px * s
        return out


def measure(
    mask: np.ndarray, *, pixel_size_mm: float | None = None, center_rc: tuple[float, float] | None = None
) -> Features:
    """Measure a binary specimen: dimensions, lacunarity, skeleton graph and profile.

    Parameters
    ----------
    mask : (H, W) array
        Non-zero pixels are the specimen (one or several components).
    pixel_size_mm : float, optional
        Side of one pixel in mm; lengths are then also reported in mm.
    center_rc : (row, col), optional
        Seed or centre of growth, for the mass-radius dimension, the radial profile and
        the root of the Horton-Strahler ordering. Default: the centroid.

    Returns
    -------
    Features

    Raises
    ------
    SpecimenError
        If the mask is empty or too small to fit a dimension (under 8 px across).
    ValueError
        If the mask is not 2-D, or the pixel size or centre is not a finite number.

    Notes
    -----
    Everything runs on the bounding box of the specimen (one pixel of margin); the
    distance transform and the skeleton are computed once and shared. The branch width
    is the median of ``2 * EDT - 1`` on the skeleton; box counting and the mass-radius
    and sandbox fits start at two widths, and lacunarity box sides are the width times
    powers of two (also reported in widths, ``lacunarity.scales_widths``).
    """
    mask = as_specimen_mask(mask)
    pixel_size_mm = check_pixel_size(pixel_size_mm)
    if center_rc is not None:
        center_rc = tuple(specimen_center(np.empty((0, 2)), center_rc))
    crop, origin = crop_to_specimen(mask, pad_px=1)
    center_crop = None if center_rc is None else tuple(np.asarray(center_rc) - np.asarray(origin))

    edt = distance_to_background(crop)
    skeleton = skeleton_of(crop)
    width = median_branch_width_px(crop, edt=edt, skeleton_mask=skeleton)

    box = box_counting(crop, width_px=width)
    mass = mass_radius(crop, center_rc=center_crop, width_px=width)
    sand = sandbox(crop, width_px=width, center_rc=center_crop, seed=SANDBOX_SEED)
    lac = lacunarity(crop, default_scales_px(crop.shape, smallest_px=width))
    graph = skeleton_graph(crop, center_rc=center_crop, edt=edt, skeleton_mask=skeleton)
    shift = np.array(origin, dtype=np.int64)
    graph = dataclasses.replace(
        graph,
        skeleton_mask=paste_crop(graph.skeleton_mask, origin, mask.shape),
        tips_rc=graph.tips_rc + shift,
        junctions_rc=graph.junctions_rc + shift,
    )
    profile = radial_profile(mask, center_rc=center_rc)
    warnings = (*box.warnings, *mass.warnings, *sand.warnings)
    return Features(
        box_dimension=box,
        mass_radius_dimension=mass,
        sandbox_dimension=sand,
        lacunarity=lac,
        skeleton=graph,
        profile=profile,
        branch_width_px=width,
        pixel_size_mm=pixel_size_mm,
        warnings=tuple(warnings),
    )
