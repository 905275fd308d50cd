"""HTML pages: measure (upload), specimens, report, compare, library, and the API reference."""

from __future__ import annotations

import base64
from typing import Annotated, Any

from fastapi import APIRouter, Depends, HTTPException, Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import HTMLResponse, Response

from service.errors import LibraryError
from service.match.library import ReferenceLibrary
from service.store import Store
from service.web import compare, formatting, labels, plots, readings, report_view, study_demo
from service.web.api import file_url, summary
from service.web.deps import current_lab, get_library, get_pool, get_settings, get_store
from service.web.demo import DEMO_FILENAME, DEMO_LABEL, DEMO_STORY, ensure_demo_jpeg
from service.web.jobs import AnalysisPool, matcher_distances
from service.web.references import ensembles_for_matches, reference_set_or_error
from service.web.settings import Settings
from service.web.templating import TEMPLATES_DIR, analysis_for_page, templates  # noqa: F401 - names pages offered


router = APIRouter(include_in_schema=False)


def _page(request: Request, name: str, **context: Any) -> HTMLResponse:
    return templates.TemplateResponse(request, name, context)


def cautions_for(kind: str | None) -> list[str]:
    """Which cautions a specimen's page carries: by kind; both when the kind is not known."""
    if kind == "electrodeposit":
        return ["electrodeposition"]
    if kind in ("vessel", "coral", "root"):
        return ["biological"]
    return ["electrodeposition", "biological"]


def _svg_data_uri(svg: bytes) -> str:
    return "data:image/svg+xml;base64," + base64.b64encode(svg).decode("ascii")


# Signed in first (when keys are on): this page uploads, and the library shows keyed thumbnails.
@router.get("/", response_class=HTMLResponse, dependencies=[Depends(current_lab)])
async def upload_page(request: Request, settings: Settings = Depends(get_settings)) -> HTMLResponse:
    return _page(request, "upload.html", max_upload_mb=settings.max_upload_mb,
                 demo_label=DEMO_LABEL, demo_story=DEMO_STORY, demo_filename=DEMO_FILENAME,
                 demo_study_story=study_demo.DEMO_STORY)


@router.get("/demo/specimen.jpg")
async def demo_image(settings: Settings = Depends(get_settings), pool: AnalysisPool = Depends(get_pool)) -> Response:
    data = await pool.run(ensure_demo_jpeg, settings.data_dir)
    return Response(data, media_type="image/jpeg", headers={"Cache-Control": "public, max-age=3600"})


@router.get("/demo/specimen")
async def demo_specimen(store: Store = Depends(get_store), lab: str | None = Depends(current_lab)) -> dict[str, Any]:
    """The demo specimen already measured for this lab (``report_url`` None when there is none yet)."""
    records, _ = await run_in_threadpool(store.list, owner=lab, label=DEMO_LABEL, limit=1)
    return {"report_url": str(f"/specimens/{records[0].id}") if records else None}


@router.get("/specimens", response_class=HTMLResponse)
async def specimens_page(
    request: Request,
    offset: Annotated[int, Query(ge=0, le=2**31 - 1)] = 0,  # bounded: the database's integer
    label: Annotated[str | None, Query(max_length=200)] = None,
    store: Store = Depends(get_store),
    lab: str | None = Depends(current_lab),
) -> HTMLResponse:
    limit = 50
    records, total = await run_in_threadpool(store.list, owner=lab, label_contains=label or None, limit=limit,
                                             offset=offset)
    items = [summary(r) | report_view.list_marks(r.analysis) for r in records]
    return _page(request, "specimens.html", items=items, total=total, offset=offset, limit=limit, label=label or "")


@router.get("/specimens/{specimen_id}", response_class=HTMLResponse, name="report_page")
async def report_page(
    request: Request,
    specimen_id: str,
    store: Store = Depends(get_store),
    library: ReferenceLibrary = Depends(get_library),
    lab: str | None = Depends(current_lab),
) -> HTMLResponse:
    record = await run_in_threadpool(store.get, specimen_id, owner=lab)
    if record is None:
        raise HTTPException(404, f"no specimen {specimen_id!r}")
    analysis = analysis_for_page(record.analysis)
    matches = analysis.get("matches")
    nearest: list[dict[str, Any]] = []
    if matches:
        try:
            nearest = ensembles_for_matches(reference_set_or_error(library), matches)
        except LibraryError:
            nearest = []
    files = {name: file_url(record, name) for name in record.files}
    explanation = analysis.get("explanation") if isinstance(analysis.get("explanation"), dict) else {}
    history = await run_in_threadpool(store.history, specimen_id, owner=lab) or []
    segmentation = analysis.get("segmentation") or {}
    others, _ = await run_in_threadpool(store.list, owner=lab, limit=100)
    view = report_view.build_report(analysis, record.kind)
    pictures = await run_in_threadpool(plots.report_plots_or_files, analysis, files)
    return _page(request, "report.html", record=record, a=analysis, files=files, matches=matches,
                 nearest=[n | {"name": labels.family_label(n, short=True)} for n in nearest],
                 cautions=cautions_for(record.kind), explanation=explanation, view=view, **pictures,
                 others=[{"id": o.id, "name": o.label or o.filename or o.id[:8]} for o in others if o.id != record.id],
                 confidence=segmentation.get("confidence"), uncertain=formatting.uncertain(segmentation),
                 alternatives=readings.alternatives_of(analysis),
                 history=[formatting.reading_in_words(r.to_dict()) for r in reversed(history)],
                 reading=reading_state(record, files, history))


def reading_state(record, files: dict[str, str], history) -> dict[str, Any]:
    """What the report's reading editor starts from (read by report.js from a JSON block)."""
    analysis = record.analysis
    image = analysis.get("image") or {}
    segmentation = analysis.get("segmentation") or {}
    width, height = int(image.get("width_px") or 0), int(image.get("height_px") or 0)
    return {
        "id": record.id,
        "width_px": width,
        "height_px": height,
        "photo_url": files.get("photo.png"),
        "levels_url": files.get("levels.png"),
        "used": {key: segmentation.get(key) for key in ("mode", "polarity", "threshold", "levels_compare")},
        "field": formatting.field_ellipse(segmentation.get("field_of_view"), width, height),
        "requested": (history[-1].details.get("requested") if history else None) or {},
    }


@router.get("/compare", response_class=HTMLResponse)
async def compare_page(
    request: Request,
    ids: Annotated[list[str], Query(max_length=12)] = [],  # noqa: B006 - FastAPI reads the default
    store: Store = Depends(get_store),
    pool: AnalysisPool = Depends(get_pool),
    settings: Settings = Depends(get_settings),
    lab: str | None = Depends(current_lab),
) -> HTMLResponse:
    records = await run_in_threadpool(store.get_many, ids, owner=lab) if ids else []
    context: dict[str, Any] = {"records": records, "plots": {}, "rows": [], "distance": None,
                               "thumbnails": {r.id: file_url(r, "thumbnail.png") for r in records}}
    if len(records) >= 2:
        names = [r.label or r.filename or r.id[:8] for r in records]
        curves = await run_in_threadpool(
            plots.compare_svgs, [(n, r.analysis.get("features", {})) for n, r in zip(names, records)]
        )
        context["plots"] = {k: _svg_data_uri(v) for k, v in curves.items()}
        context["rows"] = compare.side_by_side(records)
        context["distance"] = {"names": names, **await _distances(records, store, lab, pool, settings)}
        context["distance"]["feature_labels"] = [labels.matcher_feature_label(f) for f in context["distance"]["features"]]
        if context["distance"]["features"]:
            context["distance_plot"] = _svg_data_uri(await run_in_threadpool(
                plots.distance_matrix_svg, names, context["distance"]["matrix"], title="distance"))
    else:
        stored, _ = await run_in_threadpool(store.list, owner=lab, limit=100)
        chosen = {r.id for r in records}
        context["choices"] = [{"id": r.id, "name": r.label or r.filename or r.id[:8]} for r in stored if r.id not in chosen]
    return _page(request, "compare.html", **context)


async def _distances(records, store: Store, lab, pool: AnalysisPool, settings: Settings) -> dict[str, Any]:
    """In the matcher's feature space when every specimen was ranked alike, else standardised."""
    shared = compare.shared_matcher_vectors(records)
    if shared is not None:
        library_dir = str(settings.library_dir) if settings.library_dir else None
        try:
            matrix = await pool.run_with_library(matcher_distances, shared[1], library_dir)
            return {"kind": "matcher", "matrix": matrix, "features": shared[0]}
        except LibraryError:
            pass  # the library is gone or damaged: fall back to the stored specimens' spread
    population, _ = await run_in_threadpool(store.list, owner=lab, limit=2000)
    matrix, used, n_population = compare.standardised_distances(records, population)
    return {"kind": "standardised", "matrix": matrix, "features": used, "population": n_population}


@router.get("/library", response_class=HTMLResponse, dependencies=[Depends(current_lab)])
async def library_page(request: Request, library: ReferenceLibrary = Depends(get_library)) -> HTMLResponse:
    try:
        references, error = reference_set_or_error(library), None
    except LibraryError as exc:
        references, error = None, str(exc)
    return _page(request, "library.html", references=references, error=error)


@router.get("/docs", response_class=HTMLResponse)
async def api_docs(request: Request) -> HTMLResponse:
    """A plain reference of the REST API, drawn from the OpenAPI schema (no outside scripts)."""
    schema = request.app.openapi()
    components = schema.get("components", {}).get("schemas", {})

    def body_fields(op: dict[str, Any]) -> list[tuple[str, bool, str]]:
        for content in op.get("requestBody", {}).get("content", {}).values():
            body = content.get("schema", {})
            body = components.get(body.get("$ref", "").rsplit("/", 1)[-1], body)
            required = set(body.get("required", []))
            return [(name, name in required, prop.get("description", ""))
                    for name, prop in body.get("properties", {}).items()]
        return []

    operations = [
        (method.upper(), path, op, body_fields(op))
        for path, item in schema.get("paths", {}).items()
        for method, op in item.items()
        if method in ("get", "post", "put", "patch", "delete")
    ]
    return _page(request, "api_docs.html", schema=schema, operations=operations, stored_files=labels.STORED_FILES)
