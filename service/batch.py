"""``ramiform analyze``: many images, analysed in parallel, printed in input order.

Each image becomes one JSON object (JSON Lines with ``--json``) or one row of a table. A
failing image yields an error object for its line and the batch goes on. Work runs in
worker processes (by default one per CPU this process may use, ``service.cpus``) or on a Dask cluster given by ``--scheduler``.
"""

from __future__ import annotations

import json
import os
import sys
from collections.abc import Iterable, Iterator
from concurrent.futures import ProcessPoolExecutor
from functools import partial
from typing import Any, TextIO

from service.analysis import AnalysisOptions
from service.cpus import usable_cpus
from service.errors import RamiformError


def analyze_path(path: str, options: AnalysisOptions) -> dict[str, Any]:
    """Analyse one file; never raises for a bad image, answers an error object instead."""
    from service.analysis import analyze_with

    from service.match.library import process_library

    try:
        # The library this process opened (the pool's initializer), or opened now and kept.
        result = analyze_with(path, options, reference_set=process_library(options.library_dir))
        return {"path": path, **result.to_dict()}
    except (RamiformError, ValueError, OSError) as exc:
        return {"path": path, "error": {"type": type(exc).__name__, "detail": str(exc)}}


def analyze_many(
    paths: Iterable[str],
    options: AnalysisOptions,
    *,
    workers: int | None = None,
    scheduler: str | None = None,
) -> Iterator[dict[str, Any]]:
    """Yield one analysis (or error) object per path, in input order, as soon as it is ready."""
    paths = list(paths)
    job = partial(analyze_path, options=options)
    if scheduler is not None:
        from distributed import Client

        with Client(scheduler) as client:
            futures = client.map(job, paths, pure=False)
            for future in futures:  # in input order; later ones keep running meanwhile
                yield future.result()
        return
    workers = workers or usable_cpus()
    if workers == 1 or len(paths) == 1:
        yield from map(job, paths)
        return
    from service.match.library import start_process_library

    with ProcessPoolExecutor(max_workers=min(workers, len(paths)), initializer=start_process_library,
                             initargs=(options.library_dir,)) as pool:
        yield from pool.map(job, paths)


_TABLE_COLUMNS = (
    ("image", 28),
    ("D box", 7),
    ("95% CI", 13),
    ("D mass", 7),
    ("tips", 6),
    ("junct.", 6),
    ("best match", 22),
    ("p", 5),
)


def _table_row(result: dict[str, Any]) -> str:
    name = os.path.basename(result["path"])[-28:]
    if "error" in result:
        return f"{name:<28} error: {result['error']['detail']}"
    f = result["features"]
    box = f["box_dimension"]
    lo, hi = box["ci95"]
    matches = result.get("matches") or []
    best = matches[0] if matches else None
    best_label = "-" if best is None else _match_label(best)
    if result.get("in_library") is False:
        best_label = "none of these"
    cells = [
        name,
        f"{box['value']:.3f}",
        f"{lo:.2f}-{hi:.2f}",
        f"{f['mass_radius_dimension']['value']:.3f}",
        str(f["skeleton"]["tips"]),
        str(f["skeleton"]["junctions"]),
        best_label,
        "-" if best is None else f"{best['probability']:.2f}",
    ]
    return " ".join(f"{c:<{w}}" for c, (_, w) in zip(cells, _TABLE_COLUMNS))


def _match_label(match: dict[str, Any]) -> str:
    params = ", ".join(f"{k}={v}" for k, v in sorted(match.get("parameters", {}).items()))
    return f"{match['regime']}" + (f" ({params})" if params else "")


def _condition_words(condition: dict[str, Any]) -> str:
    value = condition.get("value")
    text = f"{value:g}" if isinstance(value, float) else str(value)
    return f"{text} {condition['unit']}" if condition.get("unit") else text


def write_results(results: Iterable[dict[str, Any]], *, as_json: bool, out: TextIO) -> int:
    """Print results; return the number of images that failed."""
    failures = 0
    if not as_json:
        out.write(" ".join(f"{h:<{w}}" for h, w in _TABLE_COLUMNS) + "\n")
    for result in results:
        failures += "error" in result
        if as_json:
            out.write(json.dumps(result, allow_nan=False, separators=(",", ":")) + "\n")
        else:
            out.write(_table_row(result) + "\n")
            if result.get("conditions"):
                out.write("    conditions: " + "; ".join(
                    f"{name} {_condition_words(c)}" for name, c in result["conditions"].items()) + "\n")
            for warning in result.get("warnings", []):
                out.write(f"    warning: {warning['text']} [{warning['code']}]\n")
        out.flush()
    return failures


def _conditions_table(path: str, images: list[str]) -> dict[str, dict[str, Any]]:
    """``--conditions``: each image's conditions as JSON objects; ConditionError or OSError when unreadable.

    A relative path not found from the working folder is looked for beside the first image.
    """
    from service.study.table_csv import conditions_json, read_conditions_table

    beside = os.path.join(os.path.dirname(images[0]), path) if images else path
    if not os.path.exists(path) and not os.path.isabs(path) and os.path.isfile(beside):
        path = beside  # a bare name: the table beside the images
    with open(path, encoding="utf-8-sig", newline="") as handle:
        table = read_conditions_table(handle.read(), images)
    return {image: conditions_json(conditions) for image, conditions in table.items()}


def _with_conditions(results: Iterable[dict[str, Any]], table: dict[str, dict[str, Any]]) -> Iterator[dict[str, Any]]:
    for result in results:
        yield {**result, "conditions": table.get(result["path"], {})}


def run_analyze_command(args) -> int:
    """Entry point of ``ramiform analyze``; exit status 1 if any image failed, 2 for a conditions
    table that does not read (a unit outside the table, a row naming no given image)."""
    table = None
    if getattr(args, "conditions", None):
        try:
            table = _conditions_table(args.conditions, list(args.images))
        except (RamiformError, OSError, UnicodeDecodeError) as exc:
            print(f"ramiform analyze: error: --conditions {args.conditions}: {exc}", file=sys.stderr)
            return 2
    options = AnalysisOptions(
        pixel_size_mm=args.pixel_size,
        mode=args.mode,
        polarity=args.polarity,
        lighting=args.lighting,
        threshold=args.threshold,
        roi=args.roi,
        exclude=tuple(args.exclude) if args.exclude else None,
        page=args.page,
        library_dir=args.library,
    )
    results = analyze_many(args.images, options, workers=args.workers, scheduler=args.scheduler)
    if table is not None:
        results = _with_conditions(results, table)
    failures = write_results(results, as_json=args.json, out=sys.stdout)
    return 1 if failures else 0
