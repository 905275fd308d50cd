"""What a user waits for at the command line, each figure beside its baseline from the same run.

Goals (issue 11):

- ``ramiform analyze one.png`` (2048 x 2048) from the shell in under 2.5 s, with the fitted
  reference model stored beside the feature cache; baseline: the same command with the
  stored model removed (it is then refitted at every start).
- The stored model loads in under 0.3 s; baseline: fitting it.
- In a batch allowed one CPU (affinity mask of one core, like ``taskset -c 0``), each image
  costs at most 1.5x its bare primitives: Otsu threshold, labelling, skeletonize and the
  Euclidean distance transform of the deposit mask, timed on the same core, with the
  decoding of the PNG that every image of the batch needs too. Baseline: the
  same batch with two workers, what sizing the pool by ``os.cpu_count()`` gave here.

The photograph is a rendering (``service.imaging.render``) of a simulated DLA cluster of
20,000 particles; the batch's images are renderings of different clusters (seeds 7, 8, ...),
so that no worker meets a mask it has seen. Shell figures are wall times of fresh interpreters (``python -m
service.cli``) with the CPU time (user + system) beside them, alternating A and B; the
machine is shared, so medians of several runs are printed and compared within one run.
Run: ``.venv/bin/python benchmarks/bench_cli.py [--repeats 5] [--batch 4]``.
"""

from __future__ import annotations

import argparse
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SIZE_PX = 2048


def write_photo(path: Path, size_px: int = SIZE_PX, seed: int = 7) -> Path:
    from PIL import Image

    from service.imaging import render_photo
    from service.simulate import dla

    Image.fromarray(render_photo(dla(20_000, seed=seed) > 0, seed=seed, size_px=size_px)).save(path)
    return path


def copy_of_bundled_set(folder: Path, *, with_model: bool) -> Path:
    """The bundled set in ``folder`` (clusters linked, cache copied), with or without its stored model."""
    from service.library.load import DEFAULT_DIR
    from service.match.persist import MODEL_NAME

    folder.mkdir(parents=True)
    for name in ("clusters", "thumbnails"):
        (folder / name).symlink_to(DEFAULT_DIR / name, target_is_directory=True)
    shutil.copy2(DEFAULT_DIR / "manifest.json", folder / "manifest.json")
    shutil.copytree(DEFAULT_DIR / "cache", folder / "cache")
    if not with_model:
        (folder / "cache" / f"{MODEL_NAME}.npz").unlink()
    return folder


def _one_cpu() -> int:
    return min(os.sched_getaffinity(0))


def run_timed(args: list[str], *, env: dict[str, str] | None = None, pin: int | None = None) -> tuple[float, float]:
    """Wall and CPU (user + system) seconds of one child process; raises if it fails."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    started = time.perf_counter()
    done = subprocess.run(
        args, cwd=ROOT, env={**os.environ, **(env or {})}, capture_output=True, text=True,
        preexec_fn=(lambda: os.sched_setaffinity(0, {pin})) if pin is not None else None,
    )
    wall = time.perf_counter() - started
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if done.returncode != 0:
        raise RuntimeError(f"{' '.join(args)} failed:\n{done.stderr[-3000:]}")
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu


def _median(values: list[float]) -> float:
    return statistics.median(values)


def _line(label: str, walls: list[float], cpus: list[float]) -> str:
    return (f"  {label:<44} wall median {_median(walls):5.2f} s (min {min(walls):5.2f})   "
            f"cpu median {_median(cpus):5.2f} s")


def shell_analyze(photo: Path, work: Path, repeats: int) -> None:
    stored = copy_of_bundled_set(work / "stored", with_model=True)
    refit = copy_of_bundled_set(work / "refit", with_model=False)
    cli = [sys.executable, "-m", "service.cli", "analyze", str(photo), "--library"]
    # RAMIFORM_STORE_MODELS=0: the copy without a model stays without one, so every run refits.
    env = {"RAMIFORM_STORE_MODELS": "0"}
    run_timed([*cli, str(stored)], env=env)  # warm the file cache and numba's on-disk cache
    results: dict[str, tuple[list[float], list[float]]] = {"stored": ([], []), "refit": ([], [])}
    for _ in range(repeats):
        for name, folder in (("stored", stored), ("refit", refit)):
            wall, cpu = run_timed([*cli, str(folder)], env=env)
            results[name][0].append(wall)
            results[name][1].append(cpu)
    print(f"`ramiform analyze` of one {SIZE_PX} x {SIZE_PX} photo from the shell ({repeats} runs each, alternating):")
    print(_line("stored reference model (goal < 2.5 s wall)", *results["stored"]))
    print(_line("baseline: stored model removed (refit)", *results["refit"]))
    print(f"  saved: {_median(results['refit'][0]) - _median(results['stored'][0]):.2f} s wall")


def model_load(repeats: int) -> None:
    from service.library import load_reference_set
    from service.match.persist import is_fresh, load_model
    from service.match.ranking import fit_reference_model

    reference_set = load_reference_set()
    if not is_fresh(reference_set):
        print("model load: the bundled stored model is stale; run `ramiform library refit` first")
        return
    loads, fits = [], []
    for _ in range(repeats):
        started = time.perf_counter()
        load_model(load_reference_set())  # a fresh ReferenceSet, as a new process has
        loads.append(time.perf_counter() - started)
    for _ in range(max(1, repeats // 3)):
        started = time.perf_counter()
        fit_reference_model(load_reference_set())
        fits.append(time.perf_counter() - started)
    print("Reference model of the bundled set, in process:")
    print(f"  load the stored model (goal < 0.3 s)           median {_median(loads) * 1e3:6.1f} ms "
          f"(min {min(loads) * 1e3:.1f})")
    print(f"  baseline: fit and calibrate it                 median {_median(fits):6.2f} s")


_PRIMITIVES = r"""
import sys, time
import numpy as np
from scipy import ndimage
from skimage.filters import threshold_otsu
from skimage.morphology import skeletonize
from service.imaging import load_image

def primitives(gray):
    mask = gray < threshold_otsu(gray)  # the specimen is the dark side
    labels, _ = ndimage.label(mask)
    # the deposit: dark pieces not touching the frame (the shadow beyond the dish does)
    frame = np.unique(np.concatenate([labels[0], labels[-1], labels[:, 0], labels[:, -1]]))
    deposit = mask & ~np.isin(labels, frame[frame > 0])
    skeletonize(deposit)
    ndimage.distance_transform_edt(deposit)

repeats = int(sys.argv[1])
for path in sys.argv[2:]:
    data = open(path, "rb").read()
    gray = load_image(data).gray
    primitives(gray)
    bare, decoded, decoded_cpu = [], [], []
    for _ in range(repeats):
        started = time.perf_counter()
        primitives(gray)
        bare.append(time.perf_counter() - started)
        started, cpu = time.perf_counter(), time.process_time()
        primitives(load_image(data).gray)
        decoded.append(time.perf_counter() - started)
        decoded_cpu.append(time.process_time() - cpu)
    print(sorted(bare)[repeats // 2], sorted(decoded)[repeats // 2], sorted(decoded_cpu)[repeats // 2])
"""


def one_cpu_batch(photos: list[Path], repeats: int) -> None:
    """Per-image cost of a batch of different photographs on one CPU against their primitives.

    The batch's images differ (a batch of copies of one photograph would let a worker reuse
    what it computed for the first, such as the skeleton of an identical mask); the
    reference is the mean of the primitives' medians over the images after the first.
    """
    cpu = _one_cpu()
    batch = len(photos)
    cli = [sys.executable, "-m", "service.cli", "analyze", "--json"]
    # Per-image cost: the batch minus its first image alone (start-up cancels).
    per_image: dict[str, list[float]] = {"default": [], "two workers": []}
    per_image_cpu: dict[str, list[float]] = {"default": [], "two workers": []}
    for _ in range(repeats):
        for name, extra in (("default", []), ("two workers", ["--workers", "2"])):
            one, one_cpu = run_timed([*cli, *extra, str(photos[0])], pin=cpu)
            many, many_cpu = run_timed([*cli, *extra, *map(str, photos)], pin=cpu)
            per_image[name].append((many - one) / (batch - 1))
            per_image_cpu[name].append((many_cpu - one_cpu) / (batch - 1))
    out = subprocess.run([sys.executable, "-c", _PRIMITIVES, str(max(3, repeats)), *map(str, photos[1:])], cwd=ROOT,
                         capture_output=True, text=True, check=True,
                         preexec_fn=lambda: os.sched_setaffinity(0, {cpu}))
    rows = [[float(v) for v in line.split()] for line in out.stdout.strip().splitlines()[-(batch - 1):]]
    bare, primitives, primitives_cpu = (statistics.mean(column) for column in zip(*rows))
    default, two = _median(per_image["default"]), _median(per_image["two workers"])
    print(f"Batch of {batch} different photos on one CPU (affinity {{{cpu}}}), per image = (T({batch}) - T(1)) / "
          f"{batch - 1}, medians of {repeats}; primitives: mean over the same {batch - 1} images:")
    print(f"  bare primitives (Otsu, label, skeletonize, EDT)   {bare:5.2f} s on the decoded image")
    print(f"  the same with decoding the PNG, as every image    {primitives:5.2f} s (the reference below); "
          f"cpu {primitives_cpu:.2f} s")
    print(f"  default pool (usable CPUs)                        {default:5.2f} s = {default / primitives:.2f}x "
          f"the primitives (goal <= 1.5x); cpu {_median(per_image_cpu['default']):.2f} s = "
          f"{_median(per_image_cpu['default']) / primitives_cpu:.2f}x")
    print(f"  baseline: two workers (os.cpu_count() here)       {two:5.2f} s = {two / primitives:.2f}x; "
          f"cpu {_median(per_image_cpu['two workers']):.2f} s = {_median(per_image_cpu['two workers']) / primitives_cpu:.2f}x")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--batch", type=int, default=4)
    args = parser.parse_args()
    sys.path.insert(0, str(ROOT))
    # Other work on the machine stretches every wall time; say how busy it was.
    print("load average at start: " + " ".join(f"{x:.1f}" for x in os.getloadavg())
          + f" on {os.cpu_count()} CPUs ({len(os.sched_getaffinity(0))} usable by this process)")
    with tempfile.TemporaryDirectory(prefix="ramiform-bench-cli-") as tmp:
        work = Path(tmp)
        photo = write_photo(work / "one.png")
        shell_analyze(photo, work, args.repeats)
        model_load(args.repeats)
        batch = [photo] + [write_photo(work / f"batch_{i}.png", seed=7 + i) for i in range(1, args.batch)]
        one_cpu_batch(batch, max(2, args.repeats // 2))
    print("load average at end: " + " ".join(f"{x:.1f}" for x in os.getloadavg()))


if __name__ == "__main__":
    main()
