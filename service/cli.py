"""The ``ramiform`` command line: analyze images, serve the web app, build reference sets.

Each subcommand parses its options here and hands over to a plain function in the
numeric core or the web layer; nothing else lives in this module.
"""

from __future__ import annotations

import argparse
import math
import sys
from collections.abc import Sequence


def _numbers(text: str, counts: tuple[int, ...], what: str) -> tuple[float, ...]:
    try:
        numbers = tuple(float(part) for part in text.split(","))
    except ValueError:
        numbers = ()
    if len(numbers) not in counts or not all(math.isfinite(v) for v in numbers):
        raise argparse.ArgumentTypeError(f"{what}, got {text!r}")
    return numbers


def region_of_interest(text: str) -> tuple[float, ...]:
    """``--roi``: CX,CY,R (a circle) or CX,CY,RX,RY,ANGLE (an ellipse; degrees from +x towards +y), px."""
    expected = "expected CX,CY,R (a circle) or CX,CY,RX,RY,ANGLE (an ellipse) in pixels"
    numbers = _numbers(text, (3, 5), expected)
    if not all(radius > 0 for radius in numbers[2:4]):
        raise argparse.ArgumentTypeError(f"the radii must be positive ({expected}), got {text!r}")
    return numbers


def exclusion_box(text: str) -> tuple[int, int, int, int]:
    """``--exclude``: X0,Y0,X1,Y1 in px, columns x0..x1 and rows y0..y1 (ends excluded)."""
    x0, y0, x1, y1 = _numbers(text, (4,), "expected X0,Y0,X1,Y1 in pixels")
    if not (x1 > x0 and y1 > y0):
        raise argparse.ArgumentTypeError(f"the box needs X1 > X0 and Y1 > Y0, got {text!r}")
    return (math.floor(x0), math.floor(y0), math.ceil(x1), math.ceil(y1))


def _threshold(text: str) -> float:
    value = _numbers(text, (1,), "expected a number strictly between 0 and 1")[0]
    if not 0 < value < 1:
        raise argparse.ArgumentTypeError(f"expected a number strictly between 0 and 1, got {text!r}")
    return value


def _add_analyze(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("analyze", help="measure specimen images and rank them against the reference set")
    p.add_argument("images", nargs="+", metavar="IMAGE", help="image files (PNG, JPEG, TIFF, BMP)")
    p.add_argument("--pixel-size", type=float, default=None, metavar="MM",
                   help="pixel size in millimetres (overrides TIFF resolution tags)")
    p.add_argument("--json", action="store_true", help="print one JSON object per image (JSON Lines)")
    p.add_argument("--workers", type=int, default=None, help="worker processes (default: one per CPU this process may use)")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS", help="run on an existing Dask cluster")
    p.add_argument("--library", default=None, metavar="DIR", help="reference set (default: the bundled one)")
    p.add_argument("--mode", choices=["auto", "threshold", "ridge"], default="auto", help="segmentation mode")
    p.add_argument("--polarity", choices=["auto", "dark", "bright"], default="auto",
                   help="whether the specimen is darker or brighter than its background")
    p.add_argument("--lighting", choices=["auto", "smooth", "patchy"], default="auto",
                   help="how the light is evened: smooth (gradients, vignetting) or patchy (shadows)")
    p.add_argument("--threshold", type=_threshold, default=None,
                   help="fixed threshold on the flattened image (strictly between 0 and 1)")
    p.add_argument("--roi", type=region_of_interest, default=None, metavar="CX,CY,R|CX,CY,RX,RY,ANGLE",
                   help="the dish or region to analyse, in px: a circle, or an ellipse whose RX axis lies ANGLE "
                        "degrees from +x towards +y (default: found in the image)")
    p.add_argument("--exclude", type=exclusion_box, action="append", default=None, metavar="X0,Y0,X1,Y1",
                   help="a box to leave out (a label, a wire, glare), px, end excluded; repeat for several")
    p.add_argument("--page", type=int, default=None, help="TIFF page to read (default: the first)")
    p.add_argument("--conditions", default=None, metavar="TABLE.csv",
                   help="CSV of each image's conditions: first column the image file name, then one column per "
                        "condition headed 'name [unit]' (e.g. 'voltage [V]', 'concentration [mmol/L]') or 'name' "
                        "for a text; they appear under 'conditions' in each result")
    p.set_defaults(func=_run_analyze)


def _run_analyze(args: argparse.Namespace) -> int:
    from service.batch import run_analyze_command

    return run_analyze_command(args)


def _positive(text: str) -> float:
    value = _numbers(text, (1,), "expected a positive number")[0]
    if not value > 0:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}")
    return value


def _add_film(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("film", help="follow a deposit growing in a film: growth curves, front speed, time to rim")
    p.add_argument("film", nargs="+", metavar="FILM",
                   help="a video (MP4, MOV, AVI) or multi-page TIFF; or several frame images in order")
    p.add_argument("--frame-interval", type=_positive, default=None, metavar="SECONDS",
                   help="seconds between frames (replaces the times the file carries; needed for frame images)")
    p.add_argument("--rim-radius-mm", type=_positive, default=None, metavar="MM",
                   help="radius of the rim electrode from the centre electrode, mm (needs --pixel-size)")
    p.add_argument("--pixel-size", type=_positive, default=None, metavar="MM", help="pixel size in millimetres")
    p.add_argument("--library", default=None, metavar="DIR", help="reference set (default: the bundled one)")
    p.add_argument("--conditions", default=None, metavar="TEXT",
                   help='the run\'s conditions, e.g. "voltage = 4 V; electrolyte = CuSO4" (or a JSON object); '
                        "they appear under 'conditions' in the result; a unit that does not parse stops "
                        "before any work (status 2)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=_run_film)


def _run_film(args: argparse.Namespace) -> int:
    from service.film.command import run_film_command

    return run_film_command(args)


def _add_serve(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("serve", help="run the web service")
    p.add_argument("--host", default="127.0.0.1")
    p.add_argument("--port", type=int, default=8000)
    p.set_defaults(func=_run_serve)


def _run_serve(args: argparse.Namespace) -> int:
    from service.web.server import serve

    serve(host=args.host, port=args.port)
    return 0


def _add_library(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("library", help="reference sets of simulated clusters")
    lsub = p.add_subparsers(dest="library_command", required=True)
    b = lsub.add_parser("build", help="grow a reference set on Dask")
    b.add_argument("--out", default=None, metavar="DIR", help="output folder (default: reference_sets/<preset>)")
    b.add_argument("--scheduler", default=None, metavar="ADDRESS", help="address of an existing Dask scheduler")
    b.add_argument("--workers", type=int, default=None, help="LocalCluster workers (default: one per CPU this process may use)")
    b.add_argument("--preset", default="default", help="which ensemble to grow (default, tiny, ...)")
    b.add_argument("--skip-features", action="store_true",
                   help="grow and store the clusters only; the matcher's feature cache is left unbuilt")
    b.set_defaults(func=_run_library_build)
    r = lsub.add_parser("refit", help="refit the matcher's model of a reference set and store it beside its features")
    r.add_argument("library", nargs="?", default=None, metavar="DIR",
                   help="reference set folder (default: the bundled one)")
    r.set_defaults(func=_run_library_refit)


def _run_library_build(args: argparse.Namespace) -> int:
    from pathlib import Path

    from service.library.build import run_build_command

    args.out = args.out or str(Path(__file__).resolve().parents[1] / "reference_sets" / args.preset)
    status = run_build_command(args)
    if status or args.skip_features:
        return status
    # A set is usable for ranking only with the matcher's features of every cluster beside it.
    from service.match import build_feature_cache

    build_feature_cache(args.out, scheduler=args.scheduler, workers=args.workers)
    print(f"matcher features cached in {args.out}/cache")
    return _run_library_refit(argparse.Namespace(library=args.out))


def _run_library_refit(args: argparse.Namespace) -> int:
    # The fitted model is stored so that every later process loads it instead of refitting.
    from service.errors import RamiformError
    from service.library import load_reference_set
    from service.match.persist import store_reference_model

    try:
        path = store_reference_model(load_reference_set(args.library))
    except (RamiformError, OSError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    print(f"matcher model stored in {path}")
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="ramiform", description=__doc__.splitlines()[0])
    from service import __version__

    parser.add_argument("--version", action="version", version=f"ramiform {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)
    _add_analyze(sub)
    _add_film(sub)
    _add_serve(sub)
    _add_library(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    return int(args.func(args) or 0)


if __name__ == "__main__":
    sys.exit(main())
