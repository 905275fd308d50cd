"""The one pipeline: image bytes -> segmentation -> measurements -> ranking against references.

The CLI (``ramiform analyze``), the REST API and the web pages all call :func:`analyze`, so a
number in a report is the same number the command line prints for the same file.
"""

from __future__ import annotations

import hashlib
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from service.caveats import Caveat
from service.errors import LibraryError
from service.features import Features, measure
from service.imaging import LoadedImage, Segmentation, load_image, segment
from service.imaging.load import DEFAULT_MAX_PIXELS
from service.imaging.segmentation import LOW_CONFIDENCE, SEVERAL_OBJECTS


@dataclass(frozen=True)
class AnalysisOptions:
    """What the user chose for one image (CLI flags or upload fields); picklable, so it
    travels to worker processes. ``library_dir`` None means the bundled reference set."""

    filename: str | None = None
    pixel_size_mm: float | None = None
    mode: str = "auto"
    polarity: str = "auto"
    lighting: str = "auto"
    threshold: float | None = None
    roi: tuple[float, ...] | None = None
    exclude: tuple[tuple[float, float, float, float], ...] | None = None
    #: Areas painted out: ``((points ((x, y), ...), radius_px), ...)`` in px.
    exclude_strokes: tuple[tuple[tuple[tuple[float, float], ...], float], ...] | None = None
    page: int | None = None
    library_dir: str | None = None
    max_pixels: int | None = None

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True)
class Analysis:
    """Everything known about one specimen image after analysis.

    ``to_dict()`` is the analysis JSON (the contract of ``ramiform analyze --json`` and of
    ``POST /api/specimens``, typed in :mod:`service.contract`); ``warnings`` holds every
    caveat of the image, the segmentation, the measurements and the ranking. The arrays (mask, overlay, skeleton) stay on the object for
    rendering overlays and are not serialised.
    """

    source: dict[str, Any]
    image: LoadedImage
    segmentation: Segmentation
    features: Features
    calibration: dict[str, Any]
    matching: dict[str, Any] | None = None
    warnings: tuple[str, ...] = field(default_factory=tuple)

    def to_dict(self) -> dict[str, Any]:
        """The analysis JSON, built by the contract (:func:`service.contract.analysis_json`)."""
        from service.contract import analysis_json

        return analysis_json(self)


def _calibration(image: LoadedImage, pixel_size_mm: float | None) -> dict[str, Any]:
    if pixel_size_mm is not None:
        if not pixel_size_mm > 0:
            raise ValueError(f"pixel size must be a positive number of millimetres, got {pixel_size_mm!r}")
        return {"pixel_size_mm": float(pixel_size_mm), "source": "user", "calibrated": True}
    if image.pixel_size_mm is not None:
        return {"pixel_size_mm": float(image.pixel_size_mm), "source": "tiff-resolution-tags", "calibrated": True}
    return {"pixel_size_mm": None, "source": "none", "calibrated": False}


def analyze(
    source: bytes | str | Path,
    *,
    filename: str | None = None,
    pixel_size_mm: float | None = None,
    mode: str = "auto",
    polarity: str = "auto",
    threshold: float | None = None,
    roi: tuple[float, ...] | None = None,
    exclude=None,
    lighting: str = "auto",
    exclude_strokes=None,
    page: int | None = None,
    max_pixels: int | None = None,
    reference_set=None,
    match: bool = True,
) -> Analysis:
    """Segment, measure and (optionally) rank one specimen image.

    Parameters
    ----------
    source : bytes or path
        The encoded image (PNG, JPEG, TIFF, BMP); the format is decided from the content.
    filename : str, optional
        The client's name for the file; kept as data only.
    pixel_size_mm : float, optional
        Calibration given by the user; overrides TIFF resolution tags.
    mode, polarity, threshold, roi, exclude, lighting :
        Segmentation overrides, see :func:`service.imaging.segment` (``roi`` a circle
        ``(cx, cy, r)`` or an ellipse ``(cx, cy, rx, ry, angle_deg)``; ``exclude`` boxes
        ``(x0, y0, x1, y1)`` in px).
    exclude_strokes : sequence of (points, radius_px), optional
        Areas painted out with a brush, ``points`` ``[(x, y), ...]`` in px; left out with the boxes.
    page : int, optional
        TIFF page to read (default: the first).
    max_pixels : int, optional
        Largest decoded image accepted (default: the loader's); a larger one raises
        ``ImageTooLargeError`` before any pixel is decoded.
    reference_set : ReferenceSet, optional
        References to rank against (default: the bundled set).
    match : bool
        Rank against the references (the library build measures clusters without ranking).

    Returns
    -------
    Analysis
    """
    data = Path(source).read_bytes() if isinstance(source, (str, Path)) else bytes(source)
    if filename is None and isinstance(source, (str, Path)):
        filename = Path(source).name
    image = load_image(data, page=page, max_pixels=max_pixels or DEFAULT_MAX_PIXELS)
    calibration = _calibration(image, pixel_size_mm)
    seg = segment(image, mode=mode, polarity=polarity, threshold=threshold, roi=roi, exclude=exclude,
                  lighting=lighting, exclude_strokes=exclude_strokes)
    features = measure(seg.measured_mask, pixel_size_mm=calibration["pixel_size_mm"], center_rc=seg.center_rc)
    warnings = list(image.warnings) + list(seg.warnings)
    warnings += [w for w in features.warnings if w not in warnings]
    if not calibration["calibrated"]:
        warnings.append(Caveat("not_calibrated",
                               "not calibrated: lengths are in pixels only (give a pixel size in mm to get mm)"))
    matching = None
    if match:
        from service.match import match_features

        try:
            several = seg.settings.get("cleanup", {}).get("left_out_comparable", 0) >= SEVERAL_OBJECTS
            matching = match_features(features, reference_set=reference_set, mask=seg.measured_mask,
                                      one_of_several=several)
        except LibraryError as exc:
            # A missing or damaged reference set must not cost the user the measurements.
            warnings.append(Caveat("not_ranked", f"not ranked against the reference library: {exc}"))
        else:
            warnings.extend(matching.pop("warnings", []))
            if seg.confidence < LOW_CONFIDENCE:
                warnings.append(Caveat("ranking_on_uncertain_mask",
                                       "the ranking rests on an uncertain mask: check the segmentation first"))
    source_info = {
        "filename": filename,
        "sha256": hashlib.sha256(data).hexdigest(),
        "size_bytes": len(data),
    }
    return Analysis(
        source=source_info,
        image=image,
        segmentation=seg,
        features=features,
        calibration=calibration,
        matching=matching,
        warnings=tuple(warnings),
    )


def analyze_with(source: bytes | str | Path, options: AnalysisOptions, *, reference_set=None,
                 match: bool = True) -> Analysis:
    """:func:`analyze` with the user's choices gathered in one :class:`AnalysisOptions`.

    ``options.library_dir`` is not opened here: the caller passes the ``reference_set`` it
    loaded (and may cache), or None for the bundled one.
    """
    return analyze(
        source,
        filename=options.filename,
        pixel_size_mm=options.pixel_size_mm,
        mode=options.mode,
        polarity=options.polarity,
        threshold=options.threshold,
        roi=options.roi,
        exclude=options.exclude,
        lighting=options.lighting,
        exclude_strokes=options.exclude_strokes,
        page=options.page,
        max_pixels=options.max_pixels,
        reference_set=reference_set,
        match=match,
    )
