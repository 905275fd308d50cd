"""A 200-frame 1080p growth film analysed, beside the bare per-frame primitives in the same run.

Goal (issue 13): a 200-frame 1920 x 1080 film analysed in under 2 minutes on 2 cores, with
progress shown. The per-frame primitives (decode one frame, phase correlation against the
first, one threshold comparison, connected-component labelling) are timed on the same film,
so the figure can be read against what the machine does anyway.

The film is made by the project (demo data): a DLA cluster of 8000 sites grown and drawn at
1080 px, each frame showing the sites up to its cut of the arrival order over an empty dish
photographed alike, padded to 1920 px wide with the bench, encoded to MP4 with PyAV.
Run: ``.venv/bin/python benchmarks/bench_film.py [N_FRAMES]``.
"""

from __future__ import annotations

import sys
import time

import numpy as np


def make_film(n_frames: int = 200, *, height_px: int = 1080, width_px: int = 1920, n_sites: int = 8000,
              seed: int = 21) -> bytes:
    """Frames blended from two renderings (empty dish, full deposit) by each frame's drawn mask."""
    from scipy import ndimage

    from service.film.synthetic import encode_video
    from service.imaging.render import render_specimen
    from service.simulate import grow

    order = grow("dla", n_sites, seed=seed)
    full = render_specimen(order > 0, seed=seed, size_px=height_px, noise=0.0, blur_px=1.2)
    seed_only = np.zeros_like(order, dtype=bool)
    seed_only[order.shape[0] // 2, order.shape[1] // 2] = True
    empty = render_specimen(seed_only, seed=seed, size_px=height_px, noise=0.0, extent=full.scale_px / height_px)
    # Each drawn pixel takes the arrival of the nearest site: upscale the order as render_specimen does.
    h0, w0 = order.shape
    cy, cx = full.center_rc
    rows = np.clip(np.rint(h0 // 2 + (np.arange(height_px) - cy) / full.scale_px).astype(int), 0, h0 - 1)
    cols = np.clip(np.rint(w0 // 2 + (np.arange(height_px) - cx) / full.scale_px).astype(int), 0, w0 - 1)
    arrival = order[np.ix_(rows, cols)].astype(np.int32)
    _, (ir, ic) = ndimage.distance_transform_edt(arrival == 0, return_indices=True)
    arrival = np.where(full.truth, arrival[ir, ic], 0)
    n = int(order.max())
    cuts = np.round(n * (0.1 + 0.9 * np.arange(n_frames) / (n_frames - 1))).astype(int)
    pad = (width_px - height_px) // 2
    rng = np.random.default_rng(seed)
    frames = []
    a = full.image.astype(np.float32)
    b = empty.image.astype(np.float32)
    for cut in cuts:
        coverage = ndimage.gaussian_filter(((arrival > 0) & (arrival <= cut)).astype(np.float32), 1.2)
        frame = b + coverage[:, :, None] * (a - b) + rng.normal(0, 4.0, size=(height_px, height_px, 1))
        frame = np.clip(frame, 0, 255).astype(np.uint8)
        frames.append(np.pad(frame, ((0, 0), (pad, width_px - height_px - pad), (0, 0)), mode="edge"))
    return encode_video(frames, fps=1.0, bit_rate=12_000_000)


def primitives_per_frame(video: bytes, n_sample: int = 10) -> dict[str, float]:
    """Seconds per frame of the bare steps, timed on the first ``n_sample`` frames of the film."""
    import io

    import av
    from scipy import ndimage
    from skimage.registration import phase_cross_correlation

    with av.open(io.BytesIO(video)) as c:
        start = time.perf_counter()
        grays = []
        for frame in c.decode(video=0):
            grays.append(frame.to_ndarray(format="rgb24").astype(np.float32) @ np.array([0.2125, 0.7154, 0.0721],
                                                                                         dtype=np.float32) / 255)
            if len(grays) == n_sample:
                break
        decode = (time.perf_counter() - start) / n_sample
    first = grays[0]
    start = time.perf_counter()
    for g in grays:
        phase_cross_correlation(first, g, normalization=None)
    register = (time.perf_counter() - start) / n_sample
    start = time.perf_counter()
    for g in grays:
        ndimage.label(g < 0.5)
    threshold_label = (time.perf_counter() - start) / n_sample
    return {"decode_s": decode, "phase_correlation_full_frame_s": register, "threshold_and_label_s": threshold_label}


def main() -> int:
    from service.film import FilmOptions, analyze_film
    from service.film.command import _progress

    n_frames = int(sys.argv[1]) if len(sys.argv) > 1 else 200
    start = time.perf_counter()
    video = make_film(n_frames)
    print(f"film made: {n_frames} frames 1920 x 1080, {len(video) / 1e6:.1f} MB MP4 "
          f"({time.perf_counter() - start:.1f} s, not timed below)", flush=True)
    prims = primitives_per_frame(video)
    start = time.perf_counter()
    result = analyze_film(video, FilmOptions(frame_interval_s=30.0), progress=_progress(sys.stderr))
    elapsed = time.perf_counter() - start
    body = result.to_dict()
    bare = sum(prims.values()) * n_frames
    print(f"film analysed: {elapsed:.1f} s for {n_frames} frames ({elapsed / n_frames * 1000:.0f} ms a frame); "
          f"goal under 120 s")
    print("bare primitives a frame: " + ", ".join(f"{k} {v * 1000:.0f} ms" for k, v in prims.items())
          + f"; times {n_frames} frames: {bare:.1f} s")
    print(f"frames used {body['frames_used']} of {body['frames']}; area {body['growth']['area_px'][0]} -> "
          f"{body['growth']['area_px'][-1]} px; warnings: {len(body['warnings'])}")
    return 0 if elapsed < 120 else 1


if __name__ == "__main__":
    sys.exit(main())
