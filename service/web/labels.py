"""Human words for every key of the analysis JSON the pages show.

The analysis JSON keeps its stable code keys (``box_dimension.value``, ``tips_per_site``);
readers of a page see these labels instead. Each label says what the number is and, where
it has one, its unit; ``label_for`` falls back to a cleaned-up phrase so that a key added
later never reaches the page as a dotted identifier (a test checks every current key has a
label of its own).
"""

from __future__ import annotations

import re

#: Features of ``analysis["features"]``, by the dotted key ``service.store.export.flatten`` gives.
#: Distribution keys (``skeleton.branch_length_px.median``) are built from STATISTICS below.
FEATURES: dict[str, str] = {
    "calibrated": "scale given",
    "pixel_size_mm": "pixel size",
    "branch_width_px": "typical branch width",
    "branch_width_mm": "typical branch width",
    "box_dimension": "box-counting dimension",
    "mass_radius_dimension": "mass-radius dimension",
    "sandbox_dimension": "sandbox dimension",
    "value": "value",
    "ci95_low": "95% interval, low end",
    "ci95_high": "95% interval, high end",
    "intercept": "fit intercept (natural log)",
    "n_fit_points": "points in the fit",
    "status": "judgement (ok, uncertain or withheld)",
    "reason": "why it is uncertain or withheld",
    "units": "units",
    "dimension_to_report": "dimension to report",
    "dimension_to_report.key": "which estimator",
    "dimension_to_report.differences": "why the estimators differ",
    "skeleton": "skeleton",
    "skeleton.tips": "branch tips",
    "skeleton.junctions": "branch junctions",
    "skeleton.branches": "branches (junction or tip to the next)",
    "skeleton.bare_skeleton.tips": "tips before pruning short spurs",
    "skeleton.bare_skeleton.junctions": "junctions before pruning short spurs",
    "skeleton.total_length_px": "total skeleton length",
    "skeleton.total_length_mm": "total skeleton length",
    "skeleton.branch_length_px": "branch length",
    "skeleton.branch_length_mm": "branch length",
    "skeleton.tortuosity": "tortuosity (path over straight length)",
    "skeleton.branching_angle_deg": "branching angle",
    "skeleton.width_px": "branch width",
    "skeleton.width_mm": "branch width",
    "skeleton.strahler.max_order": "highest Strahler order",
    "skeleton.strahler.bifurcation_ratio": "Horton bifurcation ratio",
    "skeleton.strahler.length_ratio": "Horton length ratio",
    "profile.area_px": "area covered",
    "profile.area_mm2": "area covered",
    "profile.radius_of_gyration_px": "radius of gyration",
    "profile.radius_of_gyration_mm": "radius of gyration",
    "profile.bounding_circle.radius_px": "radius of the enclosing circle",
    "profile.bounding_circle.radius_mm": "radius of the enclosing circle",
    "profile.area_fraction": "fraction of the enclosing circle covered",
    "profile.perimeter_px": "outline length",
    "profile.perimeter_mm": "outline length",
}

#: Summary statistics of a distribution (``skeleton.branch_length_px.p10``).
STATISTICS: dict[str, str] = {
    "n": "count", "mean": "mean", "median": "median", "std": "standard deviation",
    "p10": "10th percentile", "p90": "90th percentile",
}

#: Distributions among the features (their statistics are labelled "<label>, <statistic>").
DISTRIBUTIONS = ("skeleton.branch_length_px", "skeleton.branch_length_mm", "skeleton.tortuosity",
                 "skeleton.branching_angle_deg", "skeleton.width_px", "skeleton.width_mm")

def unit_of(key: str) -> str:
    """``"px"``, ``"mm"``, ``"mm²"``, ``"°"`` or ``""`` for a feature key."""
    parts = key.split(".")
    if parts[-1] in ("n", "n_fit_points") or any(p in ("tips", "junctions", "branches", "max_order") for p in parts):
        return ""
    for part in reversed(parts):
        if part.endswith("_mm2"):
            return "mm²"
        if part.endswith("_mm"):
            return "mm"
        if part.endswith("_px"):
            return "px²" if part.startswith("area") else "px"
        if part.endswith("_deg"):
            return "°"
    return ""


#: The matcher's features (``explanation.all_features[*].feature``), measured on the specimen
#: redrawn at one lattice site per branch width.
MATCHER_FEATURES: dict[str, str] = {
    "box_dimension": "box-counting dimension of the redrawn specimen",
    "sandbox_dimension": "sandbox dimension of the redrawn specimen",
    "log_lacunarity_r8": "lacunarity at one eighth of the radius (log)",
    "log_lacunarity_r4": "lacunarity at a quarter of the radius (log)",
    "log_lacunarity_r2": "lacunarity at half the radius (log)",
    "log_fill_fraction": "share of the enclosing circle filled (log)",
    "tips_per_site": "branch tips per occupied site",
    "junctions_per_site": "junctions per occupied site",
    "aspect_ratio": "roundness of the overall shape (1 = round)",
    "log_roughness": "outline roughness against a disc (log)",
    "hole_fraction": "share of enclosed pores",
}

#: Segmentation settings (``analysis["segmentation"]``), flattened.
SETTINGS: dict[str, str] = {
    "reduced_resolution_factor": "image reduced for reading by",
    "mode_requested": "method asked for",
    "mode_decision.otsu_separability": "how well two grey levels separate (0 to 1)",
    "mode_decision.field": "field the method was chosen in",
    "mode": "method used",
    "field_of_view.radius_px": "radius of the field read",
    "field_of_view.source": "field read",
    "field_of_view.ellipse.angle_deg": "field turned by",
    "levels_compare": "specimen pixels lie",
    "polarity": "specimen against background",
    "polarity_source": "how that was decided",
    "threshold": "threshold (0 to 1)",
    "threshold_method": "how the threshold was set",
    "threshold_scale": "threshold applies to",
    "background.model": "background light model",
    "background.local_scale_px": "background smoothing scale",
    "background.median_grey": "background grey (0 to 1)",
    "contrast_to_noise": "contrast over noise",
    "scene.rim_structures.removed_px": "rim structures removed",
    "scene.rim_structures.arcs": "rim arcs removed",
    "scene.leads": "electrode leads removed",
    "cleanup.min_object_px": "specks smaller than this dropped",
    "cleanup.holes_filled_up_to_px": "holes filled up to",
    "cleanup.components_found": "pieces found",
    "cleanup.components_kept": "pieces kept",
    "cleanup.left_out_comparable": "pieces left out at least a quarter of the specimen's size",
    "branch_width_px": "typical branch width",
    "electrode.radius_px": "centre electrode radius",
    "reading.mode": "reading: method",
    "reading.polarity": "reading: specimen against background",
    "reading.lighting": "reading: light evened as",
    "ridge_scales_px": "ridge filter scales",
    "lighting": "light evened as",
    "confidence": "confidence in the reading (0 to 1)",
}

#: Settings that are positions or bookkeeping: kept in the JSON, never shown as a result.
HIDDEN_SETTINGS = ("center_rc", "alternatives", "reading.roi", "reading.exclude", "reading.exclude_strokes",
                   "field_of_view.center_rc",
                   "electrode.center_rc", "field_of_view.ellipse.semi_axes_px")

REGIMES: dict[str, str] = {
    "dla": "diffusion-limited aggregation (DLA)",
    "eden": "Eden growth",
    "ballistic": "ballistic aggregation",
    "dbm": "dielectric breakdown model (DBM)",
}

PARAMETERS: dict[str, str] = {
    "eta": "growth exponent η",
    "sticking": "sticking probability",
    "neighborhood": "contact",
    "off_lattice": "off the lattice",
}

#: Where ballistic particles stop (``service.simulate.ballistic.STOP_RULES``).
STOP_WORDS: dict[str, str] = {
    "on_contact": "stopping at first contact",
    "on_impact": "stopping only on impact",
}

VALUES: dict[str, str] = {
    "von_neumann": "von Neumann (4 neighbours)",
    "moore": "Moore (8 neighbours)",
    "below": "below the threshold",
    "above": "above the threshold",
    "dark": "darker",
    "auto": "automatic",
    "user": "given by the user",
    "tiff": "from the TIFF file",
    "bright": "brighter",
}


def _clean(key: str) -> str:
    """A last resort for a key without a label: words, not an identifier."""
    words = re.sub(r"[._]+", " ", key).strip()
    words = re.sub(r"\b(px|mm|deg)\b", lambda m: {"deg": "°"}.get(m.group(1), f"({m.group(1)})"), words)
    return words


def feature_label(key: str) -> str:
    """The words for a flattened feature key, e.g. ``box_dimension.ci95_low`` ->
    "box-counting dimension, 95% interval, low end"."""
    if key in FEATURES:
        return FEATURES[key]
    head, _, last = key.rpartition(".")
    if head in DISTRIBUTIONS and last in STATISTICS:
        return f"{FEATURES[head]}, {STATISTICS[last]}"
    if head in FEATURES and last in FEATURES:
        return f"{FEATURES[head]}, {FEATURES[last]}"
    return _clean(key)


def has_own_label(key: str) -> bool:
    head, _, last = key.rpartition(".")
    return key in FEATURES or (head in DISTRIBUTIONS and last in STATISTICS) or (head in FEATURES and last in FEATURES)


def setting_label(key: str) -> str:
    return SETTINGS.get(key) or _clean(key)


def matcher_feature_label(name: str) -> str:
    return MATCHER_FEATURES.get(name) or _clean(name)


def regime_label(regime: str | None) -> str:
    return REGIMES.get(regime or "", regime or "unknown")


def value_words(value) -> str:
    if isinstance(value, str):
        return VALUES.get(value, value.replace("_", " "))
    if isinstance(value, bool):
        return "yes" if value else "no"
    return str(value)


def family_label(match: dict | None, *, short: bool = False) -> str:
    """"DBM, growth exponent η = 1" for a match or family."""
    if not match:
        return "–"
    regime = match.get("regime")
    name = regime.upper() if short and regime in ("dla", "dbm") else (
        regime.capitalize() if short else regime_label(regime))
    parts = []
    for k, v in (match.get("parameters") or {}).items():
        if k == "off_lattice":
            if v:
                parts.append("off the lattice")
            continue
        if k == "stop":
            parts.append(STOP_WORDS.get(v, value_words(v)))
            continue
        if isinstance(v, float):
            v = f"{v:g}"
        if short:
            parts.append(f"{VALUES.get(v, v).split(' (')[0]} contact" if k == "neighborhood"
                         else f"{PARAMETERS.get(k, k.replace('_', ' '))} {v}")
        else:
            parts.append(f"{PARAMETERS.get(k, k.replace('_', ' '))} {value_words(v)}" if k == "neighborhood"
                         else f"{PARAMETERS.get(k, k.replace('_', ' '))} = {value_words(v)}")
    return name + (", " + ", ".join(parts) if parts else "")


#: The files ``GET /api/specimens/{id}/files/{name}`` serves for a specimen, with what each is.
STORED_FILES: tuple[tuple[str, str], ...] = (
    ("source.png | source.jpg | source.tif | source.bmp", "the uploaded image, unchanged (sent as a download)"),
    ("photo.png", "the photograph at display size"),
    ("overlay.png", "the photograph with outline, skeleton, tips and junctions"),
    ("mask.png", "the segmented specimen at full size, 1 bit"),
    ("thumbnail.png", "a small overlay for lists"),
    ("levels.png", "the grey levels the threshold applies to, at display size"),
    ("alternative_0.png, alternative_1.png, …", "a preview of each other reading the segmentation offers"),
    ("box_counting.svg", "box-counting plot"),
    ("lacunarity.svg", "lacunarity plot"),
    ("branches.svg", "distributions of branch length, width, angle and tortuosity"),
    ("horton.svg", "streams and mean stream length per Strahler order"),
    ("references.svg", "the specimen on the reference distributions (when ranked)"),
)
