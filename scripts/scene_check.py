"""Judge automatic segmentation on randomized bench photographs of known deposits.

Runs N scenes from ``tests/imaging/scenes.py`` (seeds START .. START+N-1), segments each
photo with ``service.imaging.segment`` (automatic everything), and prints per scene the IoU
with the true deposit and what was drawn, then the IoU distribution, the pass rate, a
breakdown by nuisance, and the worst scenes. ``--save-worst K --out DIR`` writes the K
worst as PNGs: photo | photo with the reading (white: right, red: missed, green: extra).
"took" lists what the reading took besides the deposit (electrode, wire, tape, glare, rim,
solution, bench) and what it missed, as fractions of the deposit's area.

    python scripts/scene_check.py 100
    python scripts/scene_check.py 300 --dimension --save-worst 12 --out /tmp/worst
    python scripts/scene_check.py --seeds 7,28 --describe --save-worst 2 --out /tmp/two

The slow test ``tests/imaging/test_scenes.py`` uses the same scenes (seeds from 0).
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from tests.imaging.scenes import judge, random_scene, report, summary  # noqa: E402


def _picture(photo: np.ndarray, truth: np.ndarray, mask: np.ndarray | None) -> np.ndarray:
    shown = (photo.astype(np.float64) * 0.45).astype(np.uint8)
    if mask is None:
        mask = np.zeros_like(truth)
    shown[truth & mask] = (255, 255, 255)
    shown[truth & ~mask] = (255, 40, 40)
    shown[~truth & mask] = (40, 255, 40)
    return np.concatenate([photo, np.full((photo.shape[0], 6, 3), 128, np.uint8), shown], axis=1)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("n", type=int, nargs="?", default=50, help="number of scenes (default 50)")
    parser.add_argument("--start", type=int, default=0, help="first seed (default 0)")
    parser.add_argument("--dimension", action="store_true", help="also compare box dimensions (slower)")
    parser.add_argument("--save-worst", type=int, default=0, metavar="K", help="save the K worst scenes as PNG")
    parser.add_argument("--out", type=Path, default=Path("scene_check_worst"), help="folder for the PNGs")
    parser.add_argument("--seeds", default=None, metavar="S1,S2,...", help="these seeds instead of N from --start")
    parser.add_argument("--describe", action="store_true", help="print the full description of the worst scenes")
    parser.add_argument("--quiet", action="store_true", help="only the summary, not one line per scene")
    args = parser.parse_args(argv)

    from PIL import Image

    records, descriptions = [], {}
    kept: list[tuple[float, int, np.ndarray]] = []
    t0 = time.perf_counter()
    seeds = [int(v) for v in args.seeds.split(",")] if args.seeds else range(args.start, args.start + args.n)
    for seed in seeds:
        scene = random_scene(seed)
        t = time.perf_counter()
        record = judge(scene, dimension=args.dimension)
        record["seconds"] = time.perf_counter() - t
        descriptions[seed] = scene.description
        mask = record.pop("mask")
        records.append(record)
        if not args.quiet:
            dims = ""
            if args.dimension:
                d_seg = "-" if record["d_seg"] is None else f"{record['d_seg']:.3f}"
                dims = f" D {record['d_true']:.3f}->{d_seg}{'' if record['d_usable'] else '(unusable)'}"
            err = f" [{record['error']}]" if record["error"] else ""
            if record.get("taken"):
                err += " took " + ", ".join(f"{k} {v:.2f}" for k, v in record["taken"].items())
            print(f"IoU {record['iou']:.3f}{dims} {record['seconds']:.2f}s{err}  {summary(scene.description)}",
                  flush=True)
        if args.save_worst:
            kept.append((record["iou"], seed, _picture(scene.photo, scene.truth, mask)))
            kept.sort(key=lambda item: item[0])
            del kept[args.save_worst:]
    print()
    print(report(records, descriptions))
    seconds = np.array([r["seconds"] for r in records])
    print(f"segment{' + measure' if args.dimension else ''}: median {np.median(seconds):.2f}s, "
          f"total {time.perf_counter() - t0:.0f}s with rendering")
    if args.describe:
        for record in sorted(records, key=lambda r: r["iou"])[:10]:
            print(f"IoU {record['iou']:.3f}: {json.dumps(descriptions[record['seed']])}")
    if kept:
        args.out.mkdir(parents=True, exist_ok=True)
        for value, seed, picture in kept:
            path = args.out / f"iou{value:.3f}_seed{seed}.png"
            Image.fromarray(picture).save(path)
        print(f"saved {len(kept)} pictures to {args.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
