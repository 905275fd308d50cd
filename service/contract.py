"""The analysis JSON and every REST answer as typed models: one contract for every caller.

:func:`analysis_model` builds the analysis object from the pipeline's frozen dataclasses,
and :func:`stored_analysis` reads one back from the store; both pass through the same
models, so ``ramiform analyze --json``, ``GET /api/specimens/{id}``, the CSV export and the
pages give one number one value. The models name every stable key with its type (the
OpenAPI document shows them); keys not named here are kept as they came (``extra="allow"``),
so the JSON stays a superset of what it was.

Each fitted dimension and parameter estimate carries a ``status`` (``ok``, ``uncertain``,
``withheld``) and its ``reason`` in words (:mod:`service.quality`): a value that cannot be
a result (a dimension above 2 on a flat picture, an interval wider than the possible range,
a spread finer than the library's grid) is flagged here, never left for a page to notice.
``features.dimension_to_report`` says which fitted dimension to quote and why the estimators
differ. Warnings are ``{"code", "text"}`` objects; ``code`` is stable snake_case (:mod:`service.caveats`).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Annotated, Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from service import __version__
from service.caveats import caveat
from service.quality import Judgement, dimension_to_report, judge_dimension, judge_parameter, plus_minus

if TYPE_CHECKING:
    from service.analysis import Analysis

Status = Literal["ok", "uncertain", "withheld"]
Interval = Annotated[list[float | None], Field(min_length=2, max_length=2,
                                               description="95% interval [low, high]")]
Pair = Annotated[list[float], Field(min_length=2, max_length=2)]


class _Open(BaseModel):
    """Named keys typed; any other key kept as it came."""

    model_config = ConfigDict(extra="allow")


class WarningItem(BaseModel):
    """One warning: a stable snake_case ``code`` a program can test, and the ``text`` for people."""

    code: str = Field(pattern=r"^[a-z][a-z0-9_]*$", examples=["not_calibrated"])
    text: str

    @model_validator(mode="before")
    @classmethod
    def _from_text(cls, data: Any) -> Any:
        # A Caveat from the pipeline, or a plain string stored before warnings had codes.
        if isinstance(data, str):
            return caveat(data).to_dict()
        return data

    def __str__(self) -> str:
        return self.text


Warnings = Annotated[list[WarningItem], Field(default_factory=list)]


class Source(_Open):
    filename: str | None = Field(None, description="the client's file name, as data only")
    sha256: str = Field(description="hex digest of the uploaded bytes")
    size_bytes: int


class ImageInfo(_Open):
    width_px: int
    height_px: int
    format: Literal["PNG", "JPEG", "TIFF", "BMP"] | str
    bit_depth: int
    n_pages: int = 1
    page: int = 0
    pixel_size_mm: float | None = Field(None, description="from the TIFF resolution tags; null when none")
    warnings: Warnings = Field(description="remarks on the file (placeholder resolution, non-square pixels...)")


class Calibration(_Open):
    pixel_size_mm: float | None = Field(description="side of one pixel; null when uncalibrated")
    source: Literal["user", "tiff-resolution-tags", "none"] | str
    calibrated: bool


class Alternative(_Open):
    label: str
    overrides: dict[str, Any] = Field(description="the segment() overrides that give this reading")
    score: float


class SegmentationInfo(_Open):
    """What the segmentation actually used (``Segmentation.settings``); other keys describe how."""

    mode: str | None = None
    polarity: str | None = None
    threshold: float | None = None
    levels_compare: Literal["below", "above"] | None = None
    branch_width_px: float | None = None
    confidence: float | None = Field(None, ge=0, le=1, description="how clearly this reading beat the others")
    alternatives: list[Alternative] = Field(default_factory=list)
    reading: dict[str, Any] = Field(default_factory=dict, description="the overrides that reproduce this reading")


class _Judged(_Open):
    status: Status = Field("ok", description="ok: a result; uncertain: shown with its doubt; withheld: not a result")
    reason: str | None = Field(None, description="why it is uncertain or withheld, in words")


class Dimension(_Judged):
    """A fractal dimension fitted as a slope over a range of scales."""

    value: float | None = Field(description="the fitted dimension (dimensionless)")
    ci95: Interval
    units: Literal["dimensionless"] = "dimensionless"
    fit_range_px: Pair = Field(description="smallest and largest scale fitted, px")
    fit_range_mm: Pair | None = Field(None, description="the same in mm, when calibrated")
    sizes_px: list[float] = Field(default_factory=list)
    sizes_mm: list[float] | None = None
    counts: list[float | None] = Field(default_factory=list)
    intercept: float | None = None
    n_fit_points: int
    warnings: Warnings

    @model_validator(mode="after")
    def _judge(self) -> Dimension:
        judged = judge_dimension(self.value, self.ci95, self.fit_range_px, self.n_fit_points)
        self.status, self.reason = judged.status, judged.reason
        return self


class Lacunarity(_Open):
    scales_px: list[float] = Field(description="gliding-box sides, px")
    values: list[float | None] = Field(description="lacunarity at each side (1 = a full image)")
    scales_widths: list[float] | None = Field(None, description="the sides in branch widths")
    scales_mm: list[float] | None = None


class Distribution(_Open):
    n: int
    mean: float | None = None
    median: float | None = None
    std: float | None = None
    p10: float | None = None
    p90: float | None = None


class Strahler(_Open):
    max_order: int
    stream_counts: list[int]
    mean_stream_length_px: list[float | None]
    mean_stream_length_mm: list[float | None] | None = None
    bifurcation_ratio: float | None = None
    length_ratio: float | None = None


class Skeleton(_Open):
    tips: int
    junctions: int
    branches: int
    total_length_px: float
    total_length_mm: float | None = None
    branch_length_px: Distribution
    branch_length_mm: Distribution | None = None
    tortuosity: Distribution
    branching_angle_deg: Distribution
    width_px: Distribution
    width_mm: Distribution | None = None
    strahler: Strahler


class Profile(_Open):
    area_px: int
    area_mm2: float | None = None
    radius_of_gyration_px: float
    radius_of_gyration_mm: float | None = None
    area_fraction: float | None = None
    perimeter_px: float | None = None
    perimeter_mm: float | None = None


class DimensionToReport(BaseModel):
    key: Literal["box_dimension", "mass_radius_dimension", "sandbox_dimension"] | None = Field(
        description="the features key of the dimension to quote; null when every fit is withheld")
    value: float | None
    ci95: list[float | None] | None
    status: Status
    reason: str = Field(description="why this one, in words")
    differences: str | None = Field(None, description="why the estimators disagree, when they do beyond their intervals")


#: The fitted dimensions of ``features``, each judged.
DIMENSIONS = ("box_dimension", "mass_radius_dimension", "sandbox_dimension")


class FeatureSet(_Open):
    """Every measurement; lengths in px, with ``_mm`` twins when calibrated."""

    calibrated: bool
    pixel_size_mm: float | None = None
    branch_width_px: float
    branch_width_mm: float | None = None
    box_dimension: Dimension
    mass_radius_dimension: Dimension
    sandbox_dimension: Dimension
    lacunarity: Lacunarity
    skeleton: Skeleton
    profile: Profile
    warnings: Warnings
    dimension_to_report: DimensionToReport | None = Field(
        None, description="which fitted dimension to quote for this specimen, and why the estimators differ")

    @model_validator(mode="after")
    def _choose(self) -> FeatureSet:
        chosen = dimension_to_report({key: getattr(self, key).model_dump() for key in DIMENSIONS})
        self.dimension_to_report = None if chosen is None else DimensionToReport.model_validate(chosen)
        return self


class EnsembleWeight(BaseModel):
    id: str
    weight: float


class Match(_Judged):
    """One family of the reference set; ``matches`` lists every family, most probable first."""

    regime: str
    parameters: dict[str, float | int | str | bool]
    probability: float = Field(ge=0, le=1)
    distance: float = Field(description="how far the specimen lies from this family's references, in units of "
                                        "their own spread (Mahalanobis, in the matcher's feature space, at the "
                                        "specimen's size); compare with explanation.novelty.inlier_distance "
                                        "(typical of the references' own members) and threshold_distance (beyond "
                                        "it, outside every reference)")
    ensembles: list[EnsembleWeight] = Field(default_factory=list)


class ParameterEstimate(_Judged):
    value: float | None
    ci95: Interval
    std: float | None = Field(None, description="posterior spread over the library grid")
    spans_library_range: bool = False
    note: str | None = None
    axis: Literal["linear", "log"] | str = "linear"
    values_in_library: list[float] = Field(default_factory=list)
    posterior_at_library_values: list[float] = Field(default_factory=list)
    regime_probability: float | None = None
    plus_minus: float | None = Field(None, description="the spread to print as +-; null when it is not a result")

    def judged(self, regime: str, name: str) -> ParameterEstimate:
        judgement = judge_parameter(name, self.value, self.ci95, self.std, self.values_in_library, axis=self.axis,
                                    spans_library_range=self.spans_library_range,
                                    regime_probability=self.regime_probability, regime=regime)
        return self.model_copy(update={"status": judgement.status, "reason": judgement.reason,
                                       "plus_minus": plus_minus(judgement, self.std)})


class Verdict(_Open):
    name: str = Field(description='the verdict, or "no confident verdict"')
    best: str | None = None
    probability: float | None = None
    runner_up: str | None = None
    confident: bool
    reason: str | None = None
    probabilities: dict[str, float | None] = Field(default_factory=dict)


class Explanation(_Open):
    summary: str
    verdict: Verdict | None = None
    best: Match | None = None
    runner_up: Match | None = None
    regime_probabilities: dict[str, float | None] | None = None
    deciding_features: list[dict[str, Any]] | None = None
    all_features: list[dict[str, Any]] | None = None


class AnalysisModel(_Open):
    """The analysis of one specimen image (``ramiform analyze --json``, one line per image)."""

    ramiform_version: str
    source: Source
    image: ImageInfo
    calibration: Calibration
    segmentation: SegmentationInfo
    features: FeatureSet
    matches: list[Match] | None = Field(None, description="every family, best first; null when not ranked")
    in_library: bool | None = Field(None, description="false: nearest, but outside every reference")
    parameter_estimates: dict[str, dict[str, ParameterEstimate]] | None = None
    explanation: Explanation | None = None
    warnings: Warnings

    @model_validator(mode="after")
    def _judge_matches(self) -> AnalysisModel:
        # Outside every reference the probabilities only rank the families against each other.
        if self.in_library is False:
            named = [self.explanation.best, self.explanation.runner_up] if self.explanation else []
            for entry in [*(self.matches or []), *(m for m in named if m is not None)]:
                entry.status = "uncertain"
                entry.reason = ("the specimen lies outside every reference: the probability ranks the families "
                                "against each other, it is not the chance that the specimen grew so")
        return self

    @field_validator("parameter_estimates")
    @classmethod
    def _judge_parameters(cls, value):
        if value is None:
            return None
        return {regime: {name: estimate.judged(regime, name) for name, estimate in parameters.items()}
                for regime, parameters in value.items()}

    def json_dict(self) -> dict[str, Any]:
        """Plain JSON (NaN and infinities as null)."""
        return json_safe(self.model_dump(mode="json"))


def json_safe(value: Any) -> Any:
    """``value`` as plain JSON: numpy scalars and arrays made Python ones, tuples made lists,
    NaN and infinities made ``None`` (JSON has no NaN; PostgreSQL's ``json`` type and strict
    clients refuse it)."""
    if isinstance(value, dict):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    if isinstance(value, np.ndarray):
        return json_safe(value.tolist())
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _raw(analysis: Analysis) -> dict[str, Any]:
    image = analysis.image
    out: dict[str, Any] = {
        "ramiform_version": __version__,
        "source": dict(analysis.source),
        "image": {
            "width_px": int(image.gray.shape[1]),
            "height_px": int(image.gray.shape[0]),
            "format": image.format,
            "bit_depth": int(image.bit_depth),
            "n_pages": int(image.n_pages),
            "page": int(image.page),
            "pixel_size_mm": image.pixel_size_mm,
            "warnings": list(image.warnings),
        },
        "calibration": dict(analysis.calibration),
        "segmentation": dict(analysis.segmentation.settings),
        "features": analysis.features.to_dict(),
    }
    # The dataclasses' dicts hold plain text; the caveats themselves carry the codes.
    features = analysis.features
    out["features"]["warnings"] = list(features.warnings)
    for key in DIMENSIONS:
        out["features"][key]["warnings"] = list(getattr(features, key).warnings)
    if analysis.matching is not None:
        out.update({k: v for k, v in analysis.matching.items() if k != "warnings"})
    out["warnings"] = list(analysis.warnings)
    return json_safe(out)


def analysis_model(analysis: Analysis) -> AnalysisModel:
    """The contract's analysis object of one :class:`service.analysis.Analysis`."""
    return AnalysisModel.model_validate(_raw(analysis))


def analysis_json(analysis: Analysis) -> dict[str, Any]:
    """The analysis JSON (what the CLI prints and the store keeps)."""
    return analysis_model(analysis).json_dict()


def stored_analysis(data: dict[str, Any]) -> AnalysisModel:
    """A stored analysis dict read through the contract (older records get codes and statuses)."""
    return AnalysisModel.model_validate(data)


def analysis_view(data: dict[str, Any]) -> dict[str, Any]:
    """A stored analysis as plain JSON for lists, exports and pages: through the contract, or,
    for a record the contract cannot read whole (a partial or foreign one), as stored with its
    warnings given codes and its dimensions judged, so one bad record never stops a list."""
    try:
        return stored_analysis(data).json_dict()
    except ValidationError:
        out = json_safe(dict(data))
        out["warnings"] = [caveat(w).to_dict() for w in data.get("warnings") or []]
        features = out.get("features")
        for key in DIMENSIONS if isinstance(features, dict) else ():
            if isinstance(features.get(key), dict):
                judged = judgement_of(features[key])
                features[key].update(status=judged.status, reason=judged.reason)
        return out


def judgement_of(fit: dict[str, Any]) -> Judgement:
    """The judgement of one fitted dimension's dict (for callers holding plain JSON)."""
    return judge_dimension(fit.get("value"), fit.get("ci95"), fit.get("fit_range_px"), fit.get("n_fit_points"))


# ----------------------------------------------------------------------------- REST answers


class ErrorBody(BaseModel):
    detail: str = Field(description="what was wrong, in words")


class HistoryEntry(_Open):
    """One reading of a specimen: 1 is the upload, then each re-measurement."""

    number: int
    created_at: str
    origin: Literal["upload", "re-measured"] | str
    requested: dict[str, Any] = Field(default_factory=dict, description="overrides asked for")
    used: dict[str, Any] = Field(default_factory=dict, description="mode, polarity, threshold used")
    confidence: float | None = None
    box_dimension: float | None = None
    best_regime: str | None = None
    best_probability: float | None = None
    alternative: dict[str, Any] | None = None


class Specimen(AnalysisModel):
    """The analysis object of ``ramiform analyze --json`` plus the stored specimen's identity."""

    id: str = Field(description="random URL-safe id, 144 bits")
    report_url: str
    label: str | None
    kind: str | None
    created_at: str
    files: dict[str, str] = Field(description="stored file name -> URL")
    history: list[HistoryEntry] | None = Field(
        None, description="the readings of this specimen, oldest first: 1 is the upload, then each re-measurement")
    conditions: dict[str, dict[str, Any]] = Field(
        default_factory=dict, description="the specimen's conditions (name -> value, unit, quantity), as studies use them")


class SpecimenSummary(BaseModel):
    id: str
    label: str | None
    kind: str | None
    filename: str | None
    created_at: str
    report_url: str
    thumbnail_url: str
    box_dimension: float | None = Field(None, description="features.box_dimension.value")
    box_dimension_ci95: list[float | None] | None = None
    box_dimension_status: Status | None = Field(None, description="features.box_dimension.status")
    tips: int | None = None
    junctions: int | None = None
    best_regime: str | None = None
    best_probability: float | None = None
    in_library: bool | None = Field(None, description="false: the best regime is only the nearest")
    verdict: str | None = Field(None, description='explanation.verdict.name ("no confident verdict" when withheld)')
    n_warnings: int = 0


class SpecimenPage(BaseModel):
    total: int
    limit: int
    offset: int
    items: list[SpecimenSummary]


class ReferenceEnsemble(BaseModel):
    id: str
    regime: str
    parameters: dict[str, float | int | str | bool]
    n_particles: int
    n_realisations: int
    thumbnail_url: str


class ReferenceCatalogue(BaseModel):
    preset: str
    regimes: list[str]
    ensembles: list[ReferenceEnsemble]


class Health(BaseModel):
    status: Literal["ok"]
    version: str
    workers: int
    database: str
