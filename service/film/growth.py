"""One scene model across a film: registration, per-frame deposit masks, checks, arrival map.

The deposit is largest in the last frame, so the scene is decided there once, at full
quality, by :func:`service.imaging.segment` (field of view, polarity, how the light is
evened, threshold). Every frame is then read with that same model: the light correction the
segmentation divided out (the ratio of its ``levels`` picture to the photograph, which is one
smooth gain per pixel since the evening is a division) is applied to the frame and compared
with the same threshold inside the same field. Nothing about the scene is re-decided frame
by frame, so a deposit cannot change only because a frame was read differently.

A camera that sets its own exposure is followed: each frame's background grey (sampled away
from the deposit) is brought to the last frame's before the threshold applies.

Deposit only grows. A frame that loses much of what the previous frame showed (it shrank),
or shows deposit that neither the next frames nor the last frame have (it jumped), is
flagged and left out of the curves; the film keeps its place for it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np
from scipy import ndimage

from service.distance import distance_to_background

__all__ = ["SceneModel", "scene_from_segmentation", "register", "shift_picture", "FrameCheck", "deposit_mask",
           "ArrivalBuilder", "frame_measures"]

#: Share of a frame's pixels that may disagree with its neighbours before it is flagged.
INCONSISTENT_SHARE = 0.3
#: The final deposit, widened by this many branch widths, bounds where earlier deposit can lie.
FINAL_MARGIN_WIDTHS = 2.0
#: Registration works on a copy at most this many px on the long side.
_REGISTRATION_SIDE_PX = 512


@dataclass(frozen=True, eq=False)
class SceneModel:
    """How every frame of one film is read (all arrays in the first frame's coordinates).

    Attributes
    ----------
    gain : ndarray of float32
        Multiplies a frame's grey to give the picture the threshold applies to.
    threshold : float
        In ``gain * grey`` units (``levels / 255`` of the segmentation).
    compare : str
        ``"below"``: deposit is darker than the threshold; ``"above"``: brighter.
    field : ndarray of bool
        Where deposit can be (the dish, or the whole frame).
    allowed : ndarray of bool
        The final deposit widened by two branch widths: earlier deposit lies within it.
    center_rc : (float, float)
        The seed (centre electrode, else the final deposit's centroid), (row, col) px.
    branch_width_px : float
    min_component_px : int
        Pieces smaller than this are specks, not deposit.
    rim : dict or None
        The dish found (``center_rc``, ``radius_px``), when one was.
    settings : dict
        The segmentation's settings (what was decided, for the report).
    """

    gain: np.ndarray
    threshold: float
    compare: str
    field: np.ndarray
    allowed: np.ndarray
    center_rc: tuple[float, float]
    branch_width_px: float
    min_component_px: int
    rim: dict[str, Any] | None
    settings: dict[str, Any] = field(default_factory=dict)
    #: Pixels outside the deposit's reach that read as deposit in the last frame too (rim
    #: structures, a wire, a label): scenery, not evidence of a jump.
    scenery: np.ndarray | None = None
    #: Background pixels (flat indices) whose median grey tracks the camera's exposure, and
    #: that median in the last frame.
    background_sample: np.ndarray | None = None
    background_level: float = 1.0

    @cached_property
    def allowed_box(self) -> tuple[slice, slice]:
        """Bounding box of ``allowed``."""
        rows = np.flatnonzero(self.allowed.any(axis=1))
        cols = np.flatnonzero(self.allowed.any(axis=0))
        if rows.size == 0:
            return (slice(0, 0), slice(0, 0))
        return (slice(int(rows[0]), int(rows[-1]) + 1), slice(int(cols[0]), int(cols[-1]) + 1))


def shift_picture(picture: np.ndarray, shift_rc: tuple[float, float], *, order: int = 1, cval: float = 0.0
                  ) -> np.ndarray:
    """``picture`` moved by ``shift_rc`` px (integer shifts exactly, others by interpolation)."""
    dr, dc = float(shift_rc[0]), float(shift_rc[1])
    if dr == 0.0 and dc == 0.0:
        return picture
    if dr.is_integer() and dc.is_integer() or order == 0:
        out = np.full_like(picture, cval)
        r, c = int(round(dr)), int(round(dc))
        h, w = picture.shape[:2]
        src_r, dst_r = (slice(0, h - r), slice(r, h)) if r >= 0 else (slice(-r, h), slice(0, h + r))
        src_c, dst_c = (slice(0, w - c), slice(c, w)) if c >= 0 else (slice(-c, w), slice(0, w + c))
        out[dst_r, dst_c] = picture[src_r, src_c]
        return out
    return ndimage.shift(picture, (dr, dc), order=order, mode="nearest", prefilter=False)


def _reduced(gray: np.ndarray) -> tuple[np.ndarray, int]:
    factor = max(1, math.ceil(max(gray.shape) / _REGISTRATION_SIDE_PX))
    if factor == 1:
        return gray, 1
    h, w = (gray.shape[0] // factor) * factor, (gray.shape[1] // factor) * factor
    return gray[:h, :w].reshape(h // factor, factor, w // factor, factor).mean(axis=(1, 3)), factor


def register(reference: np.ndarray, moving: np.ndarray) -> tuple[tuple[float, float], float]:
    """Shift (rows, cols) px that brings ``moving`` onto ``reference``, and the match's error.

    Phase correlation [1]_ on copies at most 512 px on the long side, refined to half a
    pixel of the frame (scikit-image's ``phase_cross_correlation``, upsampled DFT of [2]_); the
    shift is rounded to whole pixels of the frame, which is what a camera on a stand drifts
    by and keeps the masks free of interpolation.

    References
    ----------
    .. [1] C. D. Kuglin, D. C. Hines, "The phase correlation image alignment method",
       Proc. IEEE Int. Conf. Cybernetics and Society, 163-165 (1975).
    .. [2] M. Guizar-Sicairos, S. T. Thurman, J. R. Fienup, "Efficient subpixel image
       registration algorithms", Opt. Lett. 33, 156-158 (2008).
    """
    from skimage.registration import phase_cross_correlation

    import warnings

    ref_small, factor = _reduced(reference)
    mov_small, _ = _reduced(moving)
    with warnings.catch_warnings():
        # a blank (corrupted) frame has no error to speak of; it is flagged when read, not here
        warnings.simplefilter("ignore", UserWarning)
        # enough upsampling to place the peak to half a pixel of the full frame
        shift, error, _ = phase_cross_correlation(ref_small, mov_small, upsample_factor=min(10, 2 * factor),
                                                  normalization=None)
    return (float(round(shift[0] * factor)), float(round(shift[1] * factor))), float(error)


def scene_from_segmentation(gray_last: np.ndarray, segmentation, *, shift_last_rc: tuple[float, float] = (0.0, 0.0)
                            ) -> SceneModel:
    """The scene model of a film from the segmentation of its last frame.

    ``gray_last`` is the last frame as segmented (its own coordinates); ``shift_last_rc`` the
    registration shift that brings it onto the first frame.
    """
    from service.imaging.segmentation._common import field_mask
    from service.imaging.segmentation.field_of_view import parse_roi

    settings = dict(segmentation.settings)
    if segmentation.levels is None:
        raise ValueError("the last frame was read as thin lines (ridge mode); a film is read by threshold")
    levels = segmentation.levels.astype(np.float32) * np.float32(1.0 / 255.0)
    gray = np.asarray(gray_last, dtype=np.float32)
    # The evening divides by a smooth surface, so levels / grey is one gain per pixel; pixels
    # at the ends of the 8-bit range or nearly black say nothing about it.
    valid = (segmentation.levels > 0) & (segmentation.levels < 255) & (gray > 0.02)
    ratio = np.where(valid, levels / np.maximum(gray, 1e-3), 0.0).astype(np.float32)
    sigma = 3.0
    weight = ndimage.gaussian_filter(valid.astype(np.float32), sigma)
    gain = ndimage.gaussian_filter(ratio, sigma) / np.maximum(weight, 1e-3)
    fallback = float(np.median(ratio[valid])) if valid.any() else 1.0
    gain = np.where(weight > 0.05, gain, np.float32(fallback)).astype(np.float32)

    roi = (settings.get("reading") or {}).get("roi")
    shape = gray.shape
    fov = parse_roi(roi, shape) if roi else None
    field = field_mask(shape, fov) if fov is not None else np.ones(shape, dtype=bool)
    width = float(settings.get("branch_width_px") or 3.0)
    final = segmentation.mask
    allowed = distance_to_background(~final) <= FINAL_MARGIN_WIDTHS * width + 1.0
    rim = None
    fov_info = settings.get("field_of_view") or {}
    if fov is not None and fov_info.get("source") not in (None, "whole image"):
        rim = {"center_rc": (fov.cy + shift_last_rc[0], fov.cx + shift_last_rc[1]), "radius_px": float(fov.r)}
    center = (segmentation.center_rc[0] + shift_last_rc[0], segmentation.center_rc[1] + shift_last_rc[1])
    threshold = float(settings["threshold"])
    compare = str(settings.get("levels_compare", "below"))
    picture = gray * gain
    raw = (picture < threshold if compare == "below" else picture > threshold) & field
    scenery = ndimage.binary_dilation(raw & ~allowed, iterations=max(1, int(round(width))))
    background = field & ~ndimage.binary_dilation(allowed, iterations=max(1, int(round(2 * width)))) & ~scenery
    candidates = np.flatnonzero(shift_picture(background, shift_last_rc, order=0, cval=False))
    sample = None
    level = 1.0
    if candidates.size >= 1000:
        rng = np.random.default_rng(0)
        sample = np.sort(rng.choice(candidates, size=min(20_000, candidates.size), replace=False))
        level = float(np.median(shift_picture(picture, shift_last_rc, order=0, cval=np.nan).ravel()[sample]))
    return SceneModel(
        gain=shift_picture(gain, shift_last_rc, order=0, cval=fallback),
        threshold=threshold,
        compare=compare,
        field=shift_picture(field, shift_last_rc, order=0, cval=False),
        allowed=shift_picture(allowed, shift_last_rc, order=0, cval=False),
        center_rc=(float(center[0]), float(center[1])),
        branch_width_px=width,
        min_component_px=int(max(4, math.ceil(width * width))),
        rim=rim,
        settings=settings,
        scenery=shift_picture(scenery, shift_last_rc, order=0, cval=False),
        background_sample=sample,
        background_level=level,
    )


@dataclass(frozen=True)
class FrameCheck:
    """What a frame's reading showed before it was accepted."""

    outside_share: float  # share of its deposit lying where the final frame has none
    exposure: float  # the frame's background grey over the last frame's (1: same exposure)
    area_px: int


def deposit_mask(gray: np.ndarray, scene: SceneModel) -> tuple[np.ndarray, FrameCheck]:
    """The deposit in one registered frame, read with the film's scene model.

    Returns the mask (inside the final deposit's reach, specks removed) and what lay outside
    that reach (deposit there cannot be real: it would have to vanish again by the end).
    """
    picture = gray * scene.gain
    exposure = 1.0
    if scene.background_sample is not None:
        # A camera that sets its own exposure brightens as a dark deposit spreads: each frame's
        # background is brought to the last frame's grey before the one threshold applies.
        level = float(np.nanmedian(picture.ravel()[scene.background_sample]))
        if math.isfinite(level) and level > 0:
            exposure = level / scene.background_level
            if abs(exposure - 1.0) > 0.005:
                picture *= np.float32(1.0 / exposure)
    raw = picture < np.float32(scene.threshold) if scene.compare == "below" else picture > np.float32(scene.threshold)
    raw &= scene.field
    if scene.scenery is not None:
        raw &= ~scene.scenery
    total = int(np.count_nonzero(raw))
    # Everything after this works on the box round the final deposit's reach.
    box = scene.allowed_box
    inside = raw[box] & scene.allowed[box]
    n_inside = int(np.count_nonzero(inside))
    outside_share = (total - n_inside) / total if total else 0.0
    labels, n = ndimage.label(inside, structure=np.ones((3, 3), dtype=bool))
    if n:
        sizes = np.bincount(labels.ravel())
        keep = sizes >= scene.min_component_px
        keep[0] = False
        inside = keep[labels]
    mask = np.zeros(raw.shape, dtype=bool)
    mask[box] = inside
    return mask, FrameCheck(outside_share=float(outside_share), exposure=float(exposure),
                            area_px=int(np.count_nonzero(inside)))


def lost_share(before: np.ndarray, after: np.ndarray) -> float:
    """Share of ``before``'s deposit missing from ``after`` (0 when deposit only grew)."""
    n = int(np.count_nonzero(before))
    return float(np.count_nonzero(before & ~after)) / n if n else 0.0


class ArrivalBuilder:
    """The arrival map, built one accepted frame at a time without keeping the frames.

    A pixel arrives at the first accepted frame from which it stays deposit in the next
    accepted frame too (a single frame's flicker at an edge does not count); pixels of the
    last frame not yet placed arrive there. Pixels never deposit hold -1.
    """

    def __init__(self, shape: tuple[int, int]) -> None:
        self.arrival = np.full(shape, -1, dtype=np.int32)
        self._previous: np.ndarray | None = None
        self._previous_index = -1

    def add(self, index: int, mask: np.ndarray) -> None:
        if self._previous is not None:
            confirmed = self._previous & mask & (self.arrival < 0)
            self.arrival[confirmed] = self._previous_index
        self._previous, self._previous_index = mask, index

    def finish(self) -> np.ndarray:
        if self._previous is not None:
            self.arrival[self._previous & (self.arrival < 0)] = self._previous_index
            self.arrival[~self._previous] = -1
        return self.arrival


def _block_any(mask: np.ndarray, factor: int) -> np.ndarray:
    if factor == 1:
        return mask
    h, w = (mask.shape[0] // factor) * factor, (mask.shape[1] // factor) * factor
    return mask[:h, :w].reshape(h // factor, factor, w // factor, factor).any(axis=(1, 3))


def frame_measures(mask: np.ndarray, center_rc: tuple[float, float], width_px: float, *, measure_side_px: int = 600
                   ) -> dict[str, Any]:
    """Area, radius of gyration, largest radius from the seed, box dimension and tips of one mask.

    The box dimension (service.features.dimension.box_counting) and the skeleton graph (tips)
    are measured on the deposit's bounding box; one larger than ``measure_side_px`` is
    reduced by whole blocks first (a pixel is deposit when any of its block is), which keeps
    a 1080p film's per-frame cost small and leaves scaling above the block size unchanged.
    Also returns ``tips_rc`` in the mask's coordinates (for where growth happens).
    """
    from service.errors import SpecimenError
    from service.features.dimension import box_counting
    from service.film.tips import pruned_tips

    rows, cols = np.nonzero(mask)
    out: dict[str, Any] = {"area_px": int(rows.size), "radius_of_gyration_px": None, "max_radius_px": None,
                           "box_dimension": {"value": None, "ci95": None}, "tips": None,
                           "tips_rc": np.empty((0, 2))}
    if rows.size == 0:
        return out
    r0, r1, c0, c1 = rows.min(), rows.max() + 1, cols.min(), cols.max() + 1
    rf, cf = rows.astype(np.float64), cols.astype(np.float64)
    out["radius_of_gyration_px"] = float(np.sqrt(((rf - rf.mean()) ** 2 + (cf - cf.mean()) ** 2).mean()))
    out["max_radius_px"] = float(np.sqrt(((rf - center_rc[0]) ** 2 + (cf - center_rc[1]) ** 2).max()))
    crop = np.pad(mask[r0:r1, c0:c1], 1)
    factor = max(1, math.ceil(max(crop.shape) / measure_side_px))
    small = _block_any(np.pad(crop, (0, factor)), factor) if factor > 1 else crop
    try:
        box = box_counting(small, width_px=max(1.0, width_px / factor))
        out["box_dimension"] = {"value": float(box.value), "ci95": [float(box.ci95[0]), float(box.ci95[1])]}
    except (SpecimenError, ValueError):
        pass
    tips = pruned_tips(small)
    out["tips"] = int(tips.shape[0])
    out["tips_rc"] = tips.astype(float) * factor + factor / 2.0 - 0.5 + np.array([r0 - 1, c0 - 1], dtype=float)
    return out
