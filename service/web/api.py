"""REST routes under ``/api``: upload, list, read, delete and export specimens; references; health."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from fastapi import APIRouter, Depends, File, Form, HTTPException, Query, Request, UploadFile
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import FileResponse, Response
from pydantic import BaseModel, ConfigDict, Field
from sqlalchemy import text

from service import __version__
from service.store import SpecimenRecord, Store, specimens_csv
from service.web.deps import current_lab, get_pool, get_settings, get_store
from service.web.jobs import AnalysisOptions, AnalysisPool, run_analysis
from service.web.references import reference_set_or_error
from service.web.settings import Settings

router = APIRouter(prefix="/api")

Kind = Literal["electrodeposit", "vessel", "coral", "root", "other"]
_MEDIA_TYPES = {"png": "image/png", "jpg": "image/jpeg", "tif": "image/tiff", "bmp": "image/bmp",
                "svg": "image/svg+xml"}


class ErrorBody(BaseModel):
    detail: str = Field(description="what was wrong, in words")


_UPLOAD_ERRORS: dict[int | str, dict[str, Any]] = {
    413: {"model": ErrorBody, "description": "body over RAMIFORM_MAX_UPLOAD_MB, or more pixels than allowed"},
    415: {"model": ErrorBody, "description": "not a PNG, JPEG, TIFF or BMP image (decided from the content)"},
    422: {"model": ErrorBody, "description": "a field is invalid, or the image holds nothing to measure"},
    503: {"model": ErrorBody, "description": "the analysis worker stopped; try again"},
}
_NOT_FOUND: dict[int | str, dict[str, Any]] = {404: {"model": ErrorBody, "description": "no such specimen"}}


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
    tips: int | None = None
    junctions: int | None = None
    best_regime: str | None = None
    best_probability: float | None = None
    n_warnings: int = 0


class SpecimenPage(BaseModel):
    total: int
    limit: int
    offset: int
    items: list[SpecimenSummary]


class Specimen(BaseModel):
    """The analysis object of ``ramiform analyze --json`` plus the stored specimen's identity."""

    model_config = ConfigDict(extra="allow")

    id: str = Field(description="random URL-safe id, 144 bits")
    report_url: str
    label: str | None
    kind: str | None
    created_at: str
    files: dict[str, str] = Field(description="stored file name -> URL")
    ramiform_version: str
    source: dict[str, Any]
    image: dict[str, Any]
    calibration: dict[str, Any]
    segmentation: dict[str, Any]
    features: dict[str, Any]
    matches: list[dict[str, Any]] | None = None
    in_library: Any = None
    parameter_estimates: Any = None
    explanation: Any = None
    warnings: list[str]


def file_url(record: SpecimenRecord, name: str) -> str:
    return f"/api/specimens/{record.id}/files/{name}"


def report_url(record: SpecimenRecord) -> str:
    return f"/specimens/{record.id}"


def specimen_body(record: SpecimenRecord) -> dict[str, Any]:
    return {
        **record.analysis,
        "id": record.id,
        "report_url": report_url(record),
        "label": record.label,
        "kind": record.kind,
        "created_at": record.created_at.isoformat(),
        "files": {name: file_url(record, name) for name in record.files},
    }


def summary(record: SpecimenRecord) -> dict[str, Any]:
    """Key numbers of one specimen for lists (API and page)."""
    features = record.analysis.get("features", {})
    box = features.get("box_dimension", {})
    skeleton = features.get("skeleton", {})
    best = (record.analysis.get("matches") or [{}])[0]
    return {
        "id": record.id,
        "label": record.label,
        "kind": record.kind,
        "filename": record.filename,
        "created_at": record.created_at.isoformat(),
        "report_url": report_url(record),
        "thumbnail_url": file_url(record, "thumbnail.png"),
        "box_dimension": box.get("value"),
        "box_dimension_ci95": box.get("ci95"),
        "tips": skeleton.get("tips"),
        "junctions": skeleton.get("junctions"),
        "best_regime": best.get("regime"),
        "best_probability": best.get("probability"),
        "n_warnings": len(record.analysis.get("warnings", [])),
    }


def _roi(value: str | None) -> tuple[float, float, float] | None:
    if value is None or not value.strip():
        return None
    try:
        cx, cy, r = (float(part) for part in value.split(","))
    except ValueError:
        raise HTTPException(422, f"roi must read 'cx,cy,r' in pixels, got {value!r}") from None
    if not r > 0:
        raise HTTPException(422, f"roi radius must be positive, got {r}")
    return cx, cy, r


def _display_name(filename: str | None) -> str | None:
    """The client's file name as data: printable characters only, at most 255 of them."""
    cleaned = "".join(c for c in filename or "" if c.isprintable())[:255]
    return cleaned or None


async def _found(store: Store, specimen_id: str, lab: str | None) -> SpecimenRecord:
    record = await run_in_threadpool(store.get, specimen_id, owner=lab)
    if record is None:
        raise HTTPException(404, f"no specimen {specimen_id!r}")
    return record


def _csv(text_: str, filename: str) -> Response:
    return Response(text_, media_type="text/csv; charset=utf-8",
                    headers={"Content-Disposition": f'attachment; filename="{filename}"'})


@router.post("/specimens", status_code=201, response_model=Specimen, responses=_UPLOAD_ERRORS,
             summary="Upload and analyse one image")
async def create_specimen(
    image: Annotated[UploadFile, File(description="PNG, JPEG, TIFF or BMP; the format is read from the content")],
    label: Annotated[str | None, Form(max_length=200, description="free text, e.g. the dish or the series")] = None,
    kind: Annotated[Kind | None, Form(description="what the specimen is; decides the cautions shown")] = None,
    pixel_size_mm: Annotated[float | None, Form(gt=0, description="calibration; overrides TIFF tags")] = None,
    mode: Annotated[Literal["auto", "threshold", "ridge"],
                    Form(description="segmentation: auto, threshold, or ridge for thin lines")] = "auto",
    polarity: Annotated[Literal["auto", "dark", "bright"],
                        Form(description="specimen darker (dark) or brighter (bright) than its background")] = "auto",
    threshold: Annotated[float | None, Form(ge=0, le=1, description="fixed threshold, 0-1")] = None,
    roi: Annotated[str | None, Form(description="circle to analyse: 'cx,cy,r' in px")] = None,
    page: Annotated[int | None, Form(ge=0, description="TIFF page (0-based)")] = None,
    settings: Settings = Depends(get_settings),
    store: Store = Depends(get_store),
    pool: AnalysisPool = Depends(get_pool),
    lab: str | None = Depends(current_lab),
) -> dict[str, Any]:
    """Analyse the image and store it; answers 201 only once record and files are on disk."""
    if label is not None and not label.isprintable():  # PostgreSQL text cannot hold NUL, for one
        raise HTTPException(422, "label must be plain text on one line (no control characters)")
    filename = _display_name(image.filename)
    data = await image.read()
    options = AnalysisOptions(
        filename=filename, pixel_size_mm=pixel_size_mm, mode=mode, polarity=polarity,
        threshold=threshold, roi=_roi(roi), page=page,
        library_dir=str(settings.library_dir) if settings.library_dir else None,
        max_pixels=settings.max_pixels,
    )
    try:
        result = await pool.run(run_analysis, data, options)
    except ValueError as exc:  # the pipeline's message says what was wrong with the input
        raise HTTPException(422, str(exc)) from exc
    record = await run_in_threadpool(
        store.add, result["analysis"], result["files"], label=label, kind=kind, filename=filename, owner=lab
    )
    return specimen_body(record)


@router.get("/specimens", response_model=SpecimenPage, summary="List specimens, newest first")
async def list_specimens(
    limit: Annotated[int, Query(ge=1, le=500)] = 50,
    offset: Annotated[int, Query(ge=0, le=2**31 - 1)] = 0,  # bounded: the database's integer
    label: Annotated[str | None, Query(max_length=200, description="only specimens with this label")] = None,
    store: Store = Depends(get_store),
    lab: str | None = Depends(current_lab),
) -> dict[str, Any]:
    records, total = await run_in_threadpool(store.list, owner=lab, label=label, limit=limit, offset=offset)
    return {"total": total, "limit": limit, "offset": offset, "items": [summary(r) for r in records]}


# Declared before /specimens/{specimen_id} so that "export.csv" is not taken for an id.
@router.get("/specimens/export.csv", response_class=Response, summary="CSV of every specimen (label filter)")
async def export_all(
    label: Annotated[str | None, Query(max_length=200)] = None,
    store: Store = Depends(get_store),
    lab: str | None = Depends(current_lab),
) -> Response:
    records, _ = await run_in_threadpool(store.list, owner=lab, label=label, limit=None)
    return _csv(specimens_csv(records), "ramiform-specimens.csv")


@router.get("/specimens/{specimen_id}", response_model=Specimen, responses=_NOT_FOUND,
            summary="One specimen's analysis")
async def read_specimen(
    specimen_id: str, store: Store = Depends(get_store), lab: str | None = Depends(current_lab)
) -> dict[str, Any]:
    return specimen_body(await _found(store, specimen_id, lab))


@router.delete("/specimens/{specimen_id}", status_code=204, response_class=Response, responses=_NOT_FOUND,
               summary="Delete a specimen")
async def delete_specimen(
    specimen_id: str, store: Store = Depends(get_store), lab: str | None = Depends(current_lab)
) -> Response:
    if not await run_in_threadpool(store.delete, specimen_id, owner=lab):
        raise HTTPException(404, f"no specimen {specimen_id!r}")
    return Response(status_code=204)


@router.get("/specimens/{specimen_id}/export.csv", response_class=Response, responses=_NOT_FOUND,
            summary="CSV of one specimen")
async def export_one(
    specimen_id: str, store: Store = Depends(get_store), lab: str | None = Depends(current_lab)
) -> Response:
    record = await _found(store, specimen_id, lab)
    return _csv(specimens_csv([record]), f"ramiform-{record.id}.csv")


@router.get("/specimens/{specimen_id}/files/{name}", response_class=FileResponse, responses=_NOT_FOUND,
            summary="A stored picture, plot or the uploaded image")
async def specimen_file(
    specimen_id: str, name: str, store: Store = Depends(get_store), lab: str | None = Depends(current_lab)
) -> FileResponse:
    record = await _found(store, specimen_id, lab)
    path = store.file_path(record, name)
    if path is None:
        raise HTTPException(404, f"specimen {specimen_id!r} has no file {name!r}")
    media_type = _MEDIA_TYPES.get(name.rsplit(".", 1)[-1], "application/octet-stream")
    headers = {"Cache-Control": "private, max-age=31536000, immutable", "X-Content-Type-Options": "nosniff"}
    if name.startswith("source."):
        headers["Content-Disposition"] = f'attachment; filename="{record.id}-{name}"'
    return FileResponse(path, media_type=media_type, headers=headers)


@router.get("/references", summary="The reference set: regimes, parameters, thumbnails")
async def list_references(settings: Settings = Depends(get_settings),
                          lab: str | None = Depends(current_lab)) -> dict[str, Any]:
    references = reference_set_or_error(settings)
    return {
        "preset": references.preset,
        "regimes": sorted({e.regime for e in references.ensembles}),
        "ensembles": [
            {
                "id": e.id,
                "regime": e.regime,
                "parameters": dict(e.parameters),
                "n_particles": e.n_particles,
                "n_realisations": e.n_realisations,
                "thumbnail_url": f"/api/references/{e.id}/thumbnail.png",
            }
            for e in references.ensembles
        ],
    }


@router.get("/references/{ensemble_id}/thumbnail.png", response_class=Response,
            summary="Thumbnail of one reference ensemble")
async def reference_thumbnail(ensemble_id: str, settings: Settings = Depends(get_settings),
                              lab: str | None = Depends(current_lab)) -> Response:
    references = reference_set_or_error(settings)
    if ensemble_id not in {e.id for e in references.ensembles}:
        raise HTTPException(404, f"no reference ensemble {ensemble_id!r}")
    return Response(references.thumbnail_bytes(ensemble_id), media_type="image/png",
                    headers={"Cache-Control": "public, max-age=86400"})


@router.get("/health", summary="Liveness and readiness")
async def health(request: Request, store: Store = Depends(get_store),
                 settings: Settings = Depends(get_settings)) -> dict[str, Any]:
    def ping() -> None:
        with store.engine.connect() as conn:
            conn.execute(text("SELECT 1"))

    try:
        await run_in_threadpool(ping)
    except Exception as exc:
        raise HTTPException(503, f"database unreachable: {type(exc).__name__}") from exc
    return {"status": "ok", "version": __version__, "workers": settings.worker_count,
            "database": store.engine.dialect.name}
