"""Growth films on the web: ``POST /api/films``, ``GET /api/films[/{id}]``, the film report page
and the demo film. Routes parse, call :func:`service.film.analyze_film` in the analysis pool,
store, and render; nothing else.
"""

from __future__ import annotations

from functools import partial
from pathlib import Path
from typing import Annotated, Any

import numpy as np
from fastapi import APIRouter, Depends, File, Form, HTTPException, Query, Request, UploadFile
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import FileResponse, HTMLResponse, RedirectResponse, Response
from pydantic import BaseModel, ConfigDict, Field

from service.contract import AnalysisModel, WarningItem
from service.film import FilmLimits, FilmOptions
from service.store import FilmRecord, FilmStore, Store, StudyStore, write_durably
from service.study import Condition, conditions_to_dict
from service.web.api import parse_conditions_field
from service.web.deps import current_lab, get_pool, get_settings, get_store
from service.web.jobs import AnalysisPool
from service.web.settings import Settings

router = APIRouter()

DEMO_FILM_LABEL = "DEMO (simulated, not a real film)"
DEMO_FILM_FILENAME = "ramiform-demo-simulated-growth.mp4"
DEMO_FILM_STORY = (
    "Demo data, made up: a time-lapse of a 'copper deposit' growing in a fictional dish named Demo cell 2, "
    "one frame every 2 minutes. It is in fact a diffusion-limited aggregate of 2000 particles (seed 2026) "
    "that Ramiform grew and rendered frame by frame in its order of arrival, so the true growth is known.")
DEMO_FILM_VERSION = 1
_MEDIA = {"png": "image/png", "svg": "image/svg+xml", "mp4": "video/mp4", "avi": "video/x-msvideo",
          "mov": "video/quicktime", "tif": "image/tiff", "jpg": "image/jpeg", "bmp": "image/bmp",
          "bin": "application/octet-stream"}


class FilmBody(BaseModel):
    """The object of ``ramiform film --json`` plus the stored film's identity."""

    model_config = ConfigDict(extra="allow")

    id: str
    report_url: str
    label: str | None = None
    created_at: str
    files: dict[str, str] = Field(description="stored file name -> URL")
    frames: int = Field(description="frames in the film")
    growth: dict[str, Any]
    front_velocity_px_per_s: dict[str, Any]
    time_to_rim_s: dict[str, Any]
    tip_growth_share: dict[str, Any]
    final: AnalysisModel = Field(description="the analysis object of the last frame, as `ramiform analyze --json` gives it")
    warnings: list[WarningItem]
    conditions: dict[str, Any] = Field(default_factory=dict,
                                       description="the film's typed conditions, as a specimen's `conditions`")


# ----------------------------------------------------------------------------- worker


def _source_name(data: bytes) -> str:
    head = data[:16]
    if head[4:8] == b"ftyp":
        return "source.mov" if head[8:10] == b"qt" else "source.mp4"
    if head.startswith(b"RIFF"):
        return "source.avi"
    if head[:4] in (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+"):
        return "source.tif"
    return "source.bin"


def _progress_writer(path: str | None):
    """A progress callback that leaves ``{"stage", "done", "total"}`` in ``path`` (replaced whole,
    at most twice a second), so any instance sharing the data folder can answer the page's poll."""
    if path is None:
        return None
    import json
    import os
    import time

    last = {"at": 0.0}

    def write(stage: str, done: int, total: int) -> None:
        now = time.monotonic()
        if stage == "frames" and done < total and now - last["at"] < 0.5:
            return
        last["at"] = now
        tmp = f"{path}.{os.getpid()}.tmp"
        with open(tmp, "w", encoding="utf-8") as out:
            json.dump({"stage": stage, "done": done, "total": total}, out)
        os.replace(tmp, path)

    return write


def run_film(source: bytes | list[bytes], options: FilmOptions, progress_path: str | None = None) -> dict[str, Any]:
    """Analyse one film in a worker; returns ``{"film": dict, "files": {name: bytes}}``.

    Files: ``arrival.png`` (arrival map with its colour key), ``arrival_frames.npz`` (the map
    as integers, -1 where no deposit), ``growth.svg`` (curves), ``last_frame.png`` and
    ``overlay.png`` (the last frame and its reading), ``thumbnail.png``, and the upload
    (``source.<ext>``, or ``frame_<i>.<ext>`` per frame).
    """
    import io

    from service.film import analyze_film
    from service.web import pictures
    from service.web.film_plots import arrival_png, growth_svg
    from service.match.library import process_library

    library = process_library(options.library_dir)
    not_ranked = library.warm()
    if not_ranked is not None:
        not_ranked = f"not ranked against the reference library: {not_ranked}"
    result = analyze_film(source, options, reference_set=library if not_ranked is None else None,
                          match=not_ranked is None,
                          progress=_progress_writer(progress_path))
    body = result.to_dict()
    if not_ranked is not None:
        body["warnings"].append({"code": "not_ranked", "text": not_ranked})
    final = result.final
    features = final.features
    overlay = pictures.annotated_overlay(final.image.rgb, final.segmentation.mask, features.skeleton_mask,
                                         features.tips_rc, features.junctions_rc)
    arrival_npz = io.BytesIO()
    np.savez_compressed(arrival_npz, arrival_frame=result.arrival, times_s=np.asarray(body["growth"]["times_s"]))
    times_all = [0.0] * body["frames"]
    for k, t in zip(body["growth"]["frame_index"], body["growth"]["times_s"]):
        times_all[k] = t
    files = {
        "arrival.png": arrival_png(result.arrival, times_all),
        "arrival_frames.npz": arrival_npz.getvalue(),
        "growth.svg": growth_svg(body),
        "last_frame.png": pictures.png_bytes(pictures.display_photo(final.image.rgb)),
        "overlay.png": pictures.png_bytes(overlay),
        "thumbnail.png": pictures.png_bytes(pictures.thumbnail(overlay)),
    }
    if isinstance(source, (bytes, bytearray)):
        files[_source_name(bytes(source))] = bytes(source)
    else:
        for i, frame in enumerate(source):
            files[f"frame_{i:04d}.bin"] = bytes(frame)
    return {"film": body, "files": files}


# ----------------------------------------------------------------------------- REST


def file_url(record: FilmRecord, name: str) -> str:
    return f"/api/films/{record.id}/files/{name}"


def film_body(record: FilmRecord, conditions: dict[str, Condition] | None = None) -> dict[str, Any]:
    return {**record.analysis, "id": record.id, "report_url": f"/films/{record.id}", "label": record.label,
            "created_at": record.created_at.isoformat(),
            "files": {name: file_url(record, name) for name in record.files},
            "conditions": conditions_to_dict(conditions or {})}


async def _film_answer(store: Store, record: FilmRecord) -> dict[str, Any]:
    return film_body(record, await run_in_threadpool(StudyStore(store.engine).conditions_of, record.id))


def _times(values: list[str] | None) -> tuple[float, ...] | None:
    if not values:
        return None
    try:
        times = tuple(float(part) for value in values for part in value.replace(";", ",").split(",") if part.strip())
    except ValueError:
        raise HTTPException(422, "frame_times_s must be numbers of seconds, one per frame "
                                 "(repeated fields or one comma-separated list)") from None
    if not all(np.isfinite(times)):
        raise HTTPException(422, "frame_times_s must be finite numbers of seconds")
    return times


def _limits(settings: Settings) -> FilmLimits:
    return FilmLimits(max_pixels_per_frame=min(FilmLimits().max_pixels_per_frame, settings.max_pixels))


def _progress_path(store: Store, token: str | None) -> Path | None:
    if token is None:
        return None
    folder = Path(store.data_dir) / "film-progress"
    folder.mkdir(parents=True, exist_ok=True)
    return folder / f"{token}.json"


async def _analyse_and_store(source, options: FilmOptions, *, label: str | None, lab: str | None, store: Store,
                             pool: AnalysisPool, progress_token: str | None = None) -> FilmRecord:
    progress = _progress_path(store, progress_token)
    try:
        result = await pool.run(run_film, source, options, str(progress) if progress else None)
    except ValueError as exc:
        raise HTTPException(422, str(exc)) from exc
    finally:
        if progress is not None:
            progress.unlink(missing_ok=True)
    films = FilmStore(store)
    return await run_in_threadpool(partial(films.add, result["film"], result["files"], label=label,
                                           filename=options.filename, owner=lab))


@router.post("/api/films", status_code=201, response_model=FilmBody, tags=["films"],
             summary="Upload and analyse a growth film (a video, a TIFF stack, or several frames with their times)",
             responses={413: {"description": "too many frames, pixels or seconds"},
                        415: {"description": "not a video, TIFF stack or image"},
                        422: {"description": "one frame only, frames of different sizes, a damaged or truncated "
                                             "video, no frame times, nothing to measure, conditions that do not "
                                             "parse (nothing is stored)"}})
async def create_film(
    film: Annotated[UploadFile | None, File(description="MP4, MOV or AVI video, or a multi-page TIFF")] = None,
    frames: Annotated[list[UploadFile] | None, File(description="several frame images, in order")] = None,
    frame_times_s: Annotated[list[str] | None, Form(description="each frame's time in s (repeat the field, or "
                                                                 "one comma-separated list)")] = None,
    frame_interval_s: Annotated[float | None, Form(gt=0, description="seconds between frames; replaces the "
                                                                      "times the file carries")] = None,
    rim_radius_mm: Annotated[float | None, Form(gt=0, description="rim electrode radius from the centre, mm")] = None,
    pixel_size_mm: Annotated[float | None, Form(gt=0, description="pixel size, mm")] = None,
    label: Annotated[str | None, Form(max_length=200, description="free text, e.g. the cell and the run")] = None,
    conditions: Annotated[str | None, Form(max_length=20000, description=(
        'typed conditions as for a specimen: a JSON object, e.g. {"voltage": "4 V", "electrolyte": "CuSO4"}, or '
        '"voltage = 4 V; electrolyte = CuSO4"; a unit that does not parse is refused (422) before any work'))] = None,
    progress_token: Annotated[str | None, Form(pattern=r"^[A-Za-z0-9_-]{16,64}$",
                                               description="a random token of the client's; while the film is "
                                                           "analysed, GET /api/films/progress/{token} tells how far")
                              ] = None,
    settings: Settings = Depends(get_settings),
    store: Store = Depends(get_store),
    pool: AnalysisPool = Depends(get_pool),
    lab: str | None = Depends(current_lab),
) -> dict[str, Any]:
    """Analyse the film and store it; answers 201 once its record and pictures are on disk."""
    if label is not None and not label.isprintable():
        raise HTTPException(422, "label must be plain text on one line (no control characters)")
    parsed_conditions = parse_conditions_field(conditions)  # before any work: a bad unit stores nothing
    if (film is None) == (not frames):
        raise HTTPException(422, "send either one 'film' file or several 'frames' (with 'frame_times_s' or "
                                 "'frame_interval_s'), not both and not neither")
    times = _times(frame_times_s)
    if film is not None:
        source: Any = await film.read()
        filename = "".join(c for c in film.filename or "" if c.isprintable())[:255] or None
    else:
        source = [await f.read() for f in frames]
        filename = None
        if times is None and frame_interval_s is None:
            raise HTTPException(422, "frames need their times: 'frame_times_s' (one per frame) or 'frame_interval_s'")
    options = FilmOptions(filename=filename, frame_interval_s=frame_interval_s, frame_times_s=times,
                          rim_radius_mm=rim_radius_mm, pixel_size_mm=pixel_size_mm,
                          library_dir=str(settings.library_dir) if settings.library_dir else None,
                          limits=_limits(settings))
    record = await _analyse_and_store(source, options, label=label, lab=lab, store=store, pool=pool,
                                      progress_token=progress_token)
    if parsed_conditions:
        await run_in_threadpool(StudyStore(store.engine).set_conditions, record.id, parsed_conditions, owner=lab)
    return await _film_answer(store, record)


@router.get("/api/films/progress/{token}", tags=["films"], summary="How far the analysis of an uploaded film is")
async def film_progress(token: str, store: Store = Depends(get_store),
                        lab: str | None = Depends(current_lab)) -> dict[str, Any]:
    import json
    import re

    if not re.fullmatch(r"[A-Za-z0-9_-]{16,64}", token):
        raise HTTPException(422, "a progress token is 16 to 64 letters, digits, '-' or '_'")
    path = Path(store.data_dir) / "film-progress" / f"{token}.json"
    try:
        return json.loads(await run_in_threadpool(path.read_text, encoding="utf-8"))
    except (OSError, ValueError):
        # not started yet (still uploading or queued), or already answered
        return {"stage": "waiting", "done": 0, "total": None}


@router.get("/api/films", tags=["films"], summary="List films, newest first")
async def list_films(limit: Annotated[int, Query(ge=1, le=500)] = 50,
                     offset: Annotated[int, Query(ge=0, le=2**31 - 1)] = 0,
                     store: Store = Depends(get_store), lab: str | None = Depends(current_lab)) -> dict[str, Any]:
    records, total = await run_in_threadpool(partial(FilmStore(store).list, owner=lab, limit=limit, offset=offset))
    return {"total": total, "limit": limit, "offset": offset,
            "items": [{"id": r.id, "label": r.label, "filename": r.filename, "created_at": r.created_at.isoformat(),
                       "report_url": f"/films/{r.id}", "frames": r.analysis.get("frames"),
                       "thumbnail_url": file_url(r, "thumbnail.png")} for r in records]}


async def _found(store: Store, film_id: str, lab: str | None) -> FilmRecord:
    record = await run_in_threadpool(partial(FilmStore(store).get, film_id, owner=lab))
    if record is None:
        raise HTTPException(404, f"no film {film_id!r}")
    return record


@router.get("/api/films/{film_id}", response_model=FilmBody, tags=["films"], summary="One film's analysis",
            responses={404: {"description": "no such film"}})
async def read_film(film_id: str, store: Store = Depends(get_store),
                    lab: str | None = Depends(current_lab)) -> dict[str, Any]:
    return await _film_answer(store, await _found(store, film_id, lab))


@router.delete("/api/films/{film_id}", status_code=204, response_class=Response, tags=["films"],
               summary="Delete a film with its pictures, conditions and study rows",
               responses={404: {"description": "no such film"}})
async def delete_film(film_id: str, store: Store = Depends(get_store),
                      lab: str | None = Depends(current_lab)) -> Response:
    if not await run_in_threadpool(partial(FilmStore(store).delete, film_id, owner=lab)):
        raise HTTPException(404, f"no film {film_id!r}")
    await run_in_threadpool(StudyStore(store.engine).forget_specimen, film_id)
    return Response(status_code=204)


@router.get("/api/films/{film_id}/files/{name}", response_class=FileResponse, tags=["films"],
            summary="A stored picture, plot, arrival map or the uploaded film")
async def film_file(film_id: str, name: str, store: Store = Depends(get_store),
                    lab: str | None = Depends(current_lab)) -> FileResponse:
    record = await _found(store, film_id, lab)
    path = FilmStore(store).file_path(record, name)
    if path is None or not await run_in_threadpool(path.is_file):
        raise HTTPException(404, f"film {film_id!r} has no file {name!r}")
    headers = {"Cache-Control": "private, max-age=31536000, immutable", "X-Content-Type-Options": "nosniff"}
    if not name.endswith((".png", ".svg")):
        headers["Content-Disposition"] = f'attachment; filename="{record.id}-{name}"'
    return FileResponse(path, media_type=_MEDIA.get(name.rsplit(".", 1)[-1], "application/octet-stream"),
                        headers=headers)


# ----------------------------------------------------------------------------- pages


def _templates():
    from service.web.pages import templates

    return templates


@router.get("/films", response_class=HTMLResponse, include_in_schema=False)
async def films_page(request: Request, store: Store = Depends(get_store),
                     lab: str | None = Depends(current_lab)) -> HTMLResponse:
    listing = await list_films(limit=100, offset=0, store=store, lab=lab)
    return _templates().TemplateResponse(request, "films.html", {"items": listing["items"]})


@router.get("/films/{film_id}", response_class=HTMLResponse, include_in_schema=False, name="film_page")
async def film_page(request: Request, film_id: str, store: Store = Depends(get_store),
                    lab: str | None = Depends(current_lab)) -> HTMLResponse:
    record = await _found(store, film_id, lab)
    body = await _film_answer(store, record)
    tip = body.get("tip_growth_share") or {}
    references = sorted((tip.get("references") or {}).items(), key=lambda kv: -kv[1]["value"])
    return _templates().TemplateResponse(request, "film.html", {
        "f": body, "record": record, "files": body["files"], "references": references,
        "demo": record.label == DEMO_FILM_LABEL, "demo_story": DEMO_FILM_STORY, "cautions": ["electrodeposition"]})


def make_demo_film() -> bytes:
    """The demo film: a DLA grown by Ramiform, rendered frame by frame, encoded as MP4."""
    from service.film.synthetic import encode_video, render_film
    from service.simulate import grow

    order = grow("dla", 2000, seed=2026)
    film = render_film(order, 16, seed=12, size_px=480, interval_s=120.0, first_share=0.1, extent=0.8)
    return encode_video(film.frames, fps=1.0)  # one frame a second on screen; times come from the interval


def ensure_demo_film(data_dir: Path) -> bytes:
    path = Path(data_dir) / "demo" / f"demo-film-v{DEMO_FILM_VERSION}.mp4"
    if path.is_file():
        return path.read_bytes()
    data = make_demo_film()
    write_durably(path, data)
    return data


@router.post("/films/demo", include_in_schema=False)
async def demo_film(settings: Settings = Depends(get_settings), store: Store = Depends(get_store),
                    pool: AnalysisPool = Depends(get_pool), lab: str | None = Depends(current_lab)):
    """Open the demo film's report, analysing it the first time."""
    films = FilmStore(store)
    existing, _ = await run_in_threadpool(partial(films.list, owner=lab, label=DEMO_FILM_LABEL, limit=1))
    if existing:
        return RedirectResponse(f"/films/{existing[0].id}", status_code=303)
    data = await pool.run(ensure_demo_film, settings.data_dir)
    # The demo is shown one frame every 2 minutes of the made-up run.
    options = FilmOptions(filename=DEMO_FILM_FILENAME, frame_interval_s=120.0,
                          library_dir=str(settings.library_dir) if settings.library_dir else None)
    record = await _analyse_and_store(data, options, label=DEMO_FILM_LABEL, lab=lab, store=store, pool=pool)
    return RedirectResponse(f"/films/{record.id}", status_code=303)
