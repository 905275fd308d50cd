"""Whole-image analysis against the bare primitives it is built from, side by side in one run.

Goal (issue 3): analysing a 2048 x 2048 photo costs at most 2.5x the primitives alone (Otsu
threshold, connected-component labelling, skeletonize, Euclidean distance transform) on the
same image; peak memory for a 4096 x 4096 photo stays under 1.5 GB.

The photos are renderings of grown DLA clusters made by the project (demo data): three
different ones for the speed figures, so that no analysis meets the mask of the one before.
Run: ``.venv/bin/python benchmarks/bench_analysis.py``.
"""

from __future__ import annotations

import io
import subprocess
import sys
import time

import numpy as np


def _photo_bytes(size_px: int, seed: int = 7) -> bytes:
    from PIL import Image

    from service.imaging import render_photo
    from service.simulate import dla

    image = render_photo(dla(20_000, seed=seed) > 0, seed=seed, size_px=size_px)
    buffer = io.BytesIO()
    Image.fromarray(image).save(buffer, format="PNG")
    return buffer.getvalue()


def _primitives(gray: np.ndarray) -> None:
    from scipy import ndimage
    from skimage.filters import threshold_otsu
    from skimage.morphology import skeletonize

    mask = gray < threshold_otsu(gray)
    ndimage.label(mask)
    skeletonize(mask)
    ndimage.distance_transform_edt(mask)


def _best_of(fn, repeats: int = 3) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def _mean_over(photos: list[bytes], fn, rounds: int) -> float:
    """Best over ``rounds`` of the mean time of ``fn`` on each photo in turn (so no call meets
    the photo of the call before it: the measurements keep the last skeleton for the matcher)."""
    best = float("inf")
    for _ in range(rounds):
        start = time.perf_counter()
        for data in photos:
            fn(data)
        best = min(best, (time.perf_counter() - start) / len(photos))
    return best


def speed(size_px: int = 2048) -> None:
    from service.analysis import analyze
    from service.imaging import load_image

    photos = [_photo_bytes(size_px, seed) for seed in (7, 8, 9)]
    analyze(_photo_bytes(size_px, 10), match=False)  # compile numba kernels before timing
    t_primitives = float(np.mean([_best_of(lambda gray=load_image(data).gray: _primitives(gray)) for data in photos]))
    t_analysis = _mean_over(photos, lambda data: analyze(data, match=False), rounds=2)
    t_matched = _mean_over(photos, analyze, rounds=1)
    print(f"{size_px}x{size_px} photos (3 different, means): primitives {t_primitives:.2f} s, analysis without "
          f"ranking {t_analysis:.2f} s, ratio {t_analysis / t_primitives:.2f} (goal <= 2.5); "
          f"with ranking {t_matched:.2f} s")


def memory(size_px: int = 4096) -> None:
    """Peak resident memory of one analysis in a fresh process that only reads the file first."""
    import tempfile

    with tempfile.NamedTemporaryFile(suffix=".png") as photo:
        photo.write(_photo_bytes(size_px))
        photo.flush()
        code = (
            # VmHWM (peak resident set of this address space) starts afresh at exec, unlike
            # ru_maxrss, which Linux carries over from the forking parent.
            "import re; from pathlib import Path;"
            "hwm = lambda: int(re.search(r'VmHWM:\\s+(\\d+)', Path('/proc/self/status').read_text()).group(1));"
            "from service.analysis import analyze;"
            f"data = Path({photo.name!r}).read_bytes();"
            "base = hwm(); analyze(data, match=False); print(base, hwm())"
        )
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    base_kb, peak_kb = map(int, out.stdout.split()[-2:])
    print(f"{size_px}x{size_px} photo: peak resident memory {peak_kb / 1024:.0f} MB "
          f"(of which {base_kb / 1024:.0f} MB before the analysis started; goal < 1536 MB)")


if __name__ == "__main__":
    speed()
    memory()
