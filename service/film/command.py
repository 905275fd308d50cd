"""``ramiform film``: analyse one growth film and print one JSON object (progress on stderr)."""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path
from typing import Any, TextIO

from service.errors import RamiformError

_IMAGE_SUFFIXES = {".png", ".jpg", ".jpeg", ".bmp"}


def _progress(err: TextIO):
    started = time.monotonic()
    last = {"shown": -1.0}

    def show(stage: str, done: int, total: int) -> None:
        now = time.monotonic()
        if stage == "frames" and done < total and now - last["shown"] < 1.0:
            return
        last["shown"] = now
        if stage == "frames":
            err.write(f"frame {done}/{total} read ({now - started:.1f} s)\n")
        else:
            err.write(f"{stage} ({now - started:.1f} s)\n")
        err.flush()

    return show


def summary_lines(body: dict[str, Any]) -> list[str]:
    """The film's key figures in words, for the terminal."""
    growth = body["growth"]
    velocity = body["front_velocity_px_per_s"]
    rim = body["time_to_rim_s"]
    tip = body["tip_growth_share"]
    lines = [f"frames: {body['frames']} ({body['frames_used']} used), span {body['duration_s']:g} s",
             f"area: {growth['area_px'][0]} px -> {growth['area_px'][-1]} px; largest radius "
             f"{growth['max_radius_px'][0]:.1f} -> {growth['max_radius_px'][-1]:.1f} px"]
    if velocity.get("value") is not None:
        lo, hi = velocity["ci95"]
        lines.append(f"front velocity: {velocity['value']:.4g} px/s (95% interval {lo:.4g} to {hi:.4g})")
    if rim.get("value") is not None:
        lo, hi = rim["ci95"]
        lines.append(f"front reaches the rim at t = {rim['value']:.4g} s (95% interval {lo:.4g} to {hi:.4g} s)")
    else:
        lines.append(f"time to rim: unknown ({rim.get('reason')})")
    if tip.get("value") is not None:
        near = tip.get("nearest_family")
        lines.append(f"tip growth share: {tip['value']:.2f}" + (f" (nearest reference family: {near})" if near else ""))
    final = body.get("final") or {}
    matches = final.get("matches") or []
    if matches:
        lines.append(f"last frame ranks nearest: {matches[0]['regime']} (p = {matches[0]['probability']:.2f})")
    if body.get("conditions"):
        lines.append("conditions: " + "; ".join(
            f"{name} = {c['value']}" + (f" {c['unit']}" if c.get("unit") else "")
            for name, c in body["conditions"].items()))
    lines.extend(f"warning: {w}" for w in body.get("warnings", []))
    return lines


def run_film_command(args, *, out: TextIO | None = None, err: TextIO | None = None) -> int:
    """Entry point of ``ramiform film``; exit status 1 when the film cannot be analysed."""
    out, err = out or sys.stdout, err or sys.stderr
    from service.film import FilmOptions, analyze_film

    paths = [Path(p) for p in args.film]
    conditions = None
    if getattr(args, "conditions", None) is not None:
        from service.study import conditions_to_dict, parse_conditions_text

        try:  # before any work: a unit that does not parse reads no frame
            conditions = conditions_to_dict(parse_conditions_text(args.conditions))
        except RamiformError as exc:
            error = {"error": {"status": exc.status_code, "type": type(exc).__name__,
                               "detail": f"--conditions: {exc}"}, "film": [str(p) for p in paths]}
            if args.json:
                out.write(json.dumps(error) + "\n")
            else:
                err.write(f"error: --conditions: {exc}\n")
            return 2
    options = FilmOptions(filename=paths[0].name if len(paths) == 1 else None,
                          frame_interval_s=args.frame_interval, rim_radius_mm=args.rim_radius_mm,
                          pixel_size_mm=args.pixel_size, library_dir=args.library)
    try:
        if len(paths) > 1 or paths[0].suffix.lower() in _IMAGE_SUFFIXES:
            source: Any = [p.read_bytes() for p in paths]
        else:
            source = paths[0].read_bytes()
        result = analyze_film(source, options, progress=_progress(err))
    except (RamiformError, ValueError, OSError) as exc:
        status = getattr(exc, "status_code", 422 if isinstance(exc, ValueError) else 400)
        error = {"error": {"status": status, "type": type(exc).__name__, "detail": str(exc)},
                 "film": [str(p) for p in paths]}
        if args.json:
            out.write(json.dumps(error) + "\n")
        else:
            err.write(f"error: {exc}\n")
        return 1
    body = result.to_dict()
    if conditions is not None:
        body["conditions"] = conditions
    if args.json:
        out.write(json.dumps(body, allow_nan=False, separators=(",", ":")) + "\n")
    else:
        out.write("\n".join(summary_lines(body)) + "\n")
    return 0
