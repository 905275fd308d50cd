"""The film pipeline: a film in, growth curves, arrival map, front velocity, time to rim out.

``ramiform film`` and ``POST /api/films`` both call :func:`analyze_film`, so the JSON is the
same on both. Strategy, in words:

1. Open the film (video, TIFF stack or frames) and check its limits.
2. Analyse the last frame like a photograph (``service.analysis.analyze_with``): its
   segmentation, at full quality, is the scene model every frame is read with, and its
   ranking against the references is the film's ``final``.
3. Walk the frames once: register each to the first, read its deposit with the scene model,
   and decide, two frames later, whether it is consistent with its neighbours (deposit only
   grows); accepted frames are measured and enter the arrival map, flagged ones are listed.
4. From the accepted frames: the front velocity (slope of the largest radius over the later
   half of the film, with its 95% interval), the time the front reaches the rim electrode,
   and the tip growth share beside each reference family's.
"""

from __future__ import annotations

import io
import math
from collections import deque
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from service import __version__
from service.errors import SpecimenError
from service.film.growth import (INCONSISTENT_SHARE, ArrivalBuilder, deposit_mask, frame_measures, lost_share,
                                 register, scene_from_segmentation, shift_picture)
from service.film.read import FilmLimits, FilmSource, film_from_frames, open_film
from service.film.tips import TIP_REACH_WIDTHS, comparison_steps, reference_shares, tip_share

__all__ = ["FilmOptions", "FilmAnalysis", "analyze_film", "SHORT_CIRCUIT_CAUTION"]

#: Said in the warnings and on the report when the front is near the rim electrode or past it.
SHORT_CIRCUIT_CAUTION = (
    "short-circuit caution: the deposit is near the rim electrode (or has reached it). A deposit that bridges "
    "the electrodes shorts the cell and the current jumps; stop the run before it touches the rim. Follow your "
    "laboratory's rules for electrolysis (power supply, ventilation, handling copper sulfate) over this estimate.")
#: The front counts as near the rim when the time left is under this share of the film's span.
NEAR_SHARE_OF_SPAN = 0.25

Progress = Callable[[str, int, int], None]


@dataclass(frozen=True)
class FilmOptions:
    """What the user chose for one film (CLI flags or upload fields); picklable."""

    filename: str | None = None
    frame_interval_s: float | None = None
    frame_times_s: tuple[float, ...] | None = None
    rim_radius_mm: float | None = None
    pixel_size_mm: float | None = None
    library_dir: str | None = None
    limits: FilmLimits = field(default_factory=FilmLimits)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True, eq=False)
class FilmAnalysis:
    """A film's analysis: the JSON (``to_dict``), the arrival map, and the final frame's analysis."""

    body: dict[str, Any]
    arrival: np.ndarray
    final: Any  # service.analysis.Analysis of the last frame
    first_rgb: np.ndarray | None = None

    def to_dict(self) -> dict[str, Any]:
        return self.body


def _png(rgb: np.ndarray) -> bytes:
    from PIL import Image

    out = io.BytesIO()
    Image.fromarray(np.asarray(rgb, dtype=np.uint8)).save(out, format="PNG", compress_level=1)
    return out.getvalue()


def _t95(dof: int) -> float:
    from scipy import stats

    return float(stats.t.ppf(0.975, max(1, dof)))


def _line(times: np.ndarray, values: np.ndarray) -> dict[str, float] | None:
    """Least-squares line with its covariance (needs three points or more)."""
    if times.size < 3 or np.ptp(times) <= 0:
        return None
    (slope, intercept), cov = np.polyfit(times, values, 1, cov="unscaled")
    resid = values - (intercept + slope * times)
    dof = times.size - 2
    s2 = float(resid @ resid) / dof
    # A perfectly straight record still has the pixel's own rounding error (1/sqrt(12) px).
    s2 = max(s2, 1.0 / 12.0)
    cov = np.asarray(cov) * s2
    return {"slope": float(slope), "intercept": float(intercept), "var_slope": float(cov[0, 0]),
            "var_intercept": float(cov[1, 1]), "cov": float(cov[0, 1]), "dof": dof, "n": int(times.size)}


def front_velocity(times: np.ndarray, max_radius: np.ndarray) -> tuple[dict[str, Any], dict[str, float] | None]:
    """Slope of the largest radius over the later half of the accepted frames (at least three)."""
    if times.size < 3:
        return {"value": None, "ci95": None, "reason": "fewer than three frames could be used"}, None
    start = min(times.size - 3, int(np.searchsorted(times, 0.5 * (times[0] + times[-1]))))
    fit = _line(times[start:], max_radius[start:])
    half = _t95(fit["dof"]) * math.sqrt(fit["var_slope"])
    return {"value": fit["slope"], "ci95": [fit["slope"] - half, fit["slope"] + half],
            "fitted_from_s": float(times[start]), "fitted_to_s": float(times[-1]), "frames_used": fit["n"]}, fit


def time_to_rim(fit: dict[str, float] | None, rim_radius_px: float | None, rim_reason: str | None,
                times: np.ndarray, max_radius: np.ndarray) -> dict[str, Any]:
    """When the front's largest radius reaches ``rim_radius_px``, on the film's clock (s).

    The line fitted for the front velocity is extrapolated; the interval comes from the fit's
    covariance by the delta method (t = (R - a) / v), widened by half the frame interval,
    the film's own time resolution. Null with a reason when the rim is unknown or the front
    does not advance.
    """
    if rim_radius_px is None:
        return {"value": None, "ci95": None, "reason": rim_reason or "the rim electrode's radius is not known"}
    out: dict[str, Any] = {"rim_radius_px": float(rim_radius_px)}
    if max_radius.size and max_radius[-1] >= rim_radius_px:
        reached = float(times[int(np.argmax(max_radius >= rim_radius_px))])
        return {**out, "value": reached, "ci95": [reached, reached], "reached": True,
                "reason": "the front has already reached the rim"}
    if fit is None:
        return {**out, "value": None, "ci95": None, "reason": "fewer than three frames could be used"}
    v, a = fit["slope"], fit["intercept"]
    half_v = _t95(fit["dof"]) * math.sqrt(fit["var_slope"])
    if v <= 0 or v - half_v <= 0:
        return {**out, "value": None, "ci95": None,
                "reason": "the front does not advance measurably over the later frames (its speed's interval "
                          "includes zero), so no time can be extrapolated"}
    t_rim = (rim_radius_px - a) / v
    var = (fit["var_intercept"] + t_rim**2 * fit["var_slope"] + 2.0 * t_rim * fit["cov"]) / v**2
    step = float(np.median(np.diff(times))) if times.size > 1 else 0.0
    half = _t95(fit["dof"]) * math.sqrt(max(var, 0.0)) + 0.5 * step
    return {**out, "value": float(t_rim), "ci95": [float(t_rim - half), float(t_rim + half)],
            "remaining_s": float(t_rim - times[-1]), "reached": False}


def _rim(options: FilmOptions, pixel_size_mm: float | None, scene) -> tuple[float | None, str, str | None]:
    """Rim radius from the seed in px, where it came from, or why it is unknown."""
    if options.rim_radius_mm is not None:
        if not pixel_size_mm:
            return None, "none", "a rim radius in mm needs the pixel size in mm (--pixel-size)"
        return float(options.rim_radius_mm) / float(pixel_size_mm), "given", None
    if scene.rim is not None:
        cy, cx = scene.rim["center_rc"]
        # The nearest point of the rim to the seed: the front reaches it first.
        off = math.hypot(scene.center_rc[0] - cy, scene.center_rc[1] - cx)
        return float(scene.rim["radius_px"]) - off, "dish rim found in the last frame", None
    return None, "none", "no dish rim was found and no rim radius was given (--rim-radius-mm with --pixel-size)"


def _warning(code: str, text: str) -> dict[str, str]:
    return {"code": code, "text": text}


def analyze_film(source: bytes | str | Path | Sequence[bytes] | FilmSource, options: FilmOptions | None = None, *,
                 reference_set=None, match: bool = True, progress: Progress | None = None) -> FilmAnalysis:
    """Analyse a growth film.

    Parameters
    ----------
    source : bytes, path, list of bytes, or FilmSource
        A video or TIFF stack (bytes or a path), or several encoded frames (a list; their
        times in ``options.frame_times_s`` or ``options.frame_interval_s``).
    options : FilmOptions
    reference_set : ReferenceSet, optional
        For ranking the last frame (default: the set in ``options.library_dir``, else the
        bundled one); the families' tip statistics come from ``options.library_dir``.
    match : bool
        Rank the last frame against the references and compare the tip growth share.
    progress : callable, optional
        Called as ``progress(stage, done, total)``.

    Returns
    -------
    FilmAnalysis

    Raises
    ------
    UnsupportedFormatError (415), ImageTooLargeError (413), SpecimenError (422)
    """
    from service.analysis import AnalysisOptions, analyze_with
    from service.imaging.load import _luma

    options = options or FilmOptions()
    report = progress or (lambda stage, done, total: None)
    filename = options.filename
    if isinstance(source, FilmSource):
        film = source
    elif isinstance(source, (list, tuple)):
        film = film_from_frames(list(source), times_s=options.frame_times_s, frame_interval_s=options.frame_interval_s,
                                limits=options.limits)
    else:
        if isinstance(source, (str, Path)):
            filename = filename or Path(source).name
            source = Path(source).read_bytes()
        film = open_film(bytes(source), frame_interval_s=options.frame_interval_s, limits=options.limits)
    n = film.n_frames
    times_all = film.times_s
    report("opened", 0, n)

    pixel_size_mm = options.pixel_size_mm or film.pixel_size_mm
    if reference_set is None and match and options.library_dir:
        from service.library import load_reference_set

        reference_set = load_reference_set(options.library_dir)
    final = analyze_with(_png(film.last_rgb()), AnalysisOptions(filename=filename, pixel_size_mm=pixel_size_mm,
                                                                  mode="threshold"),
                         reference_set=reference_set, match=match)
    report("last frame read", 0, n)
    frames = film.frames()
    first = next(iter(frames))
    first_gray = _luma(first, 255.0) if first.ndim == 3 else first
    last_gray = final.image.gray
    if last_gray.shape != first_gray.shape:
        raise SpecimenError("the last frame differs in size from the first; all frames must have one size")
    shift_last, _ = register(first_gray, last_gray)
    scene = scene_from_segmentation(last_gray, final.segmentation, shift_last_rc=shift_last)
    width = scene.branch_width_px

    builder = ArrivalBuilder(first_gray.shape)
    accepted: list[int] = []
    measures: dict[int, dict[str, Any]] = {}
    left_out: list[dict[str, Any]] = []
    shifts: list[list[float]] = []
    exposures: list[float] = []
    pending: deque[tuple[int, np.ndarray, float]] = deque()
    state = {"previous": None}

    def decide(k: int, mask: np.ndarray, outside: float, ahead: list[np.ndarray]) -> None:
        reason = None
        area = int(np.count_nonzero(mask))
        previous = state["previous"]
        if area == 0 and previous is None:
            # growth had not started (or not reached the size of a speck): nothing is wrong with the frame
            left_out.append({"frame": k, "time_s": float(times_all[k]), "reason": "no deposit yet",
                             "flagged": False})
            return
        if area == 0:
            reason = "no deposit could be read in this frame"
        elif outside > INCONSISTENT_SHARE:
            reason = f"{outside:.0%} of what reads as deposit lies where the last frame has none (a corrupted or foreign frame)"
        elif previous is not None and lost_share(previous[1], mask) > INCONSISTENT_SHARE:
            reason = (f"the deposit shrank: {lost_share(previous[1], mask):.0%} of frame {previous[0]}'s deposit is "
                      "missing")
        elif ahead and min(lost_share(mask, m) for m in ahead) > INCONSISTENT_SHARE:
            reason = (f"the deposit jumped: {min(lost_share(mask, m) for m in ahead):.0%} of it is missing from the "
                      "next frames")
        if reason is not None:
            left_out.append({"frame": k, "time_s": float(times_all[k]), "reason": reason, "flagged": True})
            return
        accepted.append(k)
        measures[k] = frame_measures(mask, scene.center_rc, width)
        builder.add(k, mask)
        state["previous"] = (k, mask)

    for k, gray in enumerate(_chain(first, frames)):
        gray = _luma(gray, 255.0) if gray.ndim == 3 else gray
        if gray.shape != first_gray.shape:
            raise SpecimenError(f"frame {k} differs in size from the first; all frames must have one size")
        shift = (0.0, 0.0) if k == 0 else register(first_gray, gray)[0]
        shifts.append([shift[0], shift[1]])
        registered = shift_picture(gray, shift, cval=np.nan)
        mask, check = deposit_mask(registered, scene)
        exposures.append(round(check.exposure, 4))
        pending.append((k, mask, check.outside_share))
        if len(pending) == 3:
            k0, m0, o0 = pending.popleft()
            decide(k0, m0, o0, [m for _, m, _ in pending])
        report("frames", k + 1, n)
    while pending:
        k0, m0, o0 = pending.popleft()
        decide(k0, m0, o0, [m for _, m, _ in pending])
    arrival = builder.finish()

    if len(accepted) < 2:
        raise SpecimenError(f"only {len(accepted)} of the film's {n} frames could be read consistently; "
                            "a growth film needs two at least (see the frames left out)")
    times = np.array([times_all[k] for k in accepted], dtype=float)
    curve = [measures[k] for k in accepted]
    max_radius = np.array([m["max_radius_px"] for m in curve], dtype=float)
    areas = np.array([m["area_px"] for m in curve], dtype=float)
    growth = {
        "frame_index": accepted,
        "times_s": times.tolist(),
        "area_px": [m["area_px"] for m in curve],
        "radius_of_gyration_px": [m["radius_of_gyration_px"] for m in curve],
        "max_radius_px": max_radius.tolist(),
        "box_dimension": {"values": [m["box_dimension"]["value"] for m in curve],
                          "ci95": [m["box_dimension"]["ci95"] for m in curve]},
        "tips": [m["tips"] for m in curve],
        "registration_shift_rc_px": [shifts[k] for k in accepted],
        "exposure_vs_last_frame": [exposures[k] for k in accepted],
        "left_out": left_out,
    }
    # Each warning carries a stable code beside its text, as the analysis JSON's do.
    warnings: list[dict[str, str]] = []
    for item in (item for item in left_out if item["flagged"]):
        warnings.append(_warning("frame_left_out", f"frame {item['frame']} (t = {item['time_s']:g} s) left out of the curves: {item['reason']}"))
    if any(abs(shifts[k][0]) > 0.05 * first_gray.shape[0] or abs(shifts[k][1]) > 0.05 * first_gray.shape[1]
           for k in accepted):
        warnings.append(_warning("camera_moved",
                                 "the camera moved by more than 5% of the frame during the film; check the registration"))

    velocity, fit = front_velocity(times, max_radius)
    rim_px, rim_source, rim_reason = _rim(options, pixel_size_mm, scene)
    rim = time_to_rim(fit, rim_px, rim_reason, times, max_radius)
    if rim_px is not None:
        rim["rim_source"] = rim_source
    caution = None
    span = float(times[-1] - times[0])
    if rim.get("reached") or (rim.get("value") is not None
                              and rim["ci95"][0] - times[-1] <= NEAR_SHARE_OF_SPAN * max(span, 1e-9)):
        caution = SHORT_CIRCUIT_CAUTION
        warnings.append(_warning("short_circuit", caution))
    if pixel_size_mm and velocity.get("value") is not None:
        velocity["value_mm_per_s"] = velocity["value"] * pixel_size_mm

    # Where growth happens, on the arrival map (deposit only grows there) at stages of growth.
    steps = comparison_steps(areas)
    tip = _tip_growth(arrival, accepted, areas, steps, width, float(max_radius[-1]), options, match)
    report("done", n, n)
    body = {
        "ramiform_version": __version__,
        "source": {"filename": filename, "format": film.format, "times_source": film.times_source},
        "frames": n,
        "frames_used": len(accepted),
        "frame_size_px": [int(first_gray.shape[1]), int(first_gray.shape[0])],
        "duration_s": float(times_all[-1]),
        "calibration": {"pixel_size_mm": pixel_size_mm, "calibrated": bool(pixel_size_mm)},
        "scene": {"threshold": scene.threshold, "levels_compare": scene.compare, "center_rc": list(scene.center_rc),
                  "branch_width_px": width, "rim": scene.rim, "decided_on": "last frame"},
        "growth": growth,
        "front_velocity_px_per_s": velocity,
        "time_to_rim_s": rim,
        "short_circuit_caution": caution,
        "tip_growth_share": tip,
        "final": final.to_dict(),
        "warnings": warnings,
    }
    from service.contract import json_safe

    return FilmAnalysis(body=json_safe(body), arrival=arrival, final=final,
                        first_rgb=first if first.ndim == 3 else None)


def _chain(first, rest):
    yield first
    yield from rest


def _tip_growth(arrival: np.ndarray, accepted: list[int], areas: np.ndarray, steps: list[tuple[int, int]],
                width: float, final_radius_px: float, options: FilmOptions, match: bool) -> dict[str, Any]:
    from service.film.tips import pruned_tips

    if not steps:
        return {"value": None, "reason": "the deposit did not grow enough between frames to tell where it grows",
                "steps": [], "references": {}}
    reach = TIP_REACH_WIDTHS * width
    rows, cols = np.nonzero(arrival >= 0)
    r0, r1, c0, c1 = rows.min(), rows.max() + 2, cols.min(), cols.max() + 2
    crop = arrival[max(0, r0 - 1):r1, max(0, c0 - 1):c1]
    near_total = new_total = 0
    per_step = []
    for i, j in steps:
        before = (crop >= 0) & (crop <= accepted[i])
        after = (crop >= 0) & (crop <= accepted[j])
        tips = pruned_tips(before)
        near, new = tip_share(before, after, tips, reach)
        near_total, new_total = near_total + near, new_total + new
        per_step.append({"from_frame": accepted[i], "to_frame": accepted[j],
                         "share": near / new if new else None, "new_px": new})
    value = near_total / new_total if new_total else None
    out: dict[str, Any] = {"value": value, "reach_px": reach, "reach_widths": TIP_REACH_WIDTHS, "steps": per_step,
                           "references": {}}
    if match and value is not None:
        fractions = [(float(areas[i] / areas[-1]), float(areas[j] / areas[-1])) for i, j in steps]
        try:
            reach_fraction = reach / max(final_radius_px, 1.0)
            refs = reference_shares(fractions, reach_fraction, library_dir=options.library_dir)
        except Exception as exc:  # the references are a comparison; the film's own figure stands
            out["references_error"] = str(exc)
            refs = {}
        out["references"] = refs
        if refs:
            nearest = min(refs, key=lambda key: abs(refs[key]["value"] - value))
            out["nearest_family"] = nearest
    return out
