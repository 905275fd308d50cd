"""REST routes under ``/api``: upload, list, read, delete and export specimens; references; health."""

from __future__ import annotations

from functools import partial
from typing import Annotated, Any, Literal

from fastapi import APIRouter, Depends, File, Form, HTTPException, Query, Request, UploadFile
from fastapi import Path as PathParam
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import FileResponse, Response
from sqlalchemy import text

from service import __version__
from service.contract import (ErrorBody, Health, HistoryEntry, ReferenceCatalogue, Specimen, SpecimenPage,
                              SpecimenSummary, analysis_view, stored_analysis)
from service.match.library import ReferenceLibrary
from service.store import Reading, SpecimenRecord, Store, StudyStore, specimens_csv
from service.study import Condition, conditions_to_dict, parse_conditions_text
from service.web import readings
from service.web.deps import current_lab, get_library, get_pool, get_settings, get_store
from service.web.jobs import AnalysisOptions, AnalysisPool, run_analysis
from service.web.readings import Reanalysis
from service.web.references import reference_set_or_error
from service.web.settings import Settings

router = APIRouter(prefix="/api")

Kind = Literal["electrodeposit", "vessel", "coral", "root", "other"]
_MEDIA_TYPES = {"png": "image/png", "jpg": "image/jpeg", "tif": "image/tiff", "bmp": "image/bmp",
                "svg": "image/svg+xml"}


#: What ``files/{name}`` serves; a specimen's ``files`` lists the names it has, with their URLs.
FILE_NAMES_HELP = (
    "a name listed in the specimen's `files`: `source.png|jpg|tif|bmp` (the upload, as an attachment), "
    "`photo.png`, `overlay.png` (outline, skeleton, tips, junctions), `mask.png` (full size, 1 bit), "
    "`thumbnail.png`, `box_counting.svg`, `lacunarity.svg`, `references.svg` (when ranked), "
    "`levels.png` (the picture the threshold applies to), `alternative_<i>.png` (alternative readings), "
    "and the report's other plots"
)

_UPLOAD_ERRORS: dict[int | str, dict[str, Any]] = {
    413: {"model": ErrorBody, "description": "body over RAMIFORM_MAX_UPLOAD_MB, or more pixels than allowed"},
    415: {"model": ErrorBody, "description": "not a PNG, JPEG, TIFF or BMP image (decided from the content)"},
    422: {"model": ErrorBody, "description": "a field is invalid, or the image holds nothing to measure"},
    503: {"model": ErrorBody, "description": "the analysis worker stopped; try again"},
}
_NOT_FOUND: dict[int | str, dict[str, Any]] = {404: {"model": ErrorBody, "description": "no such specimen"}}
_REANALYSIS_ERRORS: dict[int | str, dict[str, Any]] = {
    **_NOT_FOUND,
    409: {"model": ErrorBody, "description": "another request measured the specimen again meanwhile; nothing changed"},
    422: {"model": ErrorBody, "description": "an override is invalid (e.g. a region outside the image); nothing changed"},
    503: {"model": ErrorBody, "description": "the analysis worker stopped; try again"},
}


def file_url(record: SpecimenRecord, name: str) -> str:
    """The file's URL; a file of a later reading carries its reading folder, so the browser
    (which may keep a file for a year) never shows a replaced picture under a new analysis."""
    url = f"/api/specimens/{record.id}/files/{name}"
    stored = record.stored_path(name) or name
    return f"{url}?v={stored.rsplit('/', 1)[0]}" if "/" in stored else url


def report_url(record: SpecimenRecord) -> str:
    return f"/specimens/{record.id}"


def specimen_body(record: SpecimenRecord, history: list[Reading] | None = None,
                  conditions: dict[str, Condition] | None = None) -> Specimen:
    """The stored analysis read through the contract, with the specimen's identity, history and conditions."""
    body = {
        **stored_analysis(record.analysis).model_dump(),
        "id": record.id,
        "report_url": report_url(record),
        "label": record.label,
        "kind": record.kind,
        "created_at": record.created_at.isoformat(),
        "files": {name: file_url(record, name) for name in record.files},
    }
    if history is not None:
        body["history"] = [reading.to_dict() for reading in history]
    body["conditions"] = conditions_to_dict(conditions or {})
    return Specimen.model_validate(body)


async def _specimen_answer(store: Store, record: SpecimenRecord, lab: str | None) -> Specimen:
    history = await run_in_threadpool(store.history, record.id, owner=lab)
    conditions = await run_in_threadpool(StudyStore(store.engine).conditions_of, record.id)
    return specimen_body(record, history, conditions)


def summary(record: SpecimenRecord) -> dict[str, Any]:
    """Key numbers of one specimen for lists (API and page), read through the contract."""
    analysis = analysis_view(record.analysis)
    features = analysis.get("features", {})
    box = features.get("box_dimension", {})
    skeleton = features.get("skeleton", {})
    best = (analysis.get("matches") or [{}])[0]
    verdict = ((analysis.get("explanation") or {}).get("verdict") or {}).get("name")
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
        "box_dimension_status": box.get("status"),
        "tips": skeleton.get("tips"),
        "junctions": skeleton.get("junctions"),
        "best_regime": best.get("regime"),
        "best_probability": best.get("probability"),
        "in_library": analysis.get("in_library"),
        "verdict": verdict,
        "n_warnings": len(analysis.get("warnings", [])),
    }


def _roi(value: str | None) -> tuple[float, ...] | None:
    """The upload field 'cx,cy,r' (circle) or 'cx,cy,rx,ry,angle_deg' (ellipse), in px."""
    if value is None or not value.strip():
        return None
    try:
        numbers = [float(part) for part in value.split(",")]
    except ValueError:
        numbers = []
    fields = ("cx", "cy", "r") if len(numbers) == 3 else ("cx", "cy", "rx", "ry", "angle_deg")
    try:
        region = readings.RegionOfInterest(**dict(zip(fields, numbers)))
    except ValueError:
        region = None
    if len(numbers) not in (3, 5) or region is None:
        raise HTTPException(422, "roi must read 'cx,cy,r' (a circle) or 'cx,cy,rx,ry,angle_deg' (an ellipse), "
                                 f"in pixels with positive radii, got {value!r}")
    return region.as_tuple()


def parse_conditions_field(value: str | None) -> dict[str, Condition]:
    """The upload field ``conditions``: a JSON object, or ``name = value; ...`` (ConditionError, 422)."""
    return parse_conditions_text(value)


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
    roi: Annotated[str | None, Form(description="region to analyse: 'cx,cy,r' (circle) or "
                                                "'cx,cy,rx,ry,angle_deg' (ellipse) in px")] = None,
    page: Annotated[int | None, Form(ge=0, description="TIFF page (0-based)")] = None,
    conditions: Annotated[str | None, Form(max_length=20000, description=(
        'typed conditions as a JSON object, e.g. {"voltage": "4 V", "concentration": "50 mM", '
        '"electrolyte": "copper sulfate"}, or as "voltage = 4 V; electrolyte = copper sulfate"; '
        'a unit that does not parse is refused (422) before anything is stored'))] = None,
    settings: Settings = Depends(get_settings),
    store: Store = Depends(get_store),
    pool: AnalysisPool = Depends(get_pool),
    lab: str | None = Depends(current_lab),
) -> Specimen:
    """Analyse the image and store it; answers 201 only once record and files are on disk."""
    if label is not None and not label.isprintable():  # PostgreSQL text cannot hold NUL, for one
        raise HTTPException(422, "label must be plain text on one line (no control characters)")
    parsed_conditions = parse_conditions_field(conditions)  # before any work: a bad unit stores nothing
    filename = _display_name(image.filename)
    data = await image.read()
    options = AnalysisOptions(
        filename=filename, pixel_size_mm=pixel_size_mm, mode=mode, polarity=polarity,
        threshold=threshold, roi=_roi(roi), page=page,
        library_dir=str(settings.library_dir) if settings.library_dir else None,
        max_pixels=settings.max_pixels,
    )
    try:
        result = await pool.run_with_library(run_analysis, data, options)
    except ValueError as exc:  # the pipeline's message says what was wrong with the input
        raise HTTPException(422, str(exc)) from exc
    asked = readings.upload_overrides(mode=mode, polarity=polarity, threshold=threshold, roi=options.roi)
    first = readings.history_entry(result["analysis"], asked, origin="upload")
    record = await run_in_threadpool(partial(
        store.add, result["analysis"], result["files"], label=label, kind=kind, filename=filename, owner=lab,
        reading=first))
    if parsed_conditions:
        await run_in_threadpool(StudyStore(store.engine).set_conditions, record.id, parsed_conditions, owner=lab)
    return await _specimen_answer(store, record, lab)


#: Substring filter on labels (case-insensitive; % and _ are plain characters).
LabelPart = Annotated[str | None, Query(max_length=200, description="only specimens whose label contains this text, "
                                                                    "ignoring case")]


@router.get("/specimens", response_model=SpecimenPage, summary="List specimens, newest first")
async def list_specimens(
    limit: Annotated[int, Query(ge=1, le=500)] = 50,
    offset: Annotated[int, Query(ge=0, le=2**31 - 1)] = 0,  # bounded: the database's integer
    label: Annotated[str | None, Query(max_length=200, description="only specimens with exactly this label")] = None,
    label_contains: LabelPart = None,
    store: Store = Depends(get_store),
    lab: str | None = Depends(current_lab),
) -> SpecimenPage:
    records, total = await run_in_threadpool(store.list, owner=lab, label=label, label_contains=label_contains,
                                             limit=limit, offset=offset)
    return SpecimenPage(total=total, limit=limit, offset=offset, items=[SpecimenSummary(**summary(r)) for r in records])


# Declared before /specimens/{specimen_id} so that "export.csv" is not taken for an id.
@router.get("/specimens/export.csv", response_class=Response, summary="CSV of every specimen (label filter)")
async def export_all(
    label: Annotated[str | None, Query(max_length=200, description="only specimens with exactly this label")] = None,
    label_contains: LabelPart = None,
    store: Store = Depends(get_store),
    lab: str | None = Depends(current_lab),
) -> Response:
    records, _ = await run_in_threadpool(store.list, owner=lab, label=label, label_contains=label_contains, limit=None)
    return _csv(specimens_csv(records), "ramiform-specimens.csv")


@router.get("/specimens/{specimen_id}", response_model=Specimen, responses=_NOT_FOUND,
            summary="One specimen's analysis")
async def read_specimen(
    specimen_id: str, store: Store = Depends(get_store), lab: str | None = Depends(current_lab)
) -> Specimen:
    return await _specimen_answer(store, await _found(store, specimen_id, lab), lab)


@router.get("/specimens/{specimen_id}/history", response_model=list[HistoryEntry], responses=_NOT_FOUND,
            summary="The readings of one specimen, oldest first")
async def specimen_history(
    specimen_id: str, store: Store = Depends(get_store), lab: str | None = Depends(current_lab)
) -> list[HistoryEntry]:
    history = await run_in_threadpool(store.history, specimen_id, owner=lab)
    if history is None:
        raise HTTPException(404, f"no specimen {specimen_id!r}")
    return [HistoryEntry.model_validate(reading.to_dict()) for reading in history]


@router.post("/specimens/{specimen_id}/reanalyze", response_model=Specimen, responses=_REANALYSIS_ERRORS,
             summary="Measure a stored specimen again with other settings (no re-upload)")
async def reanalyze_specimen(
    specimen_id: str,
    body: Reanalysis,
    settings: Settings = Depends(get_settings),
    store: Store = Depends(get_store),
    pool: AnalysisPool = Depends(get_pool),
    lab: str | None = Depends(current_lab),
) -> Specimen:
    """Segment and measure the stored original again with the overrides given.

    Fields left out keep what the current reading asked for; ``null`` returns a field to the
    automatic choice; ``reading`` takes one of the current analysis's alternatives. The
    specimen keeps its id, label and kind; the new reading is appended to its history and
    its pictures are replaced. Invalid overrides change nothing.
    """
    record = await _found(store, specimen_id, lab)
    history = await run_in_threadpool(store.history, specimen_id, owner=lab) or []
    previous = history[-1].details.get("requested", {}) if history else {}
    analysis = record.analysis
    image = analysis.get("image") or {}
    try:
        requested, taken = readings.resolve(body, previous, analysis)
        readings.check_against_image(requested, int(image.get("width_px") or 0), int(image.get("height_px") or 0))
    except ValueError as exc:
        raise HTTPException(422, str(exc)) from exc
    source = next((name for name in record.files if name.startswith("source.")), None)
    if source is None:
        raise HTTPException(409, "the original image of this specimen is not stored; upload it again")
    data = await run_in_threadpool(store.file_path(record, source).read_bytes)
    calibration = analysis.get("calibration") or {}
    options = AnalysisOptions(
        filename=record.filename,
        pixel_size_mm=calibration.get("pixel_size_mm") if calibration.get("source") == "user" else None,
        page=image.get("page"),
        library_dir=str(settings.library_dir) if settings.library_dir else None,
        max_pixels=settings.max_pixels,
        **readings.options_fields(requested),
    )
    try:
        result = await pool.run_with_library(run_analysis, data, options)
    except ValueError as exc:
        raise HTTPException(422, str(exc)) from exc
    files = {name: content for name, content in result["files"].items() if name != source}
    entry = readings.history_entry(result["analysis"], requested, origin="re-measured", alternative=taken)
    updated = await run_in_threadpool(partial(
        store.replace, specimen_id, result["analysis"], files, keep=(source,), reading=entry, owner=lab,
        first_reading=readings.history_entry(analysis, {}, origin="upload")))
    if updated is None:
        raise HTTPException(404, f"no specimen {specimen_id!r}")
    return await _specimen_answer(store, updated, lab)


@router.delete("/specimens/{specimen_id}", status_code=204, response_class=Response, responses=_NOT_FOUND,
               summary="Delete a specimen")
async def delete_specimen(
    specimen_id: str, store: Store = Depends(get_store), lab: str | None = Depends(current_lab)
) -> Response:
    if not await run_in_threadpool(store.delete, specimen_id, owner=lab):
        raise HTTPException(404, f"no specimen {specimen_id!r}")
    await run_in_threadpool(StudyStore(store.engine).forget_specimen, specimen_id)
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
    specimen_id: str,
    name: Annotated[str, PathParam(description=FILE_NAMES_HELP, examples=["overlay.png"])],
    store: Store = Depends(get_store),
    lab: str | None = Depends(current_lab),
) -> FileResponse:
    record = await _found(store, specimen_id, lab)
    path = store.file_path(record, name)
    # is_file: a reader holding the record of a reading just replaced finds its files gone
    if path is None or not await run_in_threadpool(path.is_file):
        raise HTTPException(404, f"specimen {specimen_id!r} has no file {name!r}")
    media_type = _MEDIA_TYPES.get(name.rsplit(".", 1)[-1], "application/octet-stream")
    headers = {"Cache-Control": "private, max-age=31536000, immutable", "X-Content-Type-Options": "nosniff"}
    if name.startswith("source."):
        headers["Content-Disposition"] = f'attachment; filename="{record.id}-{name}"'
    return FileResponse(path, media_type=media_type, headers=headers)


@router.get("/references", response_model=ReferenceCatalogue,
            summary="The reference set: regimes, parameters, thumbnails")
async def list_references(library: ReferenceLibrary = Depends(get_library),
                          lab: str | None = Depends(current_lab)) -> ReferenceCatalogue:
    references = reference_set_or_error(library)
    return ReferenceCatalogue.model_validate({
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
    })


@router.get("/references/{ensemble_id}/thumbnail.png", response_class=Response,
            summary="Thumbnail of one reference ensemble")
async def reference_thumbnail(ensemble_id: str, library: ReferenceLibrary = Depends(get_library),
                              lab: str | None = Depends(current_lab)) -> Response:
    references = reference_set_or_error(library)
    if ensemble_id not in {e.id for e in references.ensembles}:
        raise HTTPException(404, f"no reference ensemble {ensemble_id!r}")
    return Response(references.thumbnail_bytes(ensemble_id), media_type="image/png",
                    headers={"Cache-Control": "public, max-age=86400"})


@router.get("/health", response_model=Health, summary="Liveness and readiness")
async def health(request: Request, store: Store = Depends(get_store),
                 settings: Settings = Depends(get_settings)) -> Health:
    def ping() -> None:
        with store.engine.connect() as conn:
            conn.execute(text("SELECT 1"))

    try:
        await run_in_threadpool(ping)
    except Exception as exc:
        raise HTTPException(503, f"database unreachable: {type(exc).__name__}") from exc
    return Health(status="ok", version=__version__, workers=settings.worker_count, database=store.engine.dialect.name)
