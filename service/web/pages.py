"""HTML pages: measure (upload), specimens, report, compare, library, and the API reference."""

from __future__ import annotations

import base64
import math
from pathlib import Path
from typing import Annotated, Any

from fastapi import APIRouter, Depends, HTTPException, Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import HTMLResponse, Response
from fastapi.templating import Jinja2Templates

from service.errors import LibraryError
from service.store import SpecimenRecord, Store
from service.store.export import flatten
from service.web import plots
from service.web.api import file_url, summary
from service.web.deps import current_lab, get_pool, get_settings, get_store
from service.web.demo import DEMO_FILENAME, DEMO_LABEL, DEMO_STORY, ensure_demo_jpeg
from service.web.jobs import AnalysisPool, matcher_distances, matcher_rows
from service.web.references import ensembles_for_matches, reference_set_or_error
from service.web.settings import Settings

TEMPLATES_DIR = Path(__file__).resolve().parents[2] / "templates"
templates = Jinja2Templates(directory=TEMPLATES_DIR)


def _sig(value: Any, digits: int = 5) -> str:
    """A number for tables: integers as they are, floats to ``digits`` significant digits."""
    if value is None:
        return "–"
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return _plain(value)
    if isinstance(value, int) or float(value).is_integer():
        return str(int(value))
    return f"{value:.{digits}g}"


def _plain(value: Any) -> str:
    """Nested settings as readable text: ``key: value; ...`` and lists in brackets."""
    if isinstance(value, dict):
        return "; ".join(f"{k}: {_plain(v)}" for k, v in value.items())
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_plain(v) for v in value) + "]"
    if isinstance(value, float):
        return _sig(value)
    return "–" if value is None else str(value)


def _fixed(value: Any, digits: int = 3) -> str:
    """A headline number: integers as they are, floats with ``digits`` decimals."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return "–"
    return str(value) if isinstance(value, int) else f"{value:.{digits}f}"


templates.env.filters["sig"] = _sig
templates.env.filters["fixed"] = _fixed
templates.env.filters["plain"] = _plain

router = APIRouter(include_in_schema=False)

#: Scalar features left out of comparisons: fit bookkeeping rather than properties of the specimen.
_NOT_COMPARED = ("fit_range", "intercept", "n_fit_points", "ci95", "sizes", "_mm")


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


def _numeric_features(record: SpecimenRecord) -> dict[str, int | float]:
    out = {}
    for key, value in flatten("", record.analysis.get("features", {})):
        if isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value):
            if not any(part in key for part in _NOT_COMPARED):
                out[key] = value
    return out


def _family(match: dict[str, Any] | None) -> str:
    if not match:
        return "–"
    params = ", ".join(f"{k} = {_sig(v, 3)}" for k, v in (match.get("parameters") or {}).items())
    return f"{match.get('regime')} ({params})" if params else str(match.get("regime"))


def deciding_in_words(explanation: dict[str, Any]) -> list[str]:
    """One sentence per deciding feature: the specimen's value against the two best families."""
    best, runner = _family(explanation.get("best")), _family(explanation.get("runner_up"))
    sentences = []
    for row in explanation.get("deciding_features") or []:
        b, r = row.get("best") or {}, row.get("runner_up")
        text = (f"{row.get('description') or row.get('feature')}: this specimen {_sig(row.get('value'), 3)}; "
                f"{best} expects {_sig(b.get('mean'), 3)} ± {_sig(b.get('sd'), 2)} ({b.get('z', 0):+.1f} sd)")
        if r:
            text += f", {runner} expects {_sig(r.get('mean'), 3)} ± {_sig(r.get('sd'), 2)} ({r.get('z', 0):+.1f} sd)"
        if row.get("weight_of_evidence") is not None:
            text += f" - {row['weight_of_evidence']:.1f} nats in favour of the best match"
        sentences.append(text + ".")
    return sentences


# Signed in first (when keys are on): this page uploads, and the library shows keyed thumbnails.
@router.get("/", response_class=HTMLResponse, dependencies=[Depends(current_lab)])
async def upload_page(request: Request, settings: Settings = Depends(get_settings)) -> HTMLResponse:
    return _page(request, "upload.html", max_upload_mb=settings.max_upload_mb,
                 demo_label=DEMO_LABEL, demo_story=DEMO_STORY, demo_filename=DEMO_FILENAME)


@router.get("/demo/specimen.jpg")
async def demo_image(settings: Settings = Depends(get_settings), pool: AnalysisPool = Depends(get_pool)) -> Response:
    data = await pool.run(ensure_demo_jpeg, settings.data_dir)
    return Response(data, media_type="image/jpeg", headers={"Cache-Control": "public, max-age=3600"})


@router.get("/specimens", response_class=HTMLResponse)
async def specimens_page(
    request: Request,
    offset: Annotated[int, Query(ge=0)] = 0,
    label: Annotated[str | None, Query(max_length=200)] = None,
    store: Store = Depends(get_store),
    lab: str | None = Depends(current_lab),
) -> HTMLResponse:
    limit = 50
    records, total = await run_in_threadpool(store.list, owner=lab, label=label or None, limit=limit, offset=offset)
    return _page(request, "specimens.html", items=[summary(r) for r in records], total=total,
                 offset=offset, limit=limit, label=label or "")


@router.get("/specimens/{specimen_id}", response_class=HTMLResponse, name="report_page")
async def report_page(
    request: Request,
    specimen_id: str,
    store: Store = Depends(get_store),
    settings: Settings = Depends(get_settings),
    lab: str | None = Depends(current_lab),
) -> HTMLResponse:
    record = await run_in_threadpool(store.get, specimen_id, owner=lab)
    if record is None:
        raise HTTPException(404, f"no specimen {specimen_id!r}")
    analysis = record.analysis
    matches = analysis.get("matches")
    nearest: list[dict[str, Any]] = []
    if matches:
        try:
            nearest = ensembles_for_matches(reference_set_or_error(settings), matches)
        except LibraryError:
            nearest = []
    files = {name: file_url(record, name) for name in record.files}
    measurements = [(k, v) for k, v in flatten("", analysis.get("features", {})) if v is not None]
    explanation = analysis.get("explanation") if isinstance(analysis.get("explanation"), dict) else {}
    return _page(request, "report.html", record=record, a=analysis, files=files, matches=matches,
                 nearest=nearest, measurements=measurements, cautions=cautions_for(record.kind),
                 explanation=explanation, deciding=deciding_in_words(explanation))


def standardised_distances(
    chosen: list[SpecimenRecord], population: list[SpecimenRecord]
) -> tuple[list[list[float | None]], list[str], int]:
    """RMS difference of the shared scalar features, each in units of its spread.

    The spread of a feature is its standard deviation over ``population`` (the specimens
    stored); features with fewer than three values or no spread are left out. Returns the
    distance matrix, the features used and the population size.
    """
    values = [_numeric_features(r) for r in chosen]
    shared = set.intersection(*(set(v) for v in values)) if values else set()
    pool = [_numeric_features(r) for r in population]
    scales = {}
    for key in sorted(shared):
        column = [p[key] for p in pool if key in p]
        if len(column) >= 3:
            mean = sum(column) / len(column)
            sd = math.sqrt(sum((x - mean) ** 2 for x in column) / (len(column) - 1))
            if sd > 0:
                scales[key] = sd
    matrix: list[list[float | None]] = []
    for a in values:
        row = []
        for b in values:
            if not scales:
                row.append(None)
                continue
            row.append(math.sqrt(sum(((a[k] - b[k]) / s) ** 2 for k, s in scales.items()) / len(scales)))
        matrix.append(row)
    return matrix, sorted(scales), len(population)


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
    context: dict[str, Any] = {"records": records, "plots": {}, "rows": [], "distance": None}
    if len(records) >= 2:
        names = [r.label or r.filename or r.id[:8] for r in records]
        curves = await run_in_threadpool(
            plots.compare_svgs, [(n, r.analysis.get("features", {})) for n, r in zip(names, records)]
        )
        context["plots"] = {k: _svg_data_uri(v) for k, v in curves.items()}
        values = [_numeric_features(r) for r in records]
        keys = list(dict.fromkeys(k for v in values for k in v))
        context["rows"] = [(k, [v.get(k) for v in values]) for k in keys]
        context["distance"] = {"names": names, **await _distances(records, store, lab, pool, settings)}
    return _page(request, "compare.html", **context)


def _matcher_vector(record: SpecimenRecord) -> tuple[tuple, list[float]] | None:
    """(feature names and schema, values) the matcher compared, or None when unranked."""
    rows = matcher_rows(record.analysis)
    if not rows or any(not isinstance(r.get("value"), (int, float)) for r in rows):
        return None
    schema = (record.analysis.get("explanation") or {}).get("references", {}).get("feature_schema")
    return (schema, *(r["feature"] for r in rows)), [float(r["value"]) for r in rows]


async def _distances(records, store: Store, lab, pool: AnalysisPool, settings: Settings) -> dict[str, Any]:
    """Distances in the matcher's feature space when every specimen was ranked, else standardised."""
    vectors = [_matcher_vector(r) for r in records]
    if all(vectors) and len({v[0] for v in vectors}) == 1:
        library_dir = str(settings.library_dir) if settings.library_dir else None
        try:
            matrix = await pool.run(matcher_distances, [v[1] for v in vectors], library_dir)
            return {"kind": "matcher", "matrix": matrix, "features": list(vectors[0][0][1:])}
        except LibraryError:
            pass  # the library is gone or damaged: fall back to the stored specimens' spread
    population, _ = await run_in_threadpool(store.list, owner=lab, limit=2000)
    matrix, used, n_population = standardised_distances(records, population)
    return {"kind": "standardised", "matrix": matrix, "features": used, "population": n_population}


@router.get("/library", response_class=HTMLResponse, dependencies=[Depends(current_lab)])
async def library_page(request: Request, settings: Settings = Depends(get_settings)) -> HTMLResponse:
    try:
        references, error = reference_set_or_error(settings), None
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
    return _page(request, "api_docs.html", schema=schema, operations=operations)
