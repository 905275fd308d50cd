"""Studies on the web: REST routes under ``/api/studies``, the study pages, the demo study.

Routes only parse, call :mod:`service.study` (plain functions) and :class:`StudyStore`,
and render; the plots come from :mod:`service.web.study_plots`.
"""

from __future__ import annotations

import asyncio
from dataclasses import replace
from functools import partial
from typing import Annotated, Any
from urllib.parse import urlencode

from fastapi import APIRouter, Depends, Form, HTTPException, Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from pydantic import BaseModel, Field, field_validator

from service.errors import RamiformError
from service.store import FilmRecord, FilmStore, SpecimenRecord, Store, StudyRecord, StudyStore
from service.study import (
    KNOWN_UNITS,
    Condition,
    ConditionError,
    Member,
    Row,
    condition_names,
    conditions_to_dict,
    diagram,
    parse_conditions,
    parse_conditions_text,
    quantities,
    regime_series,
    series,
    study_csv,
    study_rows,
)
from service.web import films as film_routes
from service.web import readings, study_demo, study_plots
from service.web.api import ErrorBody, file_url, report_url
from service.web.deps import current_lab, get_pool, get_settings, get_store
from service.web.jobs import AnalysisOptions, AnalysisPool, run_analysis
from service.web.settings import Settings

router = APIRouter()

_NOT_FOUND: dict[int | str, dict[str, Any]] = {404: {"model": ErrorBody, "description": "no such study"}}
_ATTACH_ERRORS: dict[int | str, dict[str, Any]] = {
    404: {"model": ErrorBody, "description": "no such study, or a specimen named is unknown; nothing changed"},
    409: {"model": ErrorBody, "description": "another request changed the study meanwhile; nothing changed"},
    422: {"model": ErrorBody, "description": "a condition does not parse (e.g. an unknown unit), or clashes with "
                                             "the same name elsewhere in the study; nothing changed"},
}

#: Words for the quantities on axes and in selects; others show their key.
QUANTITY_WORDS = {
    "box_dimension": "box dimension",
    "mass_radius_dimension": "mass-radius dimension",
    "sandbox_dimension": "sandbox dimension",
    "skeleton.tips": "tips",
    "skeleton.junctions": "junctions",
    "skeleton.branches": "branches",
    "branch_width_px": "branch width (px)",
    "film.front_velocity_px_per_s": "front velocity of a film (px/s)",
    "film.tip_growth_share": "tip growth share of a film",
}


def quantity_words(key: str) -> str:
    if key in QUANTITY_WORDS:
        return QUANTITY_WORDS[key]
    if key.startswith("estimate."):
        _, regime, name = key.split(".", 2)
        return f"{name} of {regime} (estimate)"
    return key.replace("_", " ")


def get_studies(request: Request) -> StudyStore:
    return StudyStore(request.app.state.store.engine)


class StudyIn(BaseModel):
    name: str = Field(min_length=1, max_length=200, description="e.g. 'copper sulfate, voltage series'")
    description: str = Field("", max_length=4000, description="free text: the cell, the electrolyte, the aim")

    @field_validator("name")
    @classmethod
    def _plain_name(cls, value: str) -> str:
        value = " ".join(value.split())
        if not value or not value.isprintable():
            raise ValueError("the name must be plain text on one line")
        return value

    @field_validator("description")
    @classmethod
    def _plain_description(cls, value: str) -> str:
        if "\x00" in value:
            raise ValueError("the description must be plain text")
        return value


def _plain_id(value: str) -> str:
    if not value.isprintable():
        raise ValueError("a specimen id is printable text")
    return value


class SpecimenEntry(BaseModel):
    id: str = Field(min_length=1, max_length=64, description="a stored specimen's or growth film's id")

    @field_validator("id")
    @classmethod
    def _printable(cls, value: str) -> str:
        return _plain_id(value)
    conditions: dict[str, Any] | None = Field(
        None, description='typed conditions, e.g. {"voltage": "4 V", "concentration": {"value": 50, "unit": "mM"}, '
                          f'"electrolyte": "copper sulfate"}}; units: {", ".join(KNOWN_UNITS)}')


class Attach(BaseModel):
    specimens: list[SpecimenEntry | Annotated[str, Field(min_length=1, max_length=64)]] = Field(
        min_length=1, max_length=500, description="specimen (or film) ids, or objects with an id and conditions")

    @field_validator("specimens")
    @classmethod
    def _printable_ids(cls, value: list) -> list:
        for item in value:
            _plain_id(item if isinstance(item, str) else item.id)
        return value


class ConditionsIn(BaseModel):
    conditions: dict[str, Any] = Field(description='e.g. {"voltage": "4 V", "electrolyte": "copper sulfate"}')
    replace: bool = Field(False, description="drop the conditions not named (default: merge)")


def _study_urls(study_id: str) -> dict[str, str]:
    return {"page_url": f"/studies/{study_id}", "url": f"/api/studies/{study_id}",
            "export_url": f"/api/studies/{study_id}/export.csv"}


def study_summary(study: StudyRecord) -> dict[str, Any]:
    return {**study.to_dict(), **_study_urls(study.id)}


async def _study(studies: StudyStore, study_id: str, lab: str | None) -> StudyRecord:
    study = await run_in_threadpool(studies.get, study_id, owner=lab)
    if study is None:
        raise HTTPException(404, f"no study {study_id!r}")
    return study


Record = SpecimenRecord | FilmRecord


def member_of(record: Record, conditions: dict[str, Condition]) -> Member:
    """A stored specimen, or a film (its last frame's analysis and growth figures), as a study member."""
    if isinstance(record, FilmRecord):
        return Member.of_film(record.id, record.label, record.filename, record.analysis, conditions)
    return Member(record.id, record.label, record.filename, record.analysis, conditions)


async def _rows(studies: StudyStore, study_id: str, lab: str | None) -> tuple[list[Row], list[Record]]:
    members = await run_in_threadpool(studies.members, study_id, owner=lab)
    if members is None:
        raise HTTPException(404, f"no study {study_id!r}")
    records = [record for record, _ in members]
    rows = study_rows(member_of(r, conditions) for r, conditions in members)
    return rows, records


def plot_choices(rows: list[Row], *, quantity: str | None = None, condition: str | None = None,
                 x: str | None = None, y: str | None = None) -> dict[str, Any]:
    """The plots' defaults: box dimension against the first number condition, and the diagram over
    the first two conditions (numbers first). A choice the study lacks falls back to the default."""
    kinds = condition_names(rows)
    ordered = [n for n, q in kinds.items() if q != "text"] + [n for n, q in kinds.items() if q == "text"]
    measured = quantities(rows)
    chosen = {
        "quantity": quantity if quantity in measured else (measured[0] if measured else None),
        "condition": condition if condition in kinds else (ordered[0] if ordered else None),
        "x": x if x in kinds else (ordered[0] if ordered else None),
        "y": y if y in kinds and y != (x if x in kinds else None) else None,
    }
    if chosen["y"] is None:
        chosen["y"] = next((n for n in ordered if n != chosen["x"]), None)
    return chosen


def plot_urls(study_id: str, chosen: dict[str, Any]) -> dict[str, str | None]:
    base = f"/api/studies/{study_id}/plots"
    return {
        "quantity": (f"{base}/quantity.svg?" + urlencode({"quantity": chosen["quantity"], "condition": chosen["condition"]})
                     if chosen["quantity"] and chosen["condition"] else None),
        "regimes": f"{base}/regimes.svg?" + urlencode({"condition": chosen["condition"]}) if chosen["condition"] else None,
        "diagram": f"{base}/diagram.svg?" + urlencode({"x": chosen["x"], "y": chosen["y"]})
                   if chosen["x"] and chosen["y"] else None,
    }


def table_entry(row: Row, record: Record) -> dict[str, Any]:
    body = row.to_dict()
    if isinstance(record, FilmRecord):
        analysis = record.analysis.get("final") if isinstance(record.analysis, dict) else None
        body.update(report_url=f"/films/{record.id}", thumbnail_url=film_routes.file_url(record, "thumbnail.png"))
        for key, name in (("front_velocity_px_per_s", "film.front_velocity_px_per_s"),
                          ("tip_growth_share", "film.tip_growth_share")):
            m = row.measurements.get(name)
            body[key] = None if m is None else {"value": m.value, "ci95": list(m.ci95) if m.ci95 else None}
    else:
        analysis = record.analysis
        body.update(report_url=report_url(record), thumbnail_url=file_url(record, "thumbnail.png"))
    body.update(label=record.label, filename=record.filename)
    box = row.measurements.get("box_dimension")
    body["box_dimension"] = None if box is None else {"value": box.value, "ci95": list(box.ci95) if box.ci95 else None}
    estimates = (analysis.get("parameter_estimates") or {}) if isinstance(analysis, dict) else {}
    body["parameter_estimates"] = {
        regime: {name: {"value": e.get("value"), "ci95": e.get("ci95")} for name, e in params.items()
                 if isinstance(e, dict)}
        for regime, params in estimates.items() if isinstance(params, dict)}
    return body


def study_body(study: StudyRecord, rows: list[Row], records: list[Record], **choices: str | None
               ) -> dict[str, Any]:
    chosen = plot_choices(rows, **choices)
    return {
        **study_summary(study),
        "n_specimens": len(rows),
        "conditions": condition_names(rows),
        "quantities": quantities(rows),
        "table": [table_entry(row, record) for row, record in zip(rows, records)],
        "plots": plot_urls(study.id, chosen),
        "plot_choices": chosen,
    }


# --------------------------------------------------------------------------------- REST ---
@router.post("/api/studies", status_code=201, summary="Create a study (a named group of specimens)")
async def create_study(body: StudyIn, studies: StudyStore = Depends(get_studies),
                       lab: str | None = Depends(current_lab)) -> dict[str, Any]:
    study = await run_in_threadpool(studies.create, body.name, body.description, owner=lab)
    return study_summary(study)


@router.get("/api/studies", summary="List studies, newest first")
async def list_studies(studies: StudyStore = Depends(get_studies),
                       lab: str | None = Depends(current_lab)) -> dict[str, Any]:
    return {"items": [study_summary(s) for s in await run_in_threadpool(studies.list, owner=lab)]}


@router.get("/api/studies/{study_id}", responses=_NOT_FOUND,
            summary="A study: its table (conditions and key measurements per specimen) and plot URLs")
async def read_study(study_id: str, studies: StudyStore = Depends(get_studies),
                     lab: str | None = Depends(current_lab)) -> dict[str, Any]:
    study = await _study(studies, study_id, lab)
    rows, records = await _rows(studies, study_id, lab)
    return study_body(study, rows, records)


@router.delete("/api/studies/{study_id}", status_code=204, response_class=Response, responses=_NOT_FOUND,
               summary="Delete a study (its specimens stay)")
async def delete_study(study_id: str, studies: StudyStore = Depends(get_studies),
                       lab: str | None = Depends(current_lab)) -> Response:
    if not await run_in_threadpool(studies.delete, study_id, owner=lab):
        raise HTTPException(404, f"no study {study_id!r}")
    return Response(status_code=204)


@router.post("/api/studies/{study_id}/specimens", responses=_ATTACH_ERRORS,
             summary="Attach stored specimens or growth films (by id), each optionally with its conditions")
async def attach_specimens(study_id: str, body: Attach, studies: StudyStore = Depends(get_studies),
                           lab: str | None = Depends(current_lab)) -> dict[str, Any]:
    """All or nothing: every condition is parsed and every id checked before anything is written."""
    entries: list[tuple[str, dict[str, Condition] | None]] = []
    for item in body.specimens:
        entry = SpecimenEntry(id=item) if isinstance(item, str) else item
        try:
            parsed = parse_conditions(entry.conditions)
        except ConditionError as exc:
            raise ConditionError(f"specimen {entry.id!r}: {exc}; nothing was attached") from None
        entries.append((entry.id, parsed))
    if not await run_in_threadpool(studies.attach, study_id, entries, owner=lab):
        raise HTTPException(404, f"no study {study_id!r}")
    return await read_study(study_id, studies, lab)


@router.delete("/api/studies/{study_id}/specimens/{specimen_id}", status_code=204, response_class=Response,
               responses=_NOT_FOUND, summary="Take a specimen out of a study (the specimen stays)")
async def detach_specimen(study_id: str, specimen_id: str, studies: StudyStore = Depends(get_studies),
                          lab: str | None = Depends(current_lab)) -> Response:
    await _study(studies, study_id, lab)
    if not await run_in_threadpool(studies.detach, study_id, specimen_id, owner=lab):
        raise HTTPException(404, f"specimen {specimen_id!r} is not in study {study_id!r}")
    return Response(status_code=204)


@router.get("/api/studies/{study_id}/export.csv", response_class=Response, responses=_NOT_FOUND,
            summary="CSV of the study table: conditions, top regime, every measurement with its interval")
async def export_study(study_id: str, studies: StudyStore = Depends(get_studies),
                       lab: str | None = Depends(current_lab)) -> Response:
    await _study(studies, study_id, lab)
    rows, _ = await _rows(studies, study_id, lab)
    return Response(study_csv(rows), media_type="text/csv; charset=utf-8",
                    headers={"Content-Disposition": f'attachment; filename="ramiform-study-{study_id}.csv"'})


def _svg(svg: bytes) -> Response:
    return Response(svg, media_type="image/svg+xml", headers={"Cache-Control": "no-store"})


@router.get("/api/studies/{study_id}/plots/quantity.svg", response_class=Response, responses=_NOT_FOUND,
            summary="A measured quantity against a condition, with 95% intervals")
async def quantity_plot(study_id: str, quantity: Annotated[str, Query(max_length=120)],
                        condition: Annotated[str, Query(max_length=64)],
                        studies: StudyStore = Depends(get_studies), lab: str | None = Depends(current_lab)) -> Response:
    rows, _ = await _rows(studies, study_id, lab)
    data = series(rows, quantity, condition)
    return _svg(await run_in_threadpool(study_plots.quantity_svg, data, quantity_words(quantity)))


@router.get("/api/studies/{study_id}/plots/regimes.svg", response_class=Response, responses=_NOT_FOUND,
            summary="Each regime's probability against a condition")
async def regimes_plot(study_id: str, condition: Annotated[str, Query(max_length=64)],
                       studies: StudyStore = Depends(get_studies), lab: str | None = Depends(current_lab)) -> Response:
    rows, _ = await _rows(studies, study_id, lab)
    axis, curves = regime_series(rows, condition)
    return _svg(await run_in_threadpool(study_plots.regimes_svg, axis, curves))


@router.get("/api/studies/{study_id}/plots/diagram.svg", response_class=Response, responses=_NOT_FOUND,
            summary="Morphology diagram over two conditions (marker by top regime, hollow when uncertain)")
async def diagram_plot(study_id: str, x: Annotated[str, Query(max_length=64)], y: Annotated[str, Query(max_length=64)],
                       studies: StudyStore = Depends(get_studies), lab: str | None = Depends(current_lab)) -> Response:
    rows, _ = await _rows(studies, study_id, lab)
    x_axis, y_axis, points = diagram(rows, x, y)
    return _svg(await run_in_threadpool(study_plots.diagram_svg, x_axis, y_axis, points))


@router.get("/api/specimens/{specimen_id}/conditions", summary="A specimen's conditions")
async def read_conditions(specimen_id: str, store: Store = Depends(get_store),
                          studies: StudyStore = Depends(get_studies),
                          lab: str | None = Depends(current_lab)) -> dict[str, Any]:
    if await run_in_threadpool(store.get, specimen_id, owner=lab) is None:
        raise HTTPException(404, f"no specimen {specimen_id!r}")
    return conditions_to_dict(await run_in_threadpool(studies.conditions_of, specimen_id))


@router.put("/api/specimens/{specimen_id}/conditions", responses=_ATTACH_ERRORS,
            summary="Set a specimen's conditions (merged, or replaced with replace=true)")
async def put_conditions(specimen_id: str, body: ConditionsIn, store: Store = Depends(get_store),
                         studies: StudyStore = Depends(get_studies),
                         lab: str | None = Depends(current_lab)) -> dict[str, Any]:
    parsed = parse_conditions(body.conditions)
    if await run_in_threadpool(store.get, specimen_id, owner=lab) is None:  # a film's are under /api/films
        raise HTTPException(404, f"no specimen {specimen_id!r}")
    merged = await run_in_threadpool(lambda: studies.set_conditions(specimen_id, parsed, owner=lab,
                                                                   replace=body.replace))
    if merged is None:
        raise HTTPException(404, f"no specimen {specimen_id!r}")
    return conditions_to_dict(merged)


@router.get("/api/films/{film_id}/conditions", tags=["films"], summary="A growth film's conditions")
async def read_film_conditions(film_id: str, store: Store = Depends(get_store),
                               studies: StudyStore = Depends(get_studies),
                               lab: str | None = Depends(current_lab)) -> dict[str, Any]:
    if await run_in_threadpool(FilmStore(store).get, film_id, owner=lab) is None:
        raise HTTPException(404, f"no film {film_id!r}")
    return conditions_to_dict(await run_in_threadpool(studies.conditions_of, film_id))


@router.put("/api/films/{film_id}/conditions", tags=["films"], responses=_ATTACH_ERRORS,
            summary="Set a growth film's conditions (merged, or replaced with replace=true)")
async def put_film_conditions(film_id: str, body: ConditionsIn, store: Store = Depends(get_store),
                              studies: StudyStore = Depends(get_studies),
                              lab: str | None = Depends(current_lab)) -> dict[str, Any]:
    parsed = parse_conditions(body.conditions)
    if await run_in_threadpool(FilmStore(store).get, film_id, owner=lab) is None:
        raise HTTPException(404, f"no film {film_id!r}")
    merged = await run_in_threadpool(lambda: studies.set_conditions(film_id, parsed, owner=lab, replace=body.replace))
    if merged is None:
        raise HTTPException(404, f"no film {film_id!r}")
    return conditions_to_dict(merged)


# -------------------------------------------------------------------------------- pages ---
def _templates():
    from service.web.pages import templates  # the pages' Jinja environment and filters

    return templates


@router.get("/studies", response_class=HTMLResponse, include_in_schema=False)
async def studies_page(request: Request, studies: StudyStore = Depends(get_studies),
                       lab: str | None = Depends(current_lab)) -> HTMLResponse:
    items = [study_summary(s) for s in await run_in_threadpool(studies.list, owner=lab)]
    return _templates().TemplateResponse(request, "study.html", {"study": None, "items": items,
                                                                 "demo_story": study_demo.DEMO_STORY})


@router.post("/studies", include_in_schema=False)
async def create_study_form(name: Annotated[str, Form(min_length=1, max_length=200)],
                            description: Annotated[str, Form(max_length=4000)] = "",
                            studies: StudyStore = Depends(get_studies),
                            lab: str | None = Depends(current_lab)) -> RedirectResponse:
    body = StudyIn(name=name, description=description)
    study = await run_in_threadpool(studies.create, body.name, body.description, owner=lab)
    return RedirectResponse(f"/studies/{study.id}", status_code=303)


async def _study_page(request: Request, study_id: str, studies: StudyStore, store: Store, lab: str | None, *,
                      error: str | None = None, status_code: int = 200, **choices: str | None) -> HTMLResponse:
    study = await _study(studies, study_id, lab)
    rows, records = await _rows(studies, study_id, lab)
    body = study_body(study, rows, records, **choices)
    members = {record.id for record in records}
    recent, _ = await run_in_threadpool(store.list, owner=lab, limit=200)
    films, _ = await run_in_threadpool(partial(FilmStore(store).list, owner=lab, limit=100))
    candidates = [(r.id, r.label or r.filename or r.id[:8], r.created_at.isoformat()[:16].replace("T", " "))
                  for r in recent if r.id not in members]
    candidates += [(r.id, f"growth film: {r.label or r.filename or r.id[:8]}",
                    r.created_at.isoformat()[:16].replace("T", " ")) for r in films if r.id not in members]
    return _templates().TemplateResponse(request, "study.html", {
        "study": body, "items": [], "conditions": list(body["conditions"]),
        "quantities": [(key, quantity_words(key)) for key in body["quantities"]],
        "is_demo": study.name == study_demo.DEMO_STUDY_NAME, "demo_story": study_demo.DEMO_STORY,
        "cautions": ["electrodeposition", "biological"], "candidates": candidates, "error": error,
    }, status_code=status_code)


@router.get("/studies/{study_id}", response_class=HTMLResponse, include_in_schema=False)
async def study_page(request: Request, study_id: str,
                     quantity: Annotated[str | None, Query(max_length=120)] = None,
                     condition: Annotated[str | None, Query(max_length=64)] = None,
                     x: Annotated[str | None, Query(max_length=64)] = None,
                     y: Annotated[str | None, Query(max_length=64)] = None,
                     studies: StudyStore = Depends(get_studies), store: Store = Depends(get_store),
                     lab: str | None = Depends(current_lab)) -> HTMLResponse:
    return await _study_page(request, study_id, studies, store, lab, quantity=quantity, condition=condition, x=x, y=y)


@router.post("/studies/{study_id}/specimens", include_in_schema=False, response_model=None)
async def attach_form(request: Request, study_id: str,
                      specimen: Annotated[str, Form(min_length=1, max_length=300)],
                      conditions: Annotated[str, Form(max_length=2000)] = "",
                      studies: StudyStore = Depends(get_studies), store: Store = Depends(get_store),
                      lab: str | None = Depends(current_lab)) -> Response:
    """The study page's form: one specimen (its id, or its report address) with conditions as
    ``name = value; ...``. A refusal shows the page again with the reason; nothing changes."""
    await _study(studies, study_id, lab)
    specimen_id = specimen.strip().rstrip("/").rsplit("/", 1)[-1]
    try:
        _plain_id(specimen_id)
        parsed = parse_conditions_text(conditions)
        if not await run_in_threadpool(studies.attach, study_id, [(specimen_id, parsed)], owner=lab):
            raise HTTPException(404, f"no study {study_id!r}")
    except (RamiformError, ValueError) as exc:
        status = getattr(exc, "status_code", 422)
        return await _study_page(request, study_id, studies, store, lab, error=str(exc), status_code=status)
    return RedirectResponse(f"/studies/{study_id}", status_code=303)


@router.post("/demo/study", include_in_schema=False)
async def demo_study(request: Request, settings: Settings = Depends(get_settings), store: Store = Depends(get_store),
                     studies: StudyStore = Depends(get_studies), pool: AnalysisPool = Depends(get_pool),
                     lab: str | None = Depends(current_lab)) -> RedirectResponse:
    """Open the demo study, making it on the first click (later clicks reuse it)."""
    # one demo in the making per app: a second click waits for the first and is sent to its study
    if getattr(request.app.state, "demo_study_lock", None) is None:
        request.app.state.demo_study_lock = asyncio.Lock()
    async with request.app.state.demo_study_lock:
        existing = await run_in_threadpool(studies.list, owner=lab, name=study_demo.DEMO_STUDY_NAME)
        usable = [s for s in existing if s.n_specimens == len(study_demo.DEMO_MEMBERS)]
        if usable:
            return RedirectResponse(f"/studies/{usable[0].id}", status_code=303)
        options = AnalysisOptions(library_dir=str(settings.library_dir) if settings.library_dir else None,
                                  max_pixels=settings.max_pixels)
        renders = await asyncio.gather(*(pool.run(study_demo.ensure_member_png, settings.data_dir, i)
                                         for i in range(len(study_demo.DEMO_MEMBERS))))
        results = await asyncio.gather(*(pool.run(run_analysis, data, replace(options, filename=study_demo.member_filename(i)))
                                         for i, data in enumerate(renders)))
        entries = []
        for i, result in enumerate(results):
            record = await run_in_threadpool(
                lambda i=i, result=result: store.add(result["analysis"], result["files"], label=study_demo.member_label(i),
                                                     kind="electrodeposit", filename=study_demo.member_filename(i),
                                                     owner=lab, reading=readings.history_entry(
                                                         result["analysis"], {}, origin="upload")))
            entries.append((record.id, parse_conditions(study_demo.DEMO_MEMBERS[i].conditions())))
        study = await run_in_threadpool(studies.create, study_demo.DEMO_STUDY_NAME, study_demo.DEMO_STORY, owner=lab)
        await run_in_threadpool(studies.attach, study.id, entries, owner=lab)
        return RedirectResponse(f"/studies/{study.id}", status_code=303)
