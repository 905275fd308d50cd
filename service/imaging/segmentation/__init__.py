"""Segmentation of specimen photographs: a model of the scene and several scored readings.

A photograph of a bench holds more than the specimen: the bench, a dish seen from above or
at a slant, its rim and whatever runs along it, the solution, the centre electrode, glare,
shadows. ``segment`` models that scene, builds the plausible readings of it (which field
of view, which polarity), scores each with what a person would check (does the mask grow
from the centre, stay one aggregate, leave the rim alone, leave most of the dish empty),
measures the best at full resolution, and reports how clearly it won as a confidence,
with the others as alternatives the user can take instead.

Modules: ``field_of_view`` (dish, dark surround, region of interest), ``threshold`` (even light,
polarity, threshold), ``ridge`` (line measure for vessels), ``scene`` (rim structures,
electrode, glare, exclusions), ``cleanup`` (specks and pinholes in branch widths).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import ndimage

from service.caveats import Caveat
from service.errors import SpecimenError
from service.imaging.load import LoadedImage
from service.imaging.segmentation._common import (EIGHT, SMALL_SIDE_PX, Field, as_gray_rgb, block_mean,
                                                  field_mask, median_uint8, robust_sigma, robust_sigma_uint8_steps,
                                                  square_closing)
from service.imaging.segmentation.cleanup import SEVERAL_OBJECTS, branch_width_px, keep_specimen
from service.imaging.segmentation.field_of_view import find_field, parse_roi
from service.imaging.segmentation.ridge import choose_mode, ridge_mask
from service.imaging.segmentation.scene import (electrode_outline, exclusion_mask, find_electrode, glare_halo,
                                                glare_halo_pieces, glare_mask, rim_structures, stroke_mask, wire_paths)
from service.imaging.segmentation.threshold import (EVENINGS, even_light, first_background, fit_background,
                                                    levels_picture, pick_threshold, threshold_mask)

__all__ = ["LIGHTINGS", "LOW_CONFIDENCE", "MODES", "POLARITIES", "Reading", "SEVERAL_OBJECTS", "Segmentation", "segment"]

MODES = ("auto", "threshold", "ridge")
POLARITIES = ("auto", "dark", "bright")
# How the light is evened: a smooth surface, or a local median that follows shadows.
LIGHTINGS = ("auto", "smooth", "patchy")
_EVENING_OF = {"smooth": "surface", "patchy": "local"}

_OUTLINE_RGB = (255, 0, 255)
_FIELD_RGB = (0, 200, 0)
_SEED_RGB = (255, 40, 0)
# Long side of an alternative reading's preview.
_PREVIEW_SIDE_PX = 160
# Below this confidence the reading is reported as uncertain.
LOW_CONFIDENCE = 0.5


@dataclass(frozen=True, eq=False)
class Reading:
    """One way of reading the photograph, scored.

    ``overrides`` are the arguments of :func:`segment` that reproduce it; ``preview`` is its
    mask at most 160 px on the long side.
    """

    label: str
    overrides: dict[str, Any]
    score: float
    preview: np.ndarray

    def to_dict(self) -> dict[str, Any]:
        return {"label": self.label, "overrides": dict(self.overrides), "score": round(float(self.score), 3)}


@dataclass(frozen=True, eq=False)
class Segmentation:
    """A specimen mask and how it was obtained.

    Attributes
    ----------
    mask : ndarray of bool, shape (H, W)
        The specimen, without the centre electrode where its grey set it apart (``electrode``).
    overlay : ndarray of uint8, shape (H, W, 3)
        The photograph with the mask outline (magenta), the field of view (green) and the
        seed (red cross) drawn on it.
    settings : dict
        What was actually used: mode, polarity, threshold value and method, field of view,
        background model, cleanup sizes, electrode, components kept.
    warnings : list of str
        Conditions that make the measurement doubtful.
    center_rc : tuple of float
        Seed for radial measures: the electrode centre when one was found, else the mask's
        centroid, (row, col) px.
    confidence : float
        How clearly the reading used beat the other plausible readings, in [0, 1].
    alternatives : tuple of Reading
        The other readings, best first.
    levels : ndarray of uint8 or None
        The picture the threshold applies to: inside the field the mask is about
        ``levels / 255 < threshold`` (``settings["levels_compare"] == "below"``) or ``>``.
    electrode : ndarray of bool or None, shape (H, W)
        The centre electrode's pixels left out of ``mask``, when its grey outlined it.
    """

    mask: np.ndarray
    overlay: np.ndarray
    settings: dict[str, Any]
    warnings: list[str] = field(default_factory=list)
    center_rc: tuple[float, float] = (0.0, 0.0)
    confidence: float = 1.0
    alternatives: tuple[Reading, ...] = ()
    levels: np.ndarray | None = None
    electrode: np.ndarray | None = None

    @property
    def measured_mask(self) -> np.ndarray:
        """The specimen with the electrode it grows from, when one was outlined and left out of
        ``mask``: what features and ranking measure, as the references are drawn."""
        return self.mask if self.electrode is None else self.mask | self.electrode

    def to_dict(self) -> dict[str, Any]:
        """Settings, warnings, seed, mask area, confidence and alternatives (not the arrays)."""
        return {
            **self.settings,
            "center_rc": [float(v) for v in self.center_rc],
            "mask_area_px": int(np.count_nonzero(self.mask)),
            "warnings": [str(w) for w in self.warnings],  # plain text; codes: service.contract
        }


@dataclass(frozen=True)
class _Plan:
    """What one reading fixes: the field of view, the polarity and how the light is evened."""

    fov: Field | None
    fov_label: str
    polarity: str
    evening: str = "surface"

    def label(self) -> str:
        side = "darker" if self.polarity == "dark" else "brighter"
        light = "smooth lighting" if self.evening == "surface" else "patchy lighting"
        return f"specimen {side} than its background; field: {self.fov_label}; {light}"


def segment(
    image: LoadedImage | np.ndarray,
    *,
    mode: str = "auto",
    polarity: str = "auto",
    threshold: float | None = None,
    roi=None,
    exclude=None,
    lighting: str = "auto",
    exclude_strokes=None,
) -> Segmentation:
    """Segment the specimen in a photograph.

    Parameters
    ----------
    image : LoadedImage or ndarray
        A loaded photograph, or a grey (H, W) or RGB (H, W, 3) array (uint8, uint16,
        bool, or float in [0, 1]).
    mode : {"auto", "threshold", "ridge"}
        ``threshold`` for specimens on a plain background or in a dish, ``ridge`` for thin
        vessels on a textured background; ``auto`` picks the one that fits.
    polarity : {"auto", "dark", "bright"}
        Whether the specimen is darker or brighter than its background; ``auto`` reads it
        inside the field of view (the background fills the field's outer part).
    threshold : float, optional
        Manual threshold. In threshold mode, a grey level in (0, 1) of the photograph after
        the light has been evened out (the background keeps its median grey); in ridge mode,
        a line-measure value in (0, 1) relative to its 99.5th percentile.
    roi : (cx, cy, r) or (cx, cy, rx, ry, angle_deg), optional
        Region of interest in px: a circle, or an ellipse with semi-axes ``rx`` (along the
        direction ``angle_deg`` from +x towards +y) and ``ry``. Replaces the automatic field.
    exclude : sequence of (x0, y0, x1, y1) or bool array, optional
        Areas that are not specimen (boxes in px, end exclusive, or a mask of the image's shape).
    lighting : {"auto", "smooth", "patchy"}
        How the light is evened: a smooth surface (gradients, vignetting), or a local median
        that follows shadows and fast changes; ``auto`` scores both.
    exclude_strokes : sequence of (points, radius_px), optional
        Areas painted out with a brush, left out with the boxes: ``points`` ``[(x, y), ...]``
        in px, see :func:`service.imaging.segmentation.scene.stroke_mask`.

    Returns
    -------
    Segmentation

    Raises
    ------
    SpecimenError
        The image has no contrast, or nothing is left after cleanup.
    ValueError
        An argument is out of range.

    Notes
    -----
    Field of view: a bright field on a dark surround; else a dish, the region a watershed
    [1]_ of the colour gradient gives the image centre against the bench in the frame's
    outer band, fitted by an ellipse with RANSAC [2]_ (on a median-filtered copy when the
    bench's grain hides the wall, then as the region of colours the bench lacks); else a
    circular Hough transform [3]_ of the rim. Light: a quadratic surface fitted to the background class, corrected locally
    by a normalised Gaussian average of the background, divided out. Threshold: Otsu's [4]_,
    moved half way between the background and the specimen's full-contrast grey, where a
    blurred edge crosses half its contrast. Readings: every combination of the field found
    or the whole image with either polarity is segmented at reduced resolution and scored;
    the best is measured at full resolution, where it stays near what the scored copy showed.
    A reading of one polarity lying within another's envelope with nearly the background's
    grey (the solution between branches, or a halo) loses. Rim structures (a ring, a wall
    highlight, tape) are cut where they run along the field's edge; a lead to the electrode
    and glare with its halo are cleared. Specks, pinholes and components kept
    scale with the measured branch width. Ridge mode: a multiscale Hessian line measure
    in the spirit of [5]_.

    References
    ----------
    .. [1] S. Beucher, C. Lantuejoul, "Use of watersheds in contour detection", Int. Workshop
       on Image Processing, Rennes (1979).
    .. [2] M. A. Fischler, R. C. Bolles, "Random sample consensus", Commun. ACM 24, 381-395 (1981).
    .. [3] R. O. Duda, P. E. Hart, "Use of the Hough transformation to detect lines and
       curves in pictures", Commun. ACM 15, 11-15 (1972).
    .. [4] N. Otsu, "A threshold selection method from gray-level histograms", IEEE Trans.
       Syst. Man Cybern. 9, 62-66 (1979).
    .. [5] A. F. Frangi et al., "Multiscale vessel enhancement filtering", MICCAI 1998,
       LNCS 1496, 130-137.
    """
    if mode not in MODES:
        raise ValueError(f"mode must be one of {MODES}, got {mode!r}")
    if polarity not in POLARITIES:
        raise ValueError(f"polarity must be one of {POLARITIES}, got {polarity!r}")
    if lighting not in LIGHTINGS:
        raise ValueError(f"lighting must be one of {LIGHTINGS}, got {lighting!r}")
    if threshold is not None and not (0.0 < float(threshold) < 1.0):
        raise ValueError(f"threshold must lie strictly between 0 and 1, got {threshold}")
    gray, rgb = as_gray_rgb(image)
    h, w = gray.shape
    if h < 16 or w < 16:
        raise SpecimenError(f"image is {w} x {h} px; at least 16 x 16 px is needed to segment a specimen")
    user_fov = parse_roi(roi, (h, w)) if roi is not None else None
    excluded = exclusion_mask(exclude, (h, w))
    painted = stroke_mask(exclude_strokes, (h, w))
    if painted is not None:
        excluded = painted if excluded is None else excluded | painted

    factor = max(1, math.ceil(max(h, w) / SMALL_SIDE_PX))
    small = block_mean(gray, factor)
    if float(small.max() - small.min()) < 2.0 / 255.0 and float(gray.max() - gray.min()) < 4.0 / 255.0:
        raise SpecimenError("the image is uniform (no contrast): there is no specimen to segment")
    small_rgb = block_mean(rgb, factor)
    small_rgb *= np.float32(1.0 / 255.0)

    if user_fov is not None:
        fov, fov_kind = user_fov, "roi"
    else:
        fov, fov_kind = find_field(small, small_rgb, factor)
    small_fov = field_mask(small.shape, fov, factor) if fov is not None else np.ones(small.shape, dtype=bool)
    if np.count_nonzero(small_fov) < 64:
        raise SpecimenError("the field of view is too small to hold a specimen")

    settings: dict[str, Any] = {"reduced_resolution_factor": factor, "mode_requested": mode}
    if mode == "auto":
        plane = fit_background(small, small_fov, degree=1)
        chosen_mode, decision = choose_mode(gray, rgb, small, small_fov, fov_kind, factor, plane)
        settings["mode_decision"] = decision
    else:
        chosen_mode = mode
    settings["mode"] = chosen_mode

    # Readings are scored on a copy at most 256 px on the long side: enough to tell the
    # solution from a deposit, four times cheaper than the reduced copy.
    score_factor = 2 if max(small.shape) > 300 else 1
    score_small = block_mean(small, score_factor)
    score_excluded = block_mean(excluded, factor * score_factor) > 0.5 if excluded is not None else None
    # Glare is set aside before any threshold of a bright specimen is chosen: its clipped
    # spots and their halo are a third class, brighter than the deposit.
    glare = glare_mask(rgb) if chosen_mode != "ridge" else None
    halo = glare_halo(glare) if glare is not None else None
    score_halo = block_mean(halo, factor * score_factor) > 0.5 if halo is not None else None
    plans = _plans(fov, fov_kind, polarity, lighting)
    found = (field_mask(score_small.shape, fov, factor * score_factor)
             if fov is not None and fov_kind != "roi" else None)
    shared: dict = {}  # what the plans of one field (or all plans) compute alike
    scored = [_score_plan(plan, score_small, factor * score_factor, score_excluded, found,
                          score_halo if plan.polarity == "bright" else None, shared) for plan in plans]
    scored = _penalise_partial(plans, scored)
    scored = _penalise_interstitial(plans, scored, score_small, factor * score_factor)
    if chosen_mode == "ridge":
        best_index = None
    else:
        best_index = max(range(len(scored)), key=lambda i: scored[i][0])
    if best_index is not None:
        plan = plans[best_index]
    else:
        plan = _Plan(fov, _fov_label(fov, fov_kind), "dark" if polarity == "auto" else polarity,
                     _EVENING_OF.get(lighting, "surface"))
    confidence, alternatives = _confidence(plans, scored, best_index, h, w)
    if chosen_mode == "ridge":
        decision_strength = float(settings.get("mode_decision", {}).get("line_perimeter_per_area", 0.7))
        confidence = 0.8 if mode == "ridge" or decision_strength >= 0.6 else 0.55

    fov = plan.fov
    settings["field_of_view"] = fov.to_dict() if fov is not None else {"source": "whole image"}
    levels = None
    if chosen_mode == "ridge":
        mask, details, contrast = ridge_mask(gray, rgb, small, small_fov, fov, factor, polarity, threshold)
        settings["levels_compare"] = "above"
    else:
        fov_small = field_mask(small.shape, fov, factor) if fov is not None else np.ones(small.shape, dtype=bool)
        evened = even_light(gray, small, fov_small, fov, factor, plan.polarity if polarity == "auto" else polarity,
                            plan.evening)
        t, method, contrast = pick_threshold(evened, fov, threshold, halo if evened.polarity == "bright" else None)
        mask = threshold_mask(evened, fov, t)
        if best_index is not None and threshold is None:
            settings["kept_near_scored_reading"] = _keep_near(mask, scored[best_index][1], factor * score_factor)
        details = {
            "polarity": evened.polarity,
            "polarity_source": evened.polarity_source if polarity != "auto" or best_index is None
            else f"chosen among readings; {evened.polarity_source}",
            "threshold": round(t, 4),
            "threshold_method": method,
            "threshold_scale": "grey level after evening the light (background at its median grey)",
            **evened.details,
            "contrast_to_noise": round(contrast, 2),
        }
        settings["levels_compare"] = "below" if evened.polarity == "dark" else "above"
        levels = levels_picture(evened)
        del evened
    settings.update(details)

    # Cleanup sizes follow the branch width, but never that of a compact blob (an Eden
    # deposit's "width" is its diameter): they are capped at 1% of the image's long side.
    width_cap = max(1.0, 0.01 * max(h, w))
    width_guess = min(_width_guess(mask), width_cap)
    mask, scene = _remove_scene(mask, rgb, fov, excluded, settings["polarity"], chosen_mode, width_guess, factor,
                                glare, halo)
    settings["scene"] = scene
    seed_rc = (fov.cy, fov.cx) if fov is not None else ((h - 1) / 2.0, (w - 1) / 2.0)
    clear = _clear_background(levels, settings) if levels is not None else None
    # The branch width of what the threshold took, specks and all, sizes the cleanup. When the
    # cleanup left out a fifth or more, the width is measured again on what it kept; a width a
    # quarter smaller means wide pieces left out (a label, a blob of glare) had inflated it,
    # and the cleanup is redone with it. A larger one only means the specks left out had
    # thinned it: redoing the cleanup would join pieces further apart than the first cleanup
    # could see (separate coins on a table) and is not done.
    width_px = branch_width_px(mask)
    kept, cleanup = keep_specimen(mask, seed_rc, min(width_px, width_cap), keep_all=(chosen_mode == "ridge"),
                                  clear_background=clear)
    if np.count_nonzero(kept) < 0.8 * np.count_nonzero(mask):
        used, width_px = min(width_px, width_cap), branch_width_px(kept)
        if min(width_px, width_cap) < 0.75 * used:
            kept, cleanup = keep_specimen(mask, seed_rc, min(width_px, width_cap),
                                          keep_all=(chosen_mode == "ridge"), clear_background=clear)
            width_px = branch_width_px(kept)
    mask = kept
    settings["cleanup"] = cleanup
    if not mask.any():
        raise SpecimenError("no specimen found: nothing is left after thresholding and removing specks")
    settings["branch_width_px"] = round(width_px, 2)
    # The electrode is left out of the mask where its grey outlines it. It stays in what is
    # measured (``measured_mask``): the matcher's reference drawings carry one too, and a
    # deposit cut from it measures as pieces (clearing bare ones put 4 of 20 fresh photographs
    # of library regimes outside the library).
    electrode = find_electrode(mask, seed_rc, width_px) if chosen_mode == "threshold" else None
    electrode_px = None
    if electrode is not None and levels is not None:
        electrode_px = electrode_outline(levels, mask, electrode, float(settings["background"]["median_grey"]) * 255.0)
    if electrode_px is not None and np.count_nonzero(electrode_px) * 2 > np.count_nonzero(mask):
        electrode_px = None  # more electrode than deposit: what grew on it is too little to stand alone
    if electrode_px is not None:
        mask = mask & ~electrode_px
        electrode["outlined_px"] = int(np.count_nonzero(electrode_px))
    settings["electrode"] = electrode
    rows, cols = np.nonzero(mask)
    # The outline is eroded on the mask's bounding box with a pixel of margin: the same
    # pixels as on the whole image, at the cost of the specimen's box.
    box = (slice(max(0, rows.min() - 1), rows.max() + 2), slice(max(0, cols.min() - 1), cols.max() + 2))
    outline_r, outline_c = np.nonzero(mask[box] & ~ndimage.binary_erosion(mask[box], structure=EIGHT, border_value=0))
    outline = (outline_r + box[0].start, outline_c + box[1].start)
    if levels is not None:
        contrast = min(contrast, _deposit_contrast(levels, mask, electrode, settings, seed_rc,
                                                   fov.r if fov is not None else 0.5 * min(h, w)))
        settings["contrast_to_noise"] = round(contrast, 2)
    warnings: list[str] = []
    if contrast < 3.0:
        warnings.append(Caveat("low_contrast", f"low contrast: the specimen stands {contrast:.1f} noise levels from the background"))
    if electrode is not None:
        center_rc = (float(electrode["center_rc"][0]), float(electrode["center_rc"][1]))
    else:
        center_rc = (float(rows.mean()), float(cols.mean()))

    settings["reading"] = _overrides(plan, chosen_mode, threshold, user_fov)
    # What was left out by hand belongs to the reading too (a mask given as an array cannot be written down).
    if exclude is not None and not isinstance(exclude, np.ndarray):
        settings["reading"]["exclude"] = [[float(v) for v in box] for box in exclude]
    if painted is not None:
        settings["reading"]["exclude_strokes"] = [
            {"points": [[float(x), float(y)] for x, y in np.asarray(points, dtype=float).reshape(-1, 2)],
             "radius_px": float(radius)} for points, radius in exclude_strokes]
    settings["confidence"] = round(confidence, 3)
    settings["alternatives"] = [a.to_dict() for a in alternatives]
    warnings.extend(_warnings(mask, rows, cols, center_rc, fov, width_px, small_fov, factor, chosen_mode))
    others = settings["cleanup"]["left_out_comparable"]
    if others >= SEVERAL_OBJECTS:
        warnings.append(Caveat("several_objects", f"the photograph shows {others} other objects at least a quarter "
                               "of the specimen's size, left out of the mask: the specimen is one of several "
                               "separate objects, not one aggregate grown from a seed"))
    if confidence < LOW_CONFIDENCE:
        warnings.append(Caveat("uncertain_segmentation", f"uncertain segmentation (confidence {confidence:.2f}): another reading of the photograph "
                        "is nearly as plausible; check the outline and take an alternative if it fits better"))
    overlay = _overlay(rgb, outline, fov, center_rc)
    return Segmentation(mask=mask, overlay=overlay, settings=settings, warnings=warnings, center_rc=center_rc,
                        confidence=confidence, alternatives=tuple(alternatives), levels=levels,
                        electrode=electrode_px)


# ----------------------------------------------------------------------------- readings


def _fov_label(fov: Field | None, kind: str) -> str:
    if fov is None:
        return "the whole image"
    return {"roi": "the region of interest", "dark surround": "the bright field on a dark surround"}.get(
        kind, "inside the dish")


def _plans(fov: Field | None, fov_kind: str, polarity: str, lighting: str) -> list[_Plan]:
    fovs: list[tuple[Field | None, str]] = [(fov, _fov_label(fov, fov_kind))]
    if fov is not None and fov_kind != "roi":
        fovs.append((None, "the whole image"))
    polarities = ["dark", "bright"] if polarity == "auto" else [polarity]
    evenings = list(EVENINGS) if lighting == "auto" else [_EVENING_OF[lighting]]
    return [_Plan(f, label, p, e) for f, label in fovs for p in polarities for e in evenings]


def _score_plan(plan: _Plan, small: np.ndarray, factor: int, small_excluded: np.ndarray | None,
                found: np.ndarray | None, glare: np.ndarray | None, shared: dict) -> tuple[float, np.ndarray, dict[str, float]]:
    """Segment at reduced resolution under ``plan`` and score how plausible a specimen it gives.

    The score adds penalties a person would apply: the mask fills the field (the solution
    was taken), is the dish itself (``found``: the field of view found, when the plan reads
    the whole image), runs all round the field's edge, lies away from the centre the
    specimen grows from, is many
    pieces, stands barely above the noise, or has an outline on smooth grey (a lighting
    boundary). A field that was found is favoured a little over the whole image. ``glare``
    (spots and their halo) is left out of the threshold and of the mask. ``shared`` keeps what
    does not depend on the polarity for the next plan that needs it: the first lighting
    estimate of each field and evening, each field's noise and range of greys, and the
    gradient of ``small``.
    """
    fov = plan.fov.reduced(factor) if plan.fov is not None else None
    if ("field", id(plan.fov)) not in shared:
        fov_mask = field_mask(small.shape, fov) if fov is not None else np.ones(small.shape, dtype=bool)
        noise = robust_sigma((small[:, 1:] - small[:, :-1])[fov_mask[:, 1:] & fov_mask[:, :-1]]) / math.sqrt(2.0)
        lo, hi = np.percentile(small[fov_mask], (1.0, 99.0))
        shared["field", id(plan.fov)] = fov_mask, noise, float(hi - lo)
    fov_mask, noise, grey_range = shared["field", id(plan.fov)]
    if "grad" not in shared:
        smooth = ndimage.gaussian_filter(small, 1.0)
        shared["grad"] = np.hypot(ndimage.sobel(smooth, axis=0), ndimage.sobel(smooth, axis=1))
    grad = shared["grad"]
    key = ("plane", id(plan.fov), plan.evening)
    if key not in shared:
        shared[key] = first_background(small, fov_mask, fov, 1, plan.evening)
    evened = even_light(small, small, fov_mask, fov, 1, plan.polarity, plan.evening, shared[key])
    t, _, contrast = pick_threshold(evened, fov, None, glare)
    raw = threshold_mask(evened, fov, t)
    if small_excluded is not None:
        raw &= ~small_excluded
    if glare is not None:
        raw &= ~glare
    sh, sw = small.shape
    seed = (fov.cy, fov.cx) if fov is not None else ((sh - 1) / 2.0, (sw - 1) / 2.0)
    width = max(1.0, _width_guess(raw))
    if fov is not None:
        raw &= ~rim_structures(raw, fov, width)[0]
    mask, _ = keep_specimen(raw, seed, width, keep_all=False)
    if not mask.any():
        return -50.0, mask, {"empty": 1.0}
    field_area = float(np.count_nonzero(fov_mask))
    area = float(np.count_nonzero(mask))
    fill = area / field_area
    rows, cols = np.nonzero(mask)
    if fov is not None:
        rho = fov.rho(rows.astype(np.float64), cols.astype(np.float64))
        near_edge = rho > 0.95
        angles = np.arctan2(rows[near_edge] - fov.cy, cols[near_edge] - fov.cx)
        edge_cover = np.unique(((angles + math.pi) / (2 * math.pi) * 72).astype(int) % 72).size / 72.0
        seed_gap = float(rho.min())
    else:
        frame = np.zeros(small.shape, dtype=bool)
        frame[0], frame[-1], frame[:, 0], frame[:, -1] = True, True, True, True
        edge_cover = float(np.count_nonzero(mask & frame)) / float(np.count_nonzero(frame))
        half = 0.5 * min(sh, sw)
        seed_gap = float(np.sqrt((rows - seed[0]) ** 2 + (cols - seed[1]) ** 2).min()) / half
    filled = ndimage.binary_fill_holes(mask)
    # The outer outline should follow edges one can see (a lighting boundary taken for a
    # specimen has its outline on smooth grey); stretches along the field's edge say nothing.
    outline = filled & ~ndimage.binary_erosion(filled, structure=EIGHT, border_value=0)
    if fov is not None:
        outline &= field_mask(small.shape, fov.scaled(0.93))
    # The specimen's own grey must lie on its side of the field's: a halo of solution round a
    # dark deposit, picked out by a local background, does not.
    around = fov_mask & ~ndimage.binary_dilation(mask, iterations=2)
    quiet = float(np.median(grad[around])) if around.any() else float(np.median(grad[fov_mask]))
    edge_support = float(np.median(grad[outline])) / (quiet + 1e-6) if outline.any() else 0.0
    sign = 1.0 if plan.polarity == "dark" else -1.0
    stands_out = (sign * (float(np.median(small[around])) - float(np.median(small[mask]))) / max(noise, 0.5 / 255.0)
                  if around.any() else 0.0)
    # ... and against the grey just outside its outline, as a share of the field's range of
    # greys: a halo of solution round a deposit, which a local background brightens, has
    # nearly the same solution on both sides of its outline (the reduced copy is so smooth
    # that such a step is still many noise levels).
    ring = fov_mask & ndimage.binary_dilation(filled, iterations=3) & ~ndimage.binary_dilation(filled)
    step_here = (sign * (float(np.median(small[ring])) - float(np.median(small[mask]))) / max(grey_range, 1.0 / 255.0)
                 if ring.any() else 0.0)
    kept_share = area / max(1.0, float(np.count_nonzero(raw)))
    terms = {
        "fills_field": -8.0 * max(0.0, fill - 0.45),
        "runs_round_edge": -6.0 * max(0.0, edge_cover - 0.5) / 0.5,
        "away_from_centre": -4.0 * min(1.0, max(0.0, seed_gap - 0.05) / 0.3),
        "scattered": -3.0 * max(0.0, 0.85 - kept_share),
        "contrast": 0.5 * math.log(max(min(contrast, 60.0), 0.5) / 3.0),
        "outline_on_edges": -3.0 * min(1.0, max(0.0, 1.0 - math.log(max(edge_support, 1e-3)) / math.log(4.0))),
        "not_its_side": -4.0 * min(1.0, max(0.0, 1.0 - stands_out / 6.0)),
        "faint_step": -3.0 * min(1.0, max(0.0, 1.0 - step_here / 0.15)),
        "field_found": 1.0 if fov is not None else 0.0,
    }
    if found is not None and fov is None:
        terms["is_the_dish"] = -10.0 * max(0.0, _iou(filled, found) - 0.5) / 0.5
    return float(sum(terms.values())), mask, terms


def _penalise_partial(plans: list[_Plan], scored: list) -> list:
    """A reading that finds only part of what another reading of the same polarity and field
    finds (nearly all of its mask inside the other's, which is a third larger or more) has
    missed some of the specimen: it loses up to three points, in proportion to what it missed."""
    out = list(scored)
    for i, (pi, (si, mi, ti)) in enumerate(zip(plans, scored)):
        area_i = np.count_nonzero(mi)
        for j, (pj, (sj, mj, _)) in enumerate(zip(plans, scored)):
            if i == j or pi.polarity != pj.polarity or pi.fov is not pj.fov or sj < si - 3.0:
                continue
            area_j = np.count_nonzero(mj)
            if area_i == 0 or area_j < 1.33 * area_i or np.count_nonzero(mi & mj) < 0.9 * area_i:
                continue
            penalty = -3.0 * (1.0 - area_i / area_j)
            if penalty < ti.get("partial", 0.0):
                terms = {**out[i][2], "partial": penalty}
                out[i] = (float(sum(terms.values())), mi, terms)
    return out


def _keep_near(mask: np.ndarray, scored_mask: np.ndarray, step: int) -> bool:
    """Clear, in place, what the full-resolution threshold took far from the reading that was
    scored, when that is most of it (a sharp shadow's edge, which the evened light follows
    at one resolution and not at the other); returns whether it did. Branches too thin for
    the scored copy stay: they lie within two of its pixels of what it saw, or run on from
    what is kept as small pieces (tips the scored copy lost), each under 2% of the mask."""
    near = ndimage.binary_dilation(scored_mask, iterations=2)
    # Most often little is far: counted over the mask's own pixels first.
    w = mask.shape[1]
    idx = np.flatnonzero(mask)
    total = idx.size
    far_px = ~near[np.minimum(idx // w // step, near.shape[0] - 1), np.minimum(idx % w // step, near.shape[1] - 1)]
    if np.count_nonzero(far_px) <= 0.5 * total:
        return False
    far = np.zeros_like(mask)
    far.ravel()[idx[far_px]] = True
    pieces, n = ndimage.label(far, structure=EIGHT)
    touching = np.zeros(n + 1, dtype=bool)
    touching[pieces[ndimage.binary_dilation(mask & ~far, structure=EIGHT) & far]] = True
    small = np.bincount(pieces.ravel(), minlength=n + 1) <= 0.02 * total
    tips = touching & small
    tips[0] = False
    mask &= ~(far & ~tips[pieces])
    return True


def _penalise_interstitial(plans: list[_Plan], scored: list, small: np.ndarray, factor: int) -> list:
    """A reading that lies mostly within (or just round) the envelope of a reading of the other
    polarity in the same field, and whose grey stays less than half as far from the
    background beyond both as that reading's grey does, is the solution between the other's
    branches (or a halo round them), not a specimen: it loses four points. The background
    is the field beyond both envelopes."""
    out = list(scored)
    envelopes = [ndimage.binary_fill_holes(square_closing(m, 4)) if m.any() else m
                 for _, m, _ in scored]
    around = [ndimage.binary_dilation(e, iterations=3) for e in envelopes]
    for i, (pi, (si, mi, ti)) in enumerate(zip(plans, scored)):
        if not mi.any() or "interstitial" in ti:
            continue
        for j, (pj, (sj, mj, _)) in enumerate(zip(plans, scored)):
            if pi.polarity == pj.polarity or pi.fov is not pj.fov or not mj.any():
                continue
            if np.count_nonzero(mi & around[j]) < 0.7 * np.count_nonzero(mi):
                continue
            fov = pi.fov.reduced(factor) if pi.fov is not None else None
            field = field_mask(small.shape, fov) if fov is not None else np.ones(small.shape, dtype=bool)
            beyond = field & ~(around[i] | around[j])
            if np.count_nonzero(beyond) < 0.1 * np.count_nonzero(field):
                continue
            ground = float(np.median(small[beyond]))
            if abs(float(np.median(small[mi])) - ground) < 0.5 * abs(float(np.median(small[mj])) - ground):
                terms = {**ti, "interstitial": -4.0}
                out[i] = (float(sum(terms.values())), mi, terms)
                break
    return out


def _confidence(plans: list[_Plan], scored: list, best_index: int | None, h: int,
                w: int) -> tuple[float, list[Reading]]:
    """Confidence of the best reading and the others as alternatives.

    Scores are read as log-plausibilities: the confidence is the best reading's share of
    the total, readings that give nearly the same mask (IoU above 0.8) counting with it,
    times how plausible the best is on its own.
    """
    alternatives: list[Reading] = []
    if not scored:
        return 1.0, alternatives
    order = sorted(range(len(scored)), key=lambda i: -scored[i][0])
    ref = order[0] if best_index is None else best_index
    best_mask = scored[ref][1]
    weights = np.exp(np.array([s[0] for s in scored]) - max(s[0] for s in scored))
    same = np.array([_iou(s[1], best_mask) > 0.8 for s in scored])
    share = float(weights[same].sum() / weights.sum())
    plausible = 1.0 / (1.0 + math.exp(-(scored[ref][0] + 3.0)))
    for i in order:
        if i == best_index or (best_index is not None and _iou(scored[i][1], best_mask) > 0.95):
            continue
        plan = plans[i]
        alternatives.append(Reading(plan.label(), _overrides(plan, "threshold", None, None), scored[i][0],
                                    _preview(scored[i][1])))
    return share * plausible, alternatives


def _iou(a: np.ndarray, b: np.ndarray) -> float:
    union = np.count_nonzero(a | b)
    return float(np.count_nonzero(a & b) / union) if union else 1.0


def _preview(mask: np.ndarray) -> np.ndarray:
    step = max(1, math.ceil(max(mask.shape) / _PREVIEW_SIDE_PX))
    if step == 1:
        return mask.copy()
    h, w = (mask.shape[0] // step) * step, (mask.shape[1] // step) * step
    return mask[:h, :w].reshape(h // step, step, w // step, step).any(axis=(1, 3))


def _overrides(plan: _Plan, mode: str, threshold: float | None, user_fov: Field | None) -> dict[str, Any]:
    out: dict[str, Any] = {"mode": mode, "polarity": plan.polarity,
                           "lighting": "smooth" if plan.evening == "surface" else "patchy"}
    if threshold is not None:
        out["threshold"] = float(threshold)
    if plan.fov is not None:
        out["roi"] = list(plan.fov.as_roi())
    else:
        out["roi"] = None
    return out


def _deposit_contrast(levels: np.ndarray, mask: np.ndarray, electrode: dict[str, Any] | None,
                      settings: dict[str, Any], seed_rc: tuple[float, float], field_radius: float) -> float:
    """Contrast of what was kept, less the electrode: its median grey against the background's
    in pixel-noise levels (from neighbour differences), less the 1.35 that a threshold's pick
    of pure noise shows by itself. A dark electrode must not vouch for a specimen lost in noise."""
    step = max(1, int(math.sqrt(mask.size / 1_000_000)))
    keep = mask[::step, ::step].copy()
    # Leave out the electrode: the one found, or else a disc of a tenth of the field's radius
    # round the seed, where an electrode too faint in outline to be told apart would sit.
    if electrode is not None:
        r = float(electrode["radius_px"]) * 1.5
        cy, cx = (float(v) for v in electrode["center_rc"])
    else:
        r, (cy, cx) = 0.1 * field_radius, seed_rc
    yy, xx = np.ogrid[: keep.shape[0], : keep.shape[1]]
    keep &= (yy * step - cy) ** 2 + (xx * step - cx) ** 2 > r * r
    # Less than the smallest piece the cleanup keeps cannot vouch for a deposit: the rim of an
    # electrode a little off the seed, say, with nothing grown on it that the threshold saw.
    if np.count_nonzero(keep) * step * step < max(4, settings["cleanup"]["min_object_px"]):
        return 0.0
    lv = levels[::step, ::step]
    noise = max(robust_sigma_uint8_steps(lv) / math.sqrt(2.0), 0.5)
    bg = float(settings["background"]["median_grey"]) * 255.0
    return max(0.0, abs(median_uint8(lv[keep]) - bg) / noise - 1.35)


def _clear_background(levels: np.ndarray, settings: dict[str, Any]) -> np.ndarray:
    """Pixels more than half way from the threshold to the background's grey."""
    t = float(settings["threshold"]) * 255.0
    bg = float(settings["background"]["median_grey"]) * 255.0
    mid = t + 0.5 * (bg - t)
    return levels >= mid if settings["levels_compare"] == "below" else levels <= mid


def _width_guess(mask: np.ndarray) -> float:
    """Branch width from area and outline length, in one pass (the cleanup refines it).

    The outline is counted as pixel edges between mask and background along rows and
    columns; averaged over directions that count is 4 / pi times the true length of the
    outline (Cauchy-Crofton), and a stroke's width is twice its area over its outline.
    """
    area = int(np.count_nonzero(mask))
    if area == 0:
        return 1.0
    edges = int(np.count_nonzero(mask[:, 1:] != mask[:, :-1])) + int(np.count_nonzero(mask[1:] != mask[:-1]))
    return max(1.0, 8.0 * area / (math.pi * max(1, edges)))


def _remove_scene(mask: np.ndarray, rgb: np.ndarray, fov: Field | None, excluded: np.ndarray | None,
                  polarity: str, mode: str, width: float, factor: int, glare: np.ndarray | None,
                  halo: np.ndarray | None) -> tuple[np.ndarray, dict[str, Any]]:
    """Clear what is not specimen: the user's exclusions, glare (``glare``, its ``halo``, and
    clipped blobs much wider than a branch), structures along the rim, a lead running in to
    the electrode."""
    info: dict[str, Any] = {}
    if excluded is not None:
        mask &= ~excluded
        info["excluded_px"] = int(np.count_nonzero(excluded))
    if mode != "threshold":
        return mask, info
    if polarity == "bright":
        wide = glare_mask(rgb, width)
        if wide is not None and (glare is None or np.any(wide & ~glare)):
            glare, halo = wide, glare_halo(wide)
        if glare is not None:
            removed = int(np.count_nonzero(mask & glare))
            mask &= ~glare
            pieces = glare_halo_pieces(mask, halo)
            info["glare_px"] = removed + int(np.count_nonzero(pieces))
            mask &= ~pieces
    if fov is not None:
        rim, rim_info = rim_structures(mask, fov, width)
        mask &= ~rim
        info["rim_structures"] = rim_info
        lead, lead_info = wire_paths(mask, rgb, fov, (fov.cy, fov.cx), factor)
        mask &= ~lead
        info["leads"] = lead_info["leads"]
    return mask, info
def _warnings(mask: np.ndarray, rows: np.ndarray, cols: np.ndarray, center_rc: tuple[float, float],
              fov: Field | None, width_px: float, small_fov: np.ndarray, factor: int, mode: str) -> list[str]:
    out: list[str] = []
    if mask[0].any() or mask[-1].any() or mask[:, 0].any() or mask[:, -1].any():
        out.append(Caveat("touches_frame", "the specimen touches the image frame: it may extend beyond the photograph"))
    if fov is not None and mode == "threshold":
        reach = float(fov.rho(rows.astype(np.float64), cols.astype(np.float64)).max())
        if reach >= 0.99 - 2.0 * min(width_px, 0.02 * fov.r) / fov.r:
            rim = fov.source == "dish rim"
            out.append(Caveat("touches_dish_rim" if rim else "touches_field_edge",
                              f"the specimen touches the {'dish rim' if rim else 'field edge'}"
                              ": growth may have been cut off or the rim included"))
    area = rows.size
    extent = float(np.sqrt(((rows - center_rc[0]) ** 2 + (cols - center_rc[1]) ** 2).max())) + 0.5
    fill = area / (math.pi * extent * extent)
    if fill <= 0.5 and (area < 400 or extent < 10.0 * width_px):
        out.append(Caveat("specimen_too_small", f"specimen too small: it spans {extent / max(width_px, 1e-9):.0f} branch widths, "
                   "too few scales for a dimension fit (at least 10 wanted)"))
    field_area = float(np.count_nonzero(small_fov)) * factor * factor
    if mode == "threshold" and fill > 0.5:
        out.append(Caveat("compact_blob", f"the mask fills {fill:.0%} of its bounding circle: "
                              "a compact blob, probably not a branching pattern"))
    elif area > 0.6 * field_area:
        out.append(Caveat("covers_field", f"the mask covers {area / field_area:.0%} of the field of view: "
                              "probably not a branching pattern"))
    return out


def _overlay(rgb: np.ndarray, outline: tuple[np.ndarray, np.ndarray], fov: Field | None,
             center_rc: tuple[float, float]) -> np.ndarray:
    """The photograph with the field's boundary, the mask's outline (its pixels' rows and
    columns) and a cross at the centre drawn on it."""
    over = rgb.copy()
    h, w = rgb.shape[:2]
    if fov is not None:
        by, bx = fov.boundary(max(360, int(2 * np.pi * max(fov.a, fov.b))))
        ys, xs = np.rint(by).astype(int), np.rint(bx).astype(int)
        ok = (ys >= 0) & (ys < h) & (xs >= 0) & (xs < w)
        over[ys[ok], xs[ok]] = _FIELD_RGB
    over[outline] = _OUTLINE_RGB
    arm = max(4, min(h, w) // 100)
    r, c = int(round(center_rc[0])), int(round(center_rc[1]))
    over[max(0, r - arm): r + arm + 1, min(max(c, 0), w - 1)] = _SEED_RGB
    over[min(max(r, 0), h - 1), max(0, c - arm): c + arm + 1] = _SEED_RGB
    return over
