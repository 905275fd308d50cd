"""Readings of a stored specimen: the overrides a re-measurement asks for, and its history entry.

A reading is one segmentation of the uploaded image with the settings a person chose (or
the automatic ones). ``POST /api/specimens/{id}/reanalyze`` takes a :class:`Reanalysis`;
fields it leaves out keep what the current reading asked for, a field sent as ``null``
goes back to the automatic choice, and ``reading`` takes one of the alternatives the
current analysis offered. Areas to leave out come as boxes (``exclude``) and as brush
strokes (``paint``), both in photo pixels. The settings asked for are kept in every
history entry, so the next re-measurement starts from them.
"""

from __future__ import annotations

import math
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator

#: Largest coordinate or length accepted, in pixels: far beyond any image the loader accepts.
_FAR_PX = 1e6
#: Most exclusion boxes in one request.
MAX_EXCLUDE_BOXES = 64
#: Most painted strokes in one request, points in one stroke, and the widest brush (px).
MAX_PAINT_STROKES = 64
MAX_STROKE_POINTS = 1000
MAX_BRUSH_RADIUS_PX = 500.0


class RegionOfInterest(BaseModel):
    """The dish or region to analyse: a circle (``r``) or an ellipse (``rx``, ``ry``, ``angle_deg``)."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    cx: float = Field(ge=-_FAR_PX, le=_FAR_PX, description="centre, px from the left edge")
    cy: float = Field(ge=-_FAR_PX, le=_FAR_PX, description="centre, px from the top edge")
    r: float | None = Field(None, gt=0, le=_FAR_PX, description="radius of a circle, px")
    rx: float | None = Field(None, gt=0, le=_FAR_PX, description="ellipse: half-axis along angle_deg, px")
    ry: float | None = Field(None, gt=0, le=_FAR_PX, description="ellipse: the other half-axis, px")
    angle_deg: float | None = Field(None, ge=-360, le=360,
                                    description="ellipse: angle of the rx axis from +x towards +y (down), degrees")

    @model_validator(mode="after")
    def _circle_or_ellipse(self) -> RegionOfInterest:
        ellipse = (self.rx, self.ry, self.angle_deg)
        if self.r is not None and all(v is None for v in ellipse):
            return self
        if self.r is None and self.rx is not None and self.ry is not None:
            return self
        raise ValueError("give r for a circle, or rx and ry (and optionally angle_deg) for an ellipse, not both")

    def as_tuple(self) -> tuple[float, ...]:
        """``(cx, cy, r)`` or ``(cx, cy, rx, ry, angle_deg)``, as :func:`service.imaging.segment` takes it."""
        if self.r is not None:
            return (self.cx, self.cy, self.r)
        return (self.cx, self.cy, float(self.rx), float(self.ry), float(self.angle_deg or 0.0))


class ExcludeBox(BaseModel):
    """An area to leave out of the specimen, in px: columns x0..x1 and rows y0..y1 (end excluded)."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    x0: float = Field(ge=-_FAR_PX, le=_FAR_PX)
    y0: float = Field(ge=-_FAR_PX, le=_FAR_PX)
    x1: float = Field(ge=-_FAR_PX, le=_FAR_PX)
    y1: float = Field(ge=-_FAR_PX, le=_FAR_PX)

    @model_validator(mode="after")
    def _not_empty(self) -> ExcludeBox:
        if not (self.x1 > self.x0 and self.y1 > self.y0):
            raise ValueError(f"a box needs x1 > x0 and y1 > y0, got ({self.x0}, {self.y0}, {self.x1}, {self.y1})")
        return self

    def as_tuple(self) -> tuple[int, int, int, int]:
        # Whole pixels, outward: a box drawn over part of a pixel leaves that pixel out.
        return (math.floor(self.x0), math.floor(self.y0), math.ceil(self.x1), math.ceil(self.y1))


class PaintStroke(BaseModel):
    """An area painted out with a brush: the path's points ``[x, y]`` in px and the brush radius."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    points: list[tuple[float, float]] = Field(min_length=1, max_length=MAX_STROKE_POINTS,
                                              description="the brush's path, [x, y] in px from the top-left corner")
    radius_px: float = Field(gt=0, le=MAX_BRUSH_RADIUS_PX, description="brush radius, px")

    @model_validator(mode="after")
    def _near_the_image(self) -> PaintStroke:
        if any(not (-_FAR_PX <= v <= _FAR_PX) for point in self.points for v in point):
            raise ValueError(f"stroke points must lie within {_FAR_PX:g} px of the image")
        return self

    def as_plain(self) -> dict[str, Any]:
        return {"points": [[float(x), float(y)] for x, y in self.points], "radius_px": float(self.radius_px)}


class Reanalysis(BaseModel):
    """What to change for a new reading of a stored specimen (no re-upload)."""

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)

    mode: Literal["auto", "threshold", "ridge"] | None = Field(
        None, description="auto, threshold, or ridge for thin lines; null = automatic")
    polarity: Literal["auto", "dark", "bright"] | None = Field(
        None, description="specimen darker (dark) or brighter (bright) than its background; null = automatic")
    threshold: float | None = Field(None, gt=0, lt=1, description="fixed threshold, strictly between 0 and 1")
    lighting: Literal["auto", "smooth", "patchy"] | None = Field(
        None, description="how the light is evened: smooth (gradients) or patchy (shadows); null = automatic")
    roi: RegionOfInterest | None = Field(None, description="the dish or region to analyse; null = find it")
    exclude: list[ExcludeBox] | None = Field(None, max_length=MAX_EXCLUDE_BOXES,
                                             description="areas to leave out; [] or null = none")
    paint: list[PaintStroke] | None = Field(None, max_length=MAX_PAINT_STROKES,
                                            description="areas painted out with a brush; [] or null = none")
    reading: int | None = Field(None, ge=0, le=1000,
                                description="index of one of the current analysis's alternative readings to take")


#: The override keys a reading can ask for, in the order they are shown.
OVERRIDE_KEYS = ("mode", "polarity", "lighting", "threshold", "roi", "exclude", "paint")


def _normalised(key: str, value: Any) -> Any:
    """An override as stored (JSON-plain), or None for "automatic"."""
    if value is None or (key in ("mode", "polarity", "lighting") and value == "auto"):
        return None
    if key == "roi":
        return [float(v) for v in (value.as_tuple() if isinstance(value, RegionOfInterest) else value)]
    if key == "exclude":
        boxes = [b.as_tuple() if isinstance(b, ExcludeBox) else tuple(int(v) for v in b) for b in value]
        return [list(b) for b in boxes] or None
    if key == "paint":
        strokes = [s.as_plain() if isinstance(s, PaintStroke) else PaintStroke.model_validate(s).as_plain()
                   for s in value]
        return strokes or None
    if key == "threshold":
        return float(value)
    return value


def upload_overrides(*, mode: str, polarity: str, threshold: float | None,
                     roi: tuple[float, ...] | None) -> dict[str, Any]:
    """The overrides an upload asked for, as a history entry keeps them."""
    asked = {"mode": mode, "polarity": polarity, "threshold": threshold, "roi": roi}
    return {k: v for k, v in ((k, _normalised(k, v)) for k, v in asked.items()) if v is not None}


def alternatives_of(analysis: dict[str, Any]) -> list[dict[str, Any]]:
    alternatives = (analysis.get("segmentation") or {}).get("alternatives")
    return alternatives if isinstance(alternatives, list) else []


def resolve(body: Reanalysis, previous: dict[str, Any], analysis: dict[str, Any]) -> tuple[dict[str, Any], dict | None]:
    """The overrides of the new reading, and the alternative taken (``{"index", "label"}`` or None).

    Starts from ``previous`` (what the current reading asked for), applies the chosen
    alternative's settings, then every field the request sent. Raises ValueError (with the
    reason) for an alternative the analysis does not offer.
    """
    requested = {k: v for k, v in previous.items() if k in OVERRIDE_KEYS}
    taken = None
    if body.reading is not None:
        alternatives = alternatives_of(analysis)
        if not body.reading < len(alternatives):
            offered = f"0 to {len(alternatives) - 1}" if alternatives else "none"
            raise ValueError(f"reading {body.reading} is not one of this analysis's alternatives (offered: {offered})")
        alternative = alternatives[body.reading]
        for key, value in (alternative.get("overrides") or {}).items():
            if key in OVERRIDE_KEYS:
                requested[key] = value
        taken = {"index": body.reading, "label": alternative.get("label")}
    for key in OVERRIDE_KEYS:
        if key in body.model_fields_set:
            requested[key] = getattr(body, key)
    clean = {k: _normalised(k, requested.get(k)) for k in OVERRIDE_KEYS}
    return {k: v for k, v in clean.items() if v is not None}, taken


def _ellipse_half_extents(roi: list[float]) -> tuple[float, float]:
    """Half-width and half-height of the box around the circle or rotated ellipse."""
    if len(roi) == 3:
        return roi[2], roi[2]
    rx, ry, angle = roi[2], roi[3], math.radians(roi[4])
    c, s = math.cos(angle), math.sin(angle)
    return math.hypot(rx * c, ry * s), math.hypot(rx * s, ry * c)


def check_against_image(requested: dict[str, Any], width_px: int, height_px: int) -> None:
    """ValueError with the reason when the region or a box lies wholly outside the image."""
    roi = requested.get("roi")
    if roi is not None:
        cx, cy = roi[0], roi[1]
        hx, hy = _ellipse_half_extents(roi)
        if cx + hx < 0 or cy + hy < 0 or cx - hx >= width_px or cy - hy >= height_px:
            shape = "circle" if len(roi) == 3 else "ellipse"
            raise ValueError(f"the region of interest ({shape} centred at x={cx:g}, y={cy:g}) lies wholly outside "
                             f"the {width_px} x {height_px} px image")
    for x0, y0, x1, y1 in requested.get("exclude") or ():
        if x1 <= 0 or y1 <= 0 or x0 >= width_px or y0 >= height_px:
            raise ValueError(f"the area to exclude ({x0}, {y0}, {x1}, {y1}) lies wholly outside the "
                             f"{width_px} x {height_px} px image")
    for k, stroke in enumerate(requested.get("paint") or ()):
        xs = [p[0] for p in stroke["points"]]
        ys = [p[1] for p in stroke["points"]]
        r = stroke["radius_px"]
        # The box round the brush's path: a stroke missing the image by less is refused by the
        # segmentation's own, exact check.
        if max(xs) + r <= 0 or max(ys) + r <= 0 or min(xs) - r >= width_px or min(ys) - r >= height_px:
            raise ValueError(f"painted stroke {k} (starting at x={xs[0]:g}, y={ys[0]:g}) lies wholly outside "
                             f"the {width_px} x {height_px} px image")


def options_fields(requested: dict[str, Any]) -> dict[str, Any]:
    """The :class:`service.analysis.AnalysisOptions` fields of a reading's overrides."""
    roi = requested.get("roi")
    return {
        "mode": requested.get("mode", "auto"),
        "polarity": requested.get("polarity", "auto"),
        "lighting": requested.get("lighting", "auto"),
        "threshold": requested.get("threshold"),
        "roi": tuple(roi) if roi is not None else None,
        "exclude": tuple(tuple(box) for box in requested["exclude"]) if requested.get("exclude") else None,
        "exclude_strokes": tuple((tuple(tuple(p) for p in s["points"]), s["radius_px"]) for s in requested["paint"])
        if requested.get("paint") else None,
    }


def history_entry(analysis: dict[str, Any], requested: dict[str, Any], *, origin: str,
                  alternative: dict[str, Any] | None = None) -> dict[str, Any]:
    """What the history keeps of one reading: what was asked, what was used, what came of it."""
    segmentation = analysis.get("segmentation") or {}
    box = (analysis.get("features") or {}).get("box_dimension") or {}
    best = (analysis.get("matches") or [{}])[0]
    entry = {
        "origin": origin,
        "requested": dict(requested),
        "used": {key: segmentation.get(key) for key in ("mode", "polarity", "threshold")},
        "confidence": segmentation.get("confidence"),
        "box_dimension": box.get("value"),
        "best_regime": best.get("regime"),
        "best_probability": best.get("probability"),
    }
    if alternative is not None:
        entry["alternative"] = alternative
    return entry
